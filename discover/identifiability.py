"""What the data determine in an output-error fit (:mod:`discover.refine`), and how well.

Kernels on plain arrays: the noise level of measured outputs (:func:`noise_level`),
the column-scaled SVD of a Jacobian (:func:`scaled_svd`), the least-squares
covariance (:func:`covariance_from_jacobian`) and its Newey–West version with an
Andrews bandwidth (:func:`newey_west_covariance`, :func:`andrews_lags`); and the
sentences of the refinement's report: directions the data do not determine, and
whether a hidden state's scale is set.

Identifiability is read from the Jacobian of the free-run (single-shooting)
residuals at the optimum, with respect to the free coefficients and each run's
initial state: the Jacobian the multiple-shooting problem condenses to once the
trajectory is continuous, in which a symmetry such as the scale of a hidden state is
an exact null direction. Its columns are scaled to unit norm (units do not matter),
and directions with singular value below ``identifiability_rtol`` × the largest are
reported as combinations of named coefficients (relative changes). Standard errors
of the determined coefficients come from σ²·(JᵀJ)⁺ with σ² from the free-run
residuals (the truncated pseudo-inverse gives the variance of every function of the
parameters that the data determine; Searle 1971, Linear Models, ch. 5, from memory).
Output-error residuals are autocorrelated when the model is wrong or the noise is
coloured, and then σ²·(JᵀJ)⁻¹ is too small; the Newey–West (1987) sandwich with an
Andrews (1991) bandwidth gives standard errors that allow for it
(``standard_errors_hac``).

A hidden state's scale: if every term that contains hidden state h is a monomial in
it and no output uses it, x_h → a·x_h with matching changes of the coefficients
leaves the outputs unchanged (:func:`_scale_change`). A scale rule set by the caller
removes it (:func:`_scale_rules`); :func:`_scale_notes` says which holds.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from .refine_types import coefficient_name
from .terms import term_key

__all__ = ["noise_level", "scaled_svd", "covariance_from_jacobian", "newey_west_covariance", "andrews_lags"]

#: A coefficient whose unit vector has a component above this in the null space of the
#: scaled Jacobian is reported as not identifiable (no standard error).
NULL_COMPONENT = 0.01
#: Components below this fraction (of a unit direction) are left out of its text.
SHOWN_COMPONENT = 0.05

NOT_DETERMINED = "{combination} is not determined by the data"
SCALE_FREE = (
    "hidden state {state!r}: its scale is not determined by the outputs (x_{state} -> a·x_{state} "
    "with matching coefficients fits equally well); set a scale rule: fix one of its coefficients "
    "({coefficients}) in Structure.fixed, or a non-zero initial value in fixed_initial"
)
SCALE_SET = "hidden state {state!r}: scale set by {rule}"
SCALE_ZERO_INITIAL = (
    "hidden state {state!r}: its initial value is fixed at 0 in run {run!r}, which fixes no scale"
)


# --------------------------------------------------------------------------- kernels on plain arrays


def noise_level(y_runs: Sequence[np.ndarray]) -> np.ndarray:
    """Noise standard deviation of each column, from third differences.

    For white noise e, E[(Δ³e)²] = C(6, 3)·σ² = 20·σ²; a smooth signal sampled
    densely adds little to third differences. (Difference-based variance
    estimation; Hall, Kay & Titterington 1990, Biometrika 77(3), from memory.)

    Parameters
    ----------
    y_runs : sequence of ndarray of shape (n_samples, n_columns)

    Returns
    -------
    ndarray of shape (n_columns,)
        Floored at 1e-9 × the column's spread (1e-9 if the column is constant).
    """
    total, count = 0.0, 0
    for y in y_runs:
        if len(y) >= 4:
            total = total + np.sum(np.diff(y, n=3, axis=0) ** 2, axis=0)
            count += len(y) - 3
    stacked = np.vstack(list(y_runs))
    spread = np.std(stacked, axis=0)
    sigma = np.sqrt(total / (20.0 * count)) if count else np.zeros(stacked.shape[1])
    return np.maximum(sigma, 1e-9 * np.where(spread > 0, spread, 1.0))


def scaled_svd(jacobian: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """SVD of the Jacobian with columns scaled to unit norm.

    Parameters
    ----------
    jacobian : ndarray of shape (n_residuals, n_parameters)

    Returns
    -------
    singular_values : ndarray of shape (n_parameters,)
        Largest first (zero-padded when there are fewer residuals than parameters).
    directions : ndarray of shape (n_parameters, n_parameters)
        Right singular vectors as columns, in scaled coordinates.
    column_norms : ndarray of shape (n_parameters,)
        The scales (1 for a column of zeros): parameter change = direction / column_norms.
    """
    jacobian = np.asarray(jacobian, dtype=float)
    n_params = jacobian.shape[1]
    norms = np.linalg.norm(jacobian, axis=0)
    norms = np.where(norms > 0, norms, 1.0)
    scaled = jacobian / norms
    if len(scaled) < n_params:  # zero rows keep the singular values and complete V
        scaled = np.vstack([scaled, np.zeros((n_params - len(scaled), n_params))])
    # The SVD of R (from QR) has the singular values and right vectors of J, at a fraction of the cost.
    _, values, vt = np.linalg.svd(np.linalg.qr(scaled, mode="r"))
    return values, vt.T, norms


def covariance_from_jacobian(jacobian: np.ndarray, residuals: np.ndarray, *,
                             rtol: float = 1e-6) -> tuple[np.ndarray, float, int]:
    """σ²·(JᵀJ)⁺ with σ² = Σr² / (n − rank), truncated at ``rtol`` of the largest singular value.

    Columns are scaled to unit norm before the SVD, so the truncation does not depend
    on units. For a full-rank linear problem this is the ordinary least-squares
    covariance.

    Parameters
    ----------
    jacobian : ndarray of shape (n_residuals, n_parameters)
    residuals : ndarray of shape (n_residuals,)

    Returns
    -------
    covariance : ndarray of shape (n_parameters, n_parameters)
    sigma2 : float
    rank : int
    """
    values, directions, norms = scaled_svd(jacobian)
    keep = values > rtol * values[0] if values.size and values[0] > 0 else np.zeros(len(values), bool)
    rank = int(keep.sum())
    dof = max(len(residuals) - rank, 1)
    sigma2 = float(np.sum(np.asarray(residuals) ** 2) / dof)
    v = directions[:, keep] / values[keep]
    covariance = sigma2 * (v @ v.T) / np.outer(norms, norms)
    return covariance, sigma2, rank


def newey_west_covariance(jacobian: np.ndarray, residuals: np.ndarray, groups: np.ndarray, *, lags: int,
                          rtol: float = 1e-6) -> np.ndarray:
    """Covariance of least-squares estimates robust to autocorrelated residuals.

    The sandwich (JᵀJ)⁺·Ŝ·(JᵀJ)⁺ of Newey & West (1987, Econometrica 55(3)), with
    Ŝ = Σ_l w_l Σ_n (s_n s_{n−l}ᵀ + s_{n−l} s_nᵀ) over the scores s_n = J_nᵀ r_n of
    the samples, Bartlett weights w_l = 1 − l/(lags + 1) (w_0 counted once), and lags
    taken within each group (run), never across. Without correction for degrees of
    freedom (statsmodels' ``use_correction=False``).

    Parameters
    ----------
    jacobian : ndarray of shape (n_samples, n_outputs, n_parameters)
    residuals : ndarray of shape (n_samples, n_outputs)
    groups : ndarray of shape (n_samples,)
        Run of each sample; samples of a run are consecutive.
    lags : int
        Highest lag with a non-zero weight.
    rtol : float, default=1e-6
        Truncation of the pseudo-inverse, as :func:`covariance_from_jacobian`.

    Returns
    -------
    ndarray of shape (n_parameters, n_parameters)
    """
    jacobian = np.asarray(jacobian, dtype=float)
    n_params = jacobian.shape[2]
    scores = np.einsum("nop,no->np", jacobian, residuals)
    middle = np.zeros((n_params, n_params))
    groups = np.asarray(groups)
    for g in np.unique(groups):
        s = scores[groups == g]
        middle += s.T @ s
        for lag in range(1, min(lags, len(s) - 1) + 1):
            product = s[lag:].T @ s[:-lag]
            middle += (1.0 - lag / (lags + 1.0)) * (product + product.T)
    values, directions, norms = scaled_svd(jacobian.reshape(-1, n_params))
    keep = values > rtol * values[0] if values.size and values[0] > 0 else np.zeros(len(values), bool)
    # (JᵀJ)⁺ in data units, from the scaled SVD.
    v = directions[:, keep] / values[keep]
    bread = (v @ v.T) / np.outer(norms, norms)
    return bread @ middle @ bread


def andrews_lags(residuals: np.ndarray, groups: np.ndarray) -> int:
    """Bandwidth for the Bartlett kernel from an AR(1) fit to the residuals.

    Andrews (1991, Econometrica 59(3)) plug-in rule, from memory: lags =
    1.1447·(α·n)^(1/3) with α = 4ρ² / ((1 − ρ)²(1 + ρ)²) for one AR(1) series with
    lag-one autocorrelation ρ. Here ρ is pooled over the outputs and runs (an
    approximation: Andrews fits each score component). ρ = 0 gives 0 lags, the
    ordinary covariance.

    Parameters
    ----------
    residuals : ndarray of shape (n_samples, n_outputs)
    groups : ndarray of shape (n_samples,)

    Returns
    -------
    int
    """
    residuals = np.asarray(residuals, dtype=float)
    groups = np.asarray(groups)
    lagged, total = 0.0, 0.0
    for g in np.unique(groups):
        r = residuals[groups == g]
        r = r - r.mean(axis=0)
        lagged += float(np.sum(r[1:] * r[:-1]))
        total += float(np.sum(r[:-1] ** 2))
    rho = float(np.clip(lagged / total, -0.99, 0.99)) if total > 0 else 0.0
    alpha = 4.0 * rho**2 / ((1.0 - rho) ** 2 * (1.0 + rho) ** 2)
    return int(1.1447 * (alpha * len(residuals)) ** (1.0 / 3.0))


# --------------------------------------------------------------------------- sentences of the report


def _signed(value, name, first):
    """``-0.58, "a", True -> "−0.58·a"``; later pieces get a spaced sign."""
    if first:
        return f"{'−' if value < 0 else ''}{abs(value):.2f}·{name}"
    return f" {'−' if value < 0 else '+'} {abs(value):.2f}·{name}"


def _direction_text(v, norms, values, names, n_free, runs, states, free_init):
    """A null direction as a sentence over named coefficients (relative changes).

    ``v`` is a unit vector in column-scaled coordinates; the parameter change is
    v / norms. Coefficients are shown as δθ/θ (as the change itself where θ = 0),
    normalised to unit length; initial values only by the states they belong to.
    """
    delta = v / norms
    nonzero = values[:n_free] != 0
    coef_part = np.where(nonzero, delta[:n_free] / np.where(nonzero, values[:n_free], 1.0), delta[:n_free])
    total = np.linalg.norm(v)
    index = [k for r in range(len(runs)) for k in range(len(states)) if free_init[r, k]]
    initial = [states[k] for k in dict.fromkeys(index)
               if np.linalg.norm(v[n_free:][np.array(index) == k]) > SHOWN_COMPONENT * total]
    initial_text = " and ".join(f"the initial values of {state}" for state in initial)
    if n_free and np.linalg.norm(v[:n_free]) > SHOWN_COMPONENT * total:
        rel = coef_part / np.linalg.norm(coef_part)
        shown = [(rel[j], names[j]) for j in range(n_free) if abs(rel[j]) >= SHOWN_COMPONENT]
        if shown[0][0] < 0:  # the sign of a direction is arbitrary: lead with a plus
            shown = [(-a, n) for a, n in shown]
        text = "".join(_signed(a, n, i == 0) for i, (a, n) in enumerate(shown))
        together = f", together with {initial_text}" if initial else ""
        combination = f"{text} (relative changes{together})"
    elif initial:
        combination = f"a combination of {initial_text}"
    else:
        combination = "a combination of the parameters"
    return NOT_DETERMINED.format(combination=combination)


def _scale_change(structure, dynamics, hidden):
    """Relative change of every coefficient under x_h → (1 + ε)·x_h, per unit ε.

    The coefficient of a term with x_h**p changes by (δ_ih − p)·ε in the equation of
    state i, since d(a·x_h)/dt = a·f_h and x_h = (a·x_h)/a elsewhere. None when there is
    no such symmetry: x_h in an output, or in a term that is not a monomial in it.
    """
    if any(hidden in e.names for e in structure._parsed_outputs.values()):
        return None
    change = []
    for state, term in dynamics.coef_pairs:
        key = term_key(term)
        if key == ("constant",):
            power = 0
        elif key[0] == "text":
            if hidden in structure._parsed[(state, term)].names:
                return None
            power = 0
        else:
            power = dict(key).get(hidden, 0)
        change.append((1.0 if state == hidden else 0.0) - power)
    return np.array(change)


def _scale_rules(dynamics, hidden_index, change, coef, free_coef, fixed0, runs):
    """The caller's rules that set a hidden state's scale, and the runs where its initial value is fixed at 0."""
    rules, notes = [], []
    for j, (s, t) in enumerate(dynamics.coef_pairs):
        if not free_coef[j] and change[j] != 0 and coef[j] != 0:
            rules.append(f"the fixed coefficient {coefficient_name(s, t)} = {coef[j]:.6g}")
    for r, run in enumerate(runs):
        value = fixed0[r, hidden_index]
        if np.isfinite(value):
            if value != 0:
                rules.append(f"its initial value fixed at {value:.6g} in run {run.name!r}")
            else:
                notes.append((r, run.name))
    return rules, notes


def _scale_notes(structure, dynamics, changes, pinned, coef, free_coef, x_init, free_init, fixed0, runs, j_out,
                 norms, values, rtol):
    """Per hidden state, whether x_h → a·x_h leaves the outputs unchanged, or which rule prevents it."""
    notes = []
    states = structure.state_names
    for h in structure.hidden:
        change = changes.get(h)
        if change is None:
            continue
        k = states.index(h)
        rules, zero_runs = _scale_rules(dynamics, k, change, coef, free_coef, fixed0, runs)
        notes += [SCALE_ZERO_INITIAL.format(state=h, run=name) for _, name in zero_runs]
        if rules:
            notes.append(SCALE_SET.format(state=h, rule="; ".join(rules)))
            continue
        delta_coef = change * coef
        x_change = np.where(np.arange(len(states)) == k, x_init, 0.0)
        delta = np.concatenate([delta_coef[free_coef], x_change[free_init]])
        scaled = delta * norms
        if not np.any(scaled):
            continue
        along = np.linalg.norm(j_out @ delta) / (values[0] * np.linalg.norm(scaled))
        if along < rtol:
            names = ", ".join(coefficient_name(s, t) for (s, t), c, v in zip(dynamics.coef_pairs, change, coef)
                              if c != 0 and v != 0)
            note = SCALE_FREE.format(state=h, coefficients=names)
            if h in pinned:
                j = pinned[h]
                note += (f"; during the fit it was held by keeping {coefficient_name(*dynamics.coef_pairs[j])} "
                         f"at its starting value {coef[j]:.6g}")
            notes.append(note)
        else:
            notes.append(SCALE_SET.format(state=h, rule="the outputs"))
    return notes
