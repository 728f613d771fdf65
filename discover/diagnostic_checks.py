"""Checks shared by the validation diagnostics (:mod:`discover.diagnostics`).

Residuals, excitation and coverage take runs as lists of arrays plus names, and
options such as a share or a count; these check them at the entry of each public
function and name the run, column or option that is wrong.
"""

from __future__ import annotations

import numpy as np

from .exceptions import ConfigError, DataError


def _as_runs(arrays, names, what, run_names=None):
    """A list of float64 arrays of shape (n_samples, len(names)), checked."""
    if arrays is None:
        arrays = []
    elif isinstance(arrays, np.ndarray):
        arrays = [arrays]
    runs = []
    for k, array in enumerate(arrays):
        run = run_names[k] if run_names is not None and k < len(run_names) else f"#{k}"
        a = np.asarray(array, dtype=float)
        a = a.reshape(-1, 1) if a.ndim == 1 else a
        if a.ndim != 2 or a.shape[1] != len(names):
            raise DataError(f"{what} of run {run!r} must have shape (n_samples, {len(names)}) for the names "
                            f"{tuple(names)}. Got shape {np.shape(array)}.")
        bad = ~np.isfinite(a)
        if bad.any():
            row, col = np.argwhere(bad)[0]
            raise DataError(f"{what} of run {run!r}, column {names[col]!r} has {int(bad[:, col].sum())} "
                            f"non-finite values (first at row {row}). Drop those rows first (a diverged "
                            "simulation leaves NaN after the time it was stopped).")
        runs.append(a)
    return runs


def _run_names(run_names, n_runs):
    if run_names is None:
        return tuple(f"#{k}" for k in range(n_runs))
    if len(run_names) != n_runs:
        raise DataError(f"`run_names` must name each of the {n_runs} runs. Got {len(run_names)} names.")
    return tuple(run_names)


def _check_share(value, name):
    if not (isinstance(value, (float, int)) and 0 < value < 1):
        raise ConfigError(f"`{name}` must be a number strictly between 0 and 1. Got {value!r}.")


def _check_count(value, name, least=1):
    if not (isinstance(value, (int, np.integer)) and not isinstance(value, bool) and value >= least):
        raise ConfigError(f"`{name}` must be an int >= {least}. Got {value!r}.")
