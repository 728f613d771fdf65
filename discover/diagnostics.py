"""Validation diagnostics: residual correlation tests, input excitation, training coverage.

Kernels on plain arrays plus names; every result is a frozen dataclass.

* **Residual analysis** (Ljung, *System Identification: Theory for the User*, 2nd ed.
  1999, ch. 16): sample autocorrelation of each state's residual for lags 1..M, its
  cross-correlation with each input for lags −M..M, bounds ±z/√N, the Ljung–Box
  whiteness statistic (Ljung & Box 1978, Biometrika 65) and a joint test of the
  cross-correlations at lags 0..M, and a plain-language verdict per state.
* **Excitation**: per input, the frequency band holding a given share of its power
  (Welch periodogram, ``scipy.signal.welch``) and its order of persistent excitation
  (Ljung 1999, sec. 13.2).
* **Coverage**: the training range of every state and input, and a check of a
  held-out run against it (extrapolation).

Correlations of several runs are pooled: lagged products are summed within each run
(never across a run boundary), each run with its own mean removed, and divided by the
pooled sums of squares. Lags count samples; on non-uniform time a lag is a number of
samples, not a fixed delay.

Section numbers cited below other than Ljung's ch. 16 and sec. 13.2 are from memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import welch
from scipy.stats import chi2, norm

from .derivatives import UNIFORM_STEP_RTOL
from .exceptions import ConfigError, DataError

#: Lags of the default residual analysis: at most this many (see ``default_max_lag``).
MAX_DEFAULT_LAG = 25

CORRELATED = "residuals of {state} are correlated with {input} at lags {lags}: a term in {input} may be missing"
CORRELATED_JOINT = ("residuals of {state} are correlated with {input} (joint test {p} over lags "
                    "0–{max_lag}): a term in {input} may be missing")
NOT_WHITE = ("residuals of {state} are not white (Ljung–Box {p} at {max_lag} lags): "
             "a dynamic term may be missing")
NOT_WHITE_CAVEAT = "; the input-correlation bounds assume white residuals, so they are too narrow here"
PASSES = "residuals of {state} pass: white and uncorrelated with the inputs"
PASSES_NO_INPUTS = "residuals of {state} pass: white"
CONSTANT_RESIDUAL = "residuals of {state} are constant in every run: there is nothing to test"
CONSTANT_INPUT = "input {input} is constant in the training runs: no term in {input} can be identified"
FEW_EXCITATION = ("input {input} is persistently exciting of order {order} only, but {count} library terms "
                  "involve it: the runs may not pin down their coefficients; add runs that excite {input} "
                  "at more frequencies or levels")
EXTRAPOLATION = ("held-out run {run}: {kind} {name} leaves the training range [{low:.4g}, {high:.4g}] by up to "
                 "{excess:.0%} of its width, for {share:.1%} of samples: the model is extrapolating there")
EXTRAPOLATION_CONSTANT = ("held-out run {run}: {kind} {name} was constant ({low:.4g}) in training but takes "
                          "other values for {share:.1%} of samples: the model is extrapolating there")


# --- checks at the entry of each public function -------------------------------------------


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


# --- residual analysis ---------------------------------------------------------------------


@dataclass(frozen=True)
class ResidualAnalysis:
    """Residual correlations of one model over one or more runs.

    Attributes
    ----------
    state_names, input_names, run_names : tuple of str
    max_lag : int
        M, the largest lag (in samples).
    level : float
        Confidence level of the bounds and tests (a test fails at p < 1 − level).
    n_samples : int
        N, the samples of all runs together.
    bound : float
        z/√N with z the two-sided normal quantile of ``level``: the approximate bound of
        a single correlation of a white residual (Ljung 1999, sec. 16.6).
    autocorrelation : ndarray of shape (max_lag, n_states)
        Row k − 1 holds lag k.
    cross_correlation : ndarray of shape (2 * max_lag + 1, n_states, n_inputs)
        Row τ + M holds the correlation of e(t) with u(t − τ); positive lags mean the
        input precedes the residual, negative lags show feedback (an input that follows
        the residual) and enter no verdict.
    ljung_box, ljung_box_p : ndarray of shape (n_states,)
        Q and its chi-square p-value with M degrees of freedom.
    cross_statistic, cross_p : ndarray of shape (n_states, n_inputs)
        Joint test of lags 0..M: N·R² of the residual regressed on u(t), ..., u(t − M),
        chi-square with ``cross_dof`` degrees of freedom when the residual is white and
        independent of the input (Ljung 1999, sec. 16.6).
    cross_dof : ndarray of shape (n_inputs,)
        Numerical rank of the lagged input matrix (at most M + 1).
    constant : ndarray of shape (n_states,), bool
        Residuals constant in every run (no correlation defined; NaN in the arrays).
    """

    state_names: tuple
    input_names: tuple
    run_names: tuple
    max_lag: int
    level: float
    n_samples: int
    bound: float
    autocorrelation: np.ndarray
    cross_correlation: np.ndarray
    ljung_box: np.ndarray
    ljung_box_p: np.ndarray
    cross_statistic: np.ndarray
    cross_p: np.ndarray
    cross_dof: np.ndarray
    constant: np.ndarray

    @property
    def lags(self):
        """Lags 1..M of ``autocorrelation``, ndarray of shape (max_lag,)."""
        return np.arange(1, self.max_lag + 1)

    @property
    def cross_lags(self):
        """Lags −M..M of ``cross_correlation``, ndarray of shape (2 * max_lag + 1,)."""
        return np.arange(-self.max_lag, self.max_lag + 1)

    @property
    def white(self):
        """ndarray of shape (n_states,), bool: the Ljung–Box test passes."""
        return ~self.constant & (self.ljung_box_p >= 1 - self.level)

    @property
    def uncorrelated(self):
        """ndarray of shape (n_states, n_inputs), bool: the joint cross-correlation test passes."""
        return ~self.constant[:, None] & ~(self.cross_p < 1 - self.level)

    def findings(self, state):
        """The sentences about one state's residuals (a pass is one sentence)."""
        i = self.state_names.index(state)
        if self.constant[i]:
            return (CONSTANT_RESIDUAL.format(state=state),)
        found = []
        for j, name in enumerate(self.input_names):
            if self.uncorrelated[i, j]:
                continue
            outside = np.abs(self.cross_correlation[self.max_lag:, i, j]) > self.bound
            lags = lag_ranges(np.flatnonzero(outside))
            found.append(CORRELATED.format(state=state, input=name, lags=lags) if lags else
                         CORRELATED_JOINT.format(state=state, input=name, p=p_text(self.cross_p[i, j]),
                                                 max_lag=self.max_lag))
        if not self.white[i]:
            caveat = NOT_WHITE_CAVEAT if found else ""
            found.append(NOT_WHITE.format(state=state, p=p_text(self.ljung_box_p[i]), max_lag=self.max_lag) + caveat)
        if not found:
            found.append((PASSES if self.input_names else PASSES_NO_INPUTS).format(state=state))
        return tuple(found)

    @property
    def verdicts(self):
        """One line per state: its findings joined by '; '."""
        return tuple("; ".join(self.findings(state)) for state in self.state_names)

    @property
    def failures(self):
        """Every finding that is not a pass, over all states."""
        return tuple(text for state, white, uncorrelated in zip(self.state_names, self.white, self.uncorrelated)
                     if not (white and uncorrelated.all()) for text in self.findings(state))


