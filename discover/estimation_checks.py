"""Checks of the arguments of the state estimator and of its linear-system helpers.

Used by :mod:`discover.estimation` and :mod:`discover.linear_systems`; each error
names the argument, says what is accepted and what arrived.
"""

from __future__ import annotations

import math
from numbers import Real

import numpy as np

from .exceptions import DataError


def _as_float(name, value):
    try:
        return np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        kind = type(value).__name__
        raise DataError(f"`{name}` must be numbers (an array of floats). Got {kind}.") from None


def _is_real(value):
    return isinstance(value, Real) and not isinstance(value, bool) and math.isfinite(value)


def _square(name, value, n=None):
    value = _as_float(name, value)
    if value.ndim != 2 or value.shape[0] != value.shape[1] or (n is not None and value.shape[0] != n):
        size = "square" if n is None else f"of shape ({n}, {n})"
        raise DataError(f"`{name}` must be a {size} matrix. Got shape {value.shape}.")
    if not np.all(np.isfinite(value)):
        raise DataError(f"`{name}` has non-finite entries.")
    return value



def _vector(name, value, n, *, what="state", positive=False, nonnegative=False):
    value = _as_float(name, value)
    if value.ndim == 0 and name != "x0":
        value = np.full(n, float(value))
    if value.shape != (n,):
        raise DataError(f"`{name}` must have shape ({n},), one value per {what}. Got shape {value.shape}.")
    if not np.all(np.isfinite(value)):
        raise DataError(f"`{name}` must be finite. Got {value.tolist()}.")
    if positive and np.any(value <= 0):
        raise DataError(
            f"`{name}` must be > 0 for every entry (a zero std makes a sample exact, which the "
            f"filter cannot represent; use a small positive value). Got {value.tolist()}."
        )
    if nonnegative and np.any(value < 0):
        raise DataError(f"`{name}` must be >= 0 for every entry. Got {value.tolist()}.")
    return value


def _samples(name, value, n_samples, what):
    value = _as_float(name, value)
    if value.ndim != 2 or value.shape[0] != n_samples:
        raise DataError(
            f"`{name}` must have shape (n_samples, n_{what}) = ({n_samples}, ...), one row per time. "
            f"Got shape {value.shape}."
            + (" Use reshape(-1, 1) for a single column." if value.ndim == 1 else "")
        )
    bad = ~np.isfinite(value)
    if bad.any():
        row, column = np.argwhere(bad)[0]
        raise DataError(
            f"`{name}` has {int(bad.sum())} non-finite values (first at row {row}, column {column}). "
            "Drop or interpolate them first."
        )
    return value


def _check_times(t):
    t = _as_float("t", t)
    if t.ndim != 1 or len(t) == 0:
        raise DataError(f"`t` must be a non-empty 1-D array of times. Got shape {t.shape}.")
    if not np.all(np.isfinite(t)):
        raise DataError(f"`t` has non-finite values (first at index {int(np.argmax(~np.isfinite(t)))}).")
    steps = np.diff(t)
    if np.any(steps <= 0):
        k = int(np.argmax(steps <= 0))
        raise DataError(
            f"`t` must be strictly increasing; t[{k + 1}]={t[k + 1]:.6g} follows t[{k}]={t[k]:.6g}. "
            "Sort the run and drop repeated times."
        )
    return t


def _evaluate(name, fun, x, u, n_columns, what):
    """``fun(x, u)`` checked to return shape (len(x), n_columns)."""
    value = np.asarray(fun(x, u), dtype=float)
    if value.shape != (len(x), n_columns):
        raise DataError(
            f"`{name}(x, u)` must return shape (n, {n_columns}) (one column per {what}) for x of shape "
            f"{x.shape} and u of shape {u.shape}. Got shape {value.shape}."
        )
    if not np.all(np.isfinite(value)):
        raise DataError(
            f"`{name}(x, u)` is not finite at x0={x[0].tolist()} with the first input u={u[0].tolist()}."
        )
    return value
