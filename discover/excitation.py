"""Excitation of the inputs in the training runs, part of :mod:`discover.diagnostics`.

Per input, the frequency band holding a given share of its power (Welch periodogram,
``scipy.signal.welch``) and its order of persistent excitation (Ljung, *System
Identification: Theory for the User*, 2nd ed. 1999, sec. 13.2), on a uniform grid;
and the inputs whose order falls short of the number of their library terms.

Section numbers cited below other than Ljung's sec. 13.2 are from memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import welch

from .derivatives import UNIFORM_STEP_RTOL
from .diagnostic_checks import _as_runs, _check_count, _check_share, _run_names
from .exceptions import DataError
from .residuals import _lagged_columns


# --- excitation --------------------------------------------------------------------------


def on_uniform_grid(t, u):
    """A run's inputs on a uniform time grid.

    A run counts as uniform when every step is within ``UNIFORM_STEP_RTOL`` of the median
    step (as in ``derivatives``). Otherwise the inputs are interpolated linearly onto the
    grid t[0] + k·h, h the median step: a periodogram and lagged products need a fixed
    step, and the median keeps the logged resolution.

    Parameters
    ----------
    t : ndarray of shape (n_samples,)
    u : ndarray of shape (n_samples, n_inputs)

    Returns
    -------
    step : float
    u_uniform : ndarray of shape (n_grid, n_inputs)
    resampled : bool
    """
    steps = np.diff(t)
    step = float(np.median(steps))
    if np.max(np.abs(steps - step)) <= UNIFORM_STEP_RTOL * step:
        return step, u, False
    grid = t[0] + step * np.arange(int(np.floor((t[-1] - t[0]) / step)) + 1)
    return step, np.column_stack([np.interp(grid, t, column) for column in u.T]), True


def spectral_band(inputs, steps, *, power=0.95, segment=256):
    """Frequency band holding the central ``power`` share of each input's spectral power.

    Welch periodogram per run (``scipy.signal.welch``, Hann window, segments of
    ``segment`` samples, each segment's mean removed, so the band describes the
    variation, not the level). Runs are pooled as a mixture: the cumulative power of
    each run is weighted by its length times its variance. The band runs from the
    frequency where the pooled cumulative power reaches (1 − power)/2 to the one where
    it reaches (1 + power)/2.

    Parameters
    ----------
    inputs : list of ndarray of shape (n_samples_r, n_inputs)
        Uniformly sampled runs.
    steps : sequence of float
        The sampling step of each run.

    Returns
    -------
    low, high : ndarray of shape (n_inputs,)
        In cycles per unit of time (Hz for seconds); NaN for an input with no variation.
    """
    spectra, n_inputs = [], inputs[0].shape[1]
    if n_inputs == 0:
        return np.empty(0), np.empty(0)
    for u, step in zip(inputs, steps):
        f, density = welch(u, fs=1.0 / step, nperseg=min(segment, len(u)), detrend="constant", axis=0)
        spectra.append((f, np.cumsum(density, axis=0) * (f[1] - f[0]) * len(u)))
    grid = np.unique(np.concatenate([f for f, _ in spectra]))
    cumulative = sum(c[np.clip(np.searchsorted(f, grid, side="right") - 1, 0, None)] for f, c in spectra)
    total = cumulative[-1]
    # Power at rounding level (a constant input whose segment means are not exact) is no variation.
    energy = sum(np.sum(u ** 2, axis=0) for u in inputs)
    low, high = np.full(n_inputs, np.nan), np.full(n_inputs, np.nan)
    for j in np.flatnonzero(total > 1e-20 * energy):
        share = cumulative[:, j] / total[j]
        low[j] = grid[np.searchsorted(share, (1 - power) / 2)]
        high[j] = grid[min(np.searchsorted(share, (1 + power) / 2), len(grid) - 1)]
    return low, high


def excitation_order(inputs, *, max_order=30, rtol=1e-3):
    """Order of persistent excitation of each input column, pooled over runs.

    Definition (Ljung 1999, sec. 13.2; Söderström & Stoica, System Identification, 1989,
    sec. 5.4): u is persistently exciting of order n when the n×n matrix
    R_n = [R_u(i − j)] is positive definite, with R_u(τ) = Ē u(t) u(t − τ) taken *without*
    removing the mean. So a non-zero constant has order 1, a step order 1, a periodic
    PRBS of period P order P, and a sum of k sinusoids at distinct frequencies in (0, π)
    rad/sample order 2k.

    Estimate: R_n = m² 1 1ᵀ + C_n, with m the mean over all runs and C_n the sample
    covariance of [u(t), ..., u(t − n + 1)] about m, lagged within each run only. The
    rank is that of C_n (eigenvalues above ``rtol`` times its largest), plus one for the
    mean when the direction 1 lies outside C_n's span and n·m² times its share outside
    exceeds ``rtol`` times C_n's largest eigenvalue. Counted this way a large operating
    point does not hide the variation about it, as a plain eigenvalue ratio of R_n would.

    Notes: a finite record's step transition adds eigenvalues of order 1/N, so a step
    counts as order 1 once N is large against 1/rtol (a few thousand samples at the
    default). Lags are samples: an input sampled much faster than it varies has nearly
    collinear lags and a low order at this tolerance; pass it decimated (``u[::k]``) to
    ask at a coarser step. The order counts lags of u: a library of instantaneous terms
    f(x, u) needs varied levels of u more than many lags, so read a shortfall as a hint.

    Parameters
    ----------
    inputs : list of ndarray of shape (n_samples_r, n_inputs)
    max_order : int, default=30
        Orders are checked up to this (and up to half the longest run); an order equal to
        the cap means "at least".
    rtol : float, default=1e-3
        Directions excited less than this share of the strongest count as not excited.

    Returns
    -------
    ndarray of shape (n_inputs,), int
    """
    _check_count(max_order, "max_order")
    _check_share(rtol, "rtol")
    n_inputs = inputs[0].shape[1]
    longest = max(len(u) for u in inputs)
    n_max = min(max_order, longest // 2)
    if n_max < 1:
        raise DataError(f"excitation_order needs a run of at least 2 samples. The longest has {longest}.")
    orders = np.zeros(n_inputs, dtype=int)
    for j in range(n_inputs):
        mean = np.mean(np.concatenate([u[:, j] for u in inputs]))
        lagged = [_lagged_columns(u[:, j] - mean, n_max - 1) for u in inputs if len(u) >= n_max]
        rows = sum(len(a) for a in lagged)
        cov = sum(a.T @ a for a in lagged) / rows
        floor = 1e-12 * (np.trace(cov) + n_max * mean ** 2)  # rounding, not variation
        order = 0
        for n in range(1, n_max + 1):
            values, vectors = np.linalg.eigh(cov[:n, :n])
            largest = values[-1]
            kept = values > max(rtol * largest, floor)
            rank = int(kept.sum())
            ones = np.ones(n) / np.sqrt(n)
            outside = ones - vectors[:, kept] @ (vectors[:, kept].T @ ones)
            if n * mean ** 2 * (outside @ outside) > max(rtol * largest, floor):
                rank += 1
            if rank < n:
                break
            order = n
        orders[j] = order
    return orders


@dataclass(frozen=True)
class InputExcitation:
    """How richly each input varies in the training runs.

    Attributes
    ----------
    input_names : tuple of str
    band_low, band_high : ndarray of shape (n_inputs,)
        The band holding ``power`` of the input's spectral power (``spectral_band``).
    power : float
    nyquist : float
        Half the sampling rate of the coarsest run.
    order : ndarray of shape (n_inputs,), int
        Order of persistent excitation (``excitation_order``).
    max_order : int
        The largest order checked (``max_order``, or half the longest run if less): an
        order equal to it means "at least".
    resampled : tuple of str
        Runs put on a uniform grid first (``on_uniform_grid``).
    """

    input_names: tuple
    band_low: np.ndarray
    band_high: np.ndarray
    power: float
    nyquist: float
    order: np.ndarray
    max_order: int
    resampled: tuple

    @property
    def constant(self):
        """Names of inputs with no variation in any run."""
        return tuple(name for name, low in zip(self.input_names, self.band_low) if np.isnan(low))


def input_excitation(times, inputs, *, input_names, run_names=None, power=0.95, segment=256, max_order=30,
                     rtol=1e-3):
    """Band and order of persistent excitation of each input over the training runs.

    Parameters
    ----------
    times : list of ndarray of shape (n_samples_r,)
        Increasing times of each run.
    inputs : list of ndarray of shape (n_samples_r, n_inputs)
    input_names : sequence of str
    run_names : sequence of str, optional
    power, segment : see ``spectral_band``
    max_order, rtol : see ``excitation_order``

    Returns
    -------
    InputExcitation
    """
    input_names = tuple(input_names)
    if isinstance(times, np.ndarray):
        times = [times]
    u_runs = _as_runs(inputs, input_names, "inputs", run_names)
    run_names = _run_names(run_names, len(u_runs))
    if not u_runs or len(times) != len(u_runs):
        raise DataError(f"input_excitation needs one time vector per run of inputs. Got {len(times)} time "
                        f"vectors and {len(u_runs)} runs of inputs.")
    _check_share(power, "power")
    _check_count(segment, "segment", least=8)
    grids = []
    for name, t, u in zip(run_names, times, u_runs):
        t = np.asarray(t, dtype=float)
        if t.shape != (len(u),) or len(u) < 4 or not np.all(np.diff(t) > 0):
            raise DataError(f"run {name!r}: time must be increasing, one value per input row, at least 4 "
                            f"samples. Got shape {t.shape} for {len(u)} rows.")
        grids.append(on_uniform_grid(t, u))
    steps = [step for step, _, _ in grids]
    uniform = [u for _, u, _ in grids]
    low, high = spectral_band(uniform, steps, power=power, segment=segment)
    checked = min(max_order, max(len(u) for u in uniform) // 2)  # excitation_order's own cap
    return InputExcitation(
        input_names=input_names, band_low=low, band_high=high, power=float(power), nyquist=0.5 / max(steps),
        order=excitation_order(uniform, max_order=max_order, rtol=rtol), max_order=checked,
        resampled=tuple(name for name, (_, _, resampled) in zip(run_names, grids) if resampled))


def excitation_shortfall(excitation, term_counts):
    """Inputs whose order of persistent excitation is below the number of their library terms.

    Parameters
    ----------
    excitation : InputExcitation
    term_counts : mapping of str to int
        Per input, the number of library terms that involve it (supplied by the caller).

    Returns
    -------
    dict of str to (int, int)
        Input name to (order, count), for those short of excitation. An order that reached
        ``max_order`` is a lower bound and is never reported short.
    """
    unknown = sorted(set(term_counts) - set(excitation.input_names))
    if unknown:
        raise DataError(f"`term_counts` names {unknown}, which are not inputs. Inputs: {excitation.input_names}.")
    short = {}
    for name, order in zip(excitation.input_names, excitation.order):
        count = int(term_counts.get(name, 0))
        if order < count and order < excitation.max_order:
            short[name] = (int(order), count)
    return short