def p_text(p):
    """'p = 0.0012', or 'p < 1e-12' where the chi-square tail underflows."""
    return "p < 1e-12" if p < 1e-12 else f"p = {p:.2g}"


def lag_ranges(lags):
    """'3–9, 12, 15–17' from sorted integer lags; '' for none."""
    parts, lags = [], [int(k) for k in lags]
    start = 0
    for k in range(1, len(lags) + 1):
        if k == len(lags) or lags[k] != lags[k - 1] + 1:
            first, last = lags[start], lags[k - 1]
            parts.append(f"{first}" if first == last else f"{first}–{last}")
            start = k
    return ", ".join(parts)


def default_max_lag(run_lengths):
    """min(25, shortest run // 4), at least 1.

    A correlation at lag k rests on N − k products, so beyond about N/4 lags it is too
    noisy to read (Box & Jenkins, Time Series Analysis, 1976; the N/4 is from memory);
    25 lags is the usual length of residual-correlation plots (common practice) and
    keeps the Ljung–Box test's power, which falls as M grows. A model whose dynamics
    span more samples than that needs a larger ``max_lag``.
    """
    return max(1, min(MAX_DEFAULT_LAG, min(run_lengths) // 4))


def _lagged_columns(column, n_lags):
    """ndarray of shape (n_samples − n_lags, n_lags + 1): column (t − τ) for τ = 0..n_lags, t ≥ n_lags."""
    n = len(column)
    return np.column_stack([column[n_lags - tau:n - tau] for tau in range(n_lags + 1)])


def ljung_box(residuals, max_lag):
    """Ljung–Box statistic of each column, pooled over runs.

    Q = N(N + 2) Σ_k ρ_k² / Σ_r (N_r − k) for k = 1..M, with ρ_k the pooled
    autocorrelation and N = Σ_r N_r. For one run the denominator is N − k: the statistic
    of Ljung & Box (1978), Biometrika 65, and of ``statsmodels``' ``acorr_ljungbox``.
    For several runs Σ_r (N_r − k) / (N(N + 2)) plays the part of the variance of ρ_k.

    Parameters
    ----------
    residuals : list of ndarray of shape (n_samples_r, n_columns)
    max_lag : int

    Returns
    -------
    q, p : ndarray of shape (n_columns,)
        The statistic and its chi-square p-value with ``max_lag`` degrees of freedom.
    """
    return _ljung_box(_pooled_autocorrelation(residuals, max_lag), [len(e) for e in residuals])


def _ljung_box(rho, lengths):
    max_lag, lengths = len(rho) - 1, np.asarray(lengths)
    n = lengths.sum()
    products = np.array([np.sum(lengths - k) for k in range(1, max_lag + 1)])
    q = n * (n + 2) * np.sum(rho[1:] ** 2 / products[:, None], axis=0)
    return q, chi2.sf(q, max_lag)


def _pooled_autocorrelation(runs, max_lag):
    """ndarray of shape (max_lag + 1, n_columns): ρ_0..ρ_M, each run with its own mean removed."""
    sums = 0.0
    for a in runs:
        a = a - a.mean(axis=0)
        sums = sums + np.array([np.einsum("ij,ij->j", a[k:], a[:len(a) - k]) for k in range(max_lag + 1)])
    with np.errstate(invalid="ignore", divide="ignore"):
        return sums / sums[0]


def residual_analysis(residuals, inputs=None, *, state_names, input_names=(), run_names=None, max_lag=None,
                      level=0.99):
    """Correlation tests of a model's residuals over one or more runs (Ljung 1999, ch. 16).

    A model that has captured the dynamics leaves residuals that are white (no
    correlation with their own past) and independent of the inputs' past. The verdict
    per state names an input whose past the residual still follows (a term in it may
    be missing) and a residual that is not white (a dynamic term may be missing).
    Free-run residuals of the right model are white only when the data's noise is
    measurement noise: disturbances acting on the dynamics colour them, and so does the
    smoother behind derivative residuals. The input test is then the one to read, with
    the caveat the verdict states.

    Parameters
    ----------
    residuals : ndarray of shape (n_samples, n_states), or list of them (one per run)
        Measured minus predicted (one-step or free-run), rows are time.
    inputs : ndarray of shape (n_samples, n_inputs), or list of them, optional
        The inputs of the same runs, row for row.
    state_names, input_names : sequence of str
    run_names : sequence of str, optional
        Used in error messages and kept on the result.
    max_lag : int, optional
        M; default ``default_max_lag`` of the run lengths.
    level : float, default=0.99
        Confidence level of the bounds; each test fails at p < 1 − level.

    Returns
    -------
    ResidualAnalysis
    """
    state_names, input_names = tuple(state_names), tuple(input_names)
    e_runs = _as_runs(residuals, state_names, "residuals", run_names)
    run_names = _run_names(run_names, len(e_runs))
    u_runs = [np.empty((len(e), 0)) for e in e_runs] if inputs is None and not input_names else \
        _as_runs(inputs, input_names, "inputs", run_names)
    if not e_runs:
        raise DataError("residual_analysis needs at least one run of residuals. Got none.")
    if len(u_runs) != len(e_runs):
        raise DataError(f"residual_analysis got {len(e_runs)} runs of residuals but {len(u_runs)} runs of inputs "
                        f"for {input_names}. Pass one input array per run, row for row.")
    for name, e, u in zip(run_names, e_runs, u_runs):
        if len(e) != len(u):
            raise DataError(f"run {name!r} has {len(e)} residual rows but {len(u)} input rows; they must match.")
    _check_share(level, "level")
    lengths = [len(e) for e in e_runs]
    if max_lag is None:
        max_lag = default_max_lag(lengths)
    _check_count(max_lag, "max_lag")
    for name, length in zip(run_names, lengths):
        if length < max_lag + 2:
            raise DataError(f"run {name!r} has {length} samples; residual analysis with max_lag = {max_lag} "
                            f"needs at least {max_lag + 2}. Pass a smaller `max_lag` or leave the run out.")

    n_states, n_inputs, m = len(state_names), len(input_names), max_lag
    e_runs = [e - e.mean(axis=0) for e in e_runs]
    u_runs = [u - u.mean(axis=0) for u in u_runs]
    e_energy = sum(np.sum(e ** 2, axis=0) for e in e_runs)
    u_energy = sum(np.sum(u ** 2, axis=0) for u in u_runs)
    constant = e_energy == 0
    rho = _pooled_autocorrelation(e_runs, m)
    q, q_p = _ljung_box(rho, lengths)

    cross = np.zeros((2 * m + 1, n_states, n_inputs))
    for e, u in zip(e_runs, u_runs):
        n = len(e)
        for tau in range(-m, m + 1):  # e(t) against u(t − tau)
            cross[tau + m] += e[max(tau, 0):n + min(tau, 0)].T @ u[max(-tau, 0):n - max(tau, 0)]
    with np.errstate(invalid="ignore", divide="ignore"):
        cross /= np.sqrt(np.outer(e_energy, u_energy))

    statistic = np.full((n_states, n_inputs), np.nan)
    dof = np.zeros(n_inputs, dtype=int)
    e_rows = np.concatenate([e[m:] for e in e_runs])
    for j in range(n_inputs):
        # The joint test as a regression: N·R² of e on u(t), ..., u(t − M) is chi-square with the
        # rank of the lagged inputs when e is white and independent of u (a Lagrange-multiplier test).
        # Directions of the lagged inputs with eigenvalues below 1e-10 of the largest are dropped:
        # any fixed set of directions gives a valid test, and these are the numerically defined ones.
        lagged = np.concatenate([_lagged_columns(u[:, j], m) for u in u_runs])
        values, vectors = np.linalg.eigh(lagged.T @ lagged)
        kept = values > 1e-10 * values[-1] if values[-1] > 0 else np.zeros(len(values), dtype=bool)
        dof[j] = int(kept.sum())
        if dof[j]:
            projected = vectors[:, kept].T @ (lagged.T @ e_rows)  # (rank, n_states)
            with np.errstate(invalid="ignore", divide="ignore"):
                statistic[:, j] = len(e_rows) * np.sum(projected ** 2 / values[kept, None], axis=0) / \
                    np.sum(e_rows ** 2, axis=0)
    cross_p = np.where(dof > 0, chi2.sf(statistic, np.maximum(dof, 1)), np.nan)

    n_total = int(sum(lengths))
    return ResidualAnalysis(
        state_names=state_names, input_names=input_names, run_names=run_names, max_lag=m, level=float(level),
        n_samples=n_total, bound=float(norm.ppf((1 + level) / 2) / np.sqrt(n_total)),
        autocorrelation=rho[1:], cross_correlation=cross, ljung_box=np.where(constant, np.nan, q),
        ljung_box_p=np.where(constant, np.nan, q_p), cross_statistic=statistic, cross_p=cross_p,
        cross_dof=dof, constant=constant)


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


# --- coverage ----------------------------------------------------------------------------


@dataclass(frozen=True)
class TrainingRange:
    """Extremes of every state and input over the training runs.

    Built by ``training_range``, or directly from exact extremes (``Run.ranges()`` for
    runs read in chunks). Channels are the states, then the inputs.

    Attributes
    ----------
    names : tuple of str
    kinds : tuple of str
        "state" or "input", per channel.
    low, high : ndarray of shape (n_channels,)
    """

    names: tuple
    kinds: tuple
    low: np.ndarray
    high: np.ndarray


def training_range(states, inputs=None, *, state_names, input_names=()):
    """TrainingRange of runs given as lists of arrays of shape (n_samples_r, n_states) and (n_samples_r, n_inputs)."""
    state_names, input_names = tuple(state_names), tuple(input_names)
    x_runs = _as_runs(states, state_names, "states")
    u_runs = [np.empty((len(x), 0)) for x in x_runs] if inputs is None and not input_names else \
        _as_runs(inputs, input_names, "inputs")
    if not x_runs or len(u_runs) != len(x_runs):
        raise DataError(f"training_range needs the same number of state and input runs (at least one). "
                        f"Got {len(x_runs)} and {len(u_runs)}.")
    values = [np.hstack([x, u]) for x, u in zip(x_runs, u_runs)]
    return TrainingRange(names=state_names + input_names,
                         kinds=("state",) * len(state_names) + ("input",) * len(input_names),
                         low=np.min([v.min(axis=0) for v in values], axis=0),
                         high=np.max([v.max(axis=0) for v in values], axis=0))


@dataclass(frozen=True)
class Extrapolation:
    """A held-out run against the training range.

    Attributes
    ----------
    run_name : str
    training : TrainingRange
    excess : ndarray of shape (n_channels,)
        Largest distance beyond the training range as a share of its width (0 inside;
        inf for a channel constant in training that takes another value here).
    share : ndarray of shape (n_channels,)
        Share of samples beyond the range widened by ``margin`` of its width on each side.
    margin : float
    """

    run_name: str
    training: TrainingRange
    excess: np.ndarray
    share: np.ndarray
    margin: float

    @property
    def leaving(self):
        """Names of the channels that leave the (widened) training range."""
        return tuple(name for name, share in zip(self.training.names, self.share) if share > 0)

    @property
    def messages(self):
        """One warning per channel that leaves the range."""
        out, tr = [], self.training
        for k in np.flatnonzero(self.share > 0):
            fields = dict(run=self.run_name, kind=tr.kinds[k], name=tr.names[k], low=tr.low[k], high=tr.high[k],
                          excess=self.excess[k], share=self.share[k])
            out.append((EXTRAPOLATION_CONSTANT if tr.high[k] == tr.low[k] else EXTRAPOLATION).format(**fields))
        return tuple(out)


def check_extrapolation(training, states, inputs=None, *, run_name, margin=0.05):
    """Which channels of a held-out run leave the training range, by how much and how often.

    Parameters
    ----------
    training : TrainingRange
    states : ndarray of shape (n_samples, n_states)
    inputs : ndarray of shape (n_samples, n_inputs), optional
    run_name : str
    margin : float, default=0.05
        Share of the range's width on each side that still counts as inside: measurement
        noise alone takes a run of the same experiment a little past the training extremes.

    Returns
    -------
    Extrapolation
    """
    n_states = training.kinds.count("state")
    state_names, input_names = training.names[:n_states], training.names[n_states:]
    (x,) = _as_runs([states], state_names, "states", [run_name])
    (u,) = [np.empty((len(x), 0))] if inputs is None and not input_names else \
        _as_runs([inputs], input_names, "inputs", [run_name])
    if len(u) != len(x):
        raise DataError(f"run {run_name!r} has {len(x)} state rows but {len(u)} input rows; they must match.")
    if not (isinstance(margin, (float, int)) and 0 <= margin < 1):
        raise ConfigError(f"`margin` must be a number in [0, 1). Got {margin!r}.")
    values = np.hstack([x, u])
    width = training.high - training.low
    beyond = np.maximum(np.maximum(training.low - values, values - training.high), 0.0)
    largest = beyond.max(axis=0, initial=0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        excess = np.where(width > 0, largest / width, np.where(largest > 0, np.inf, 0.0))
    share = np.mean(beyond > margin * width, axis=0) if len(values) else np.zeros(len(width))
    return Extrapolation(run_name=run_name, training=training, excess=excess, share=share, margin=float(margin))


# --- summary -----------------------------------------------------------------------------


def diagnostic_warnings(*, residuals=None, excitation=None, extrapolations=(), term_counts=None):
    """The warning lines for the summary, each naming its state, input or run.

    Parameters
    ----------
    residuals : ResidualAnalysis, optional
        Contributes every finding that is not a pass.
    excitation : InputExcitation, optional
        Contributes constant inputs, and with ``term_counts`` inputs short of excitation.
    extrapolations : sequence of Extrapolation
    term_counts : mapping of str to int, optional
        Library terms per input (see ``excitation_shortfall``).

    Returns
    -------
    tuple of str
    """
    lines = list(residuals.failures) if residuals is not None else []
    if excitation is not None:
        lines += [CONSTANT_INPUT.format(input=name) for name in excitation.constant]
        if term_counts:
            lines += [FEW_EXCITATION.format(input=name, order=order, count=count)
                      for name, (order, count) in excitation_shortfall(excitation, term_counts).items()
                      if name not in excitation.constant]
    for check in extrapolations:
        lines += check.messages
    return tuple(lines)
