"""Residual analysis of an identified model, part of :mod:`discover.diagnostics`.

Following Ljung, *System Identification: Theory for the User*, 2nd ed. 1999, ch. 16:
sample autocorrelation of each state's residual for lags 1..M, its cross-correlation
with each input for lags −M..M, bounds ±z/√N, the Ljung–Box whiteness statistic
(Ljung & Box 1978, Biometrika 65) and a joint test of the cross-correlations at lags
0..M, and a plain-language verdict per state.

Correlations of several runs are pooled: lagged products are summed within each run
(never across a run boundary), each run with its own mean removed, and divided by the
pooled sums of squares. Lags count samples; on non-uniform time a lag is a number of
samples, not a fixed delay.

Section numbers cited below other than Ljung's ch. 16 are from memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import chi2, norm

from .diagnostic_checks import _as_runs, _check_count, _check_share, _run_names
from .exceptions import DataError

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
