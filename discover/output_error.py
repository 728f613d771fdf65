"""The refinement stage: refit the chosen structure's coefficients by output error.

The derivative-based fit carries the bias of smoothing and differentiation (a window
that flattens peaks shrinks every coefficient a little). On the chosen support,
:func:`refine_model` minimises the free-run simulation error over the training runs
by multiple shooting (:func:`discover.refine.refine`; Bock & Plitt 1984, Peifer &
Timmer 2007), which sees the measured states themselves, not their derivatives.

Intervals: ±z·SE with SE from the Newey–West (HAC) covariance of the output
residuals at the optimum (Newey & West 1987, Econometrica 55; lags by Andrews 1991),
z the normal quantile of the level. Free-run residuals are autocorrelated; the HAC
covariance accounts for that, where σ²(JᵀJ)⁻¹ alone would be far too narrow. The
interval is for the coefficient *given the structure*; it does not include the
uncertainty of choosing the structure (the inclusion probabilities speak to that).

Terms within WALD_Z standard errors of zero are then dropped, the least significant
of each equation per round, and the rest refitted (backward elimination by the Wald test; Draper & Smith, Applied Regression
Analysis, 3rd ed. 1998, §15.2, with HAC standard errors in place of OLS ones).

The refined coefficients replace the derivative fit only when the refinement
converged and its free run stayed bounded; otherwise the derivative fit is kept and
the run's warnings say why.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from .model import Model

#: Two-sided 95 % normal quantile: the Wald test's level for dropping a term (common practice).
WALD_Z = 1.96

#: At most this many rounds of the Wald test (each costs one more refinement, warm-started).
MAX_WALD_ROUNDS = 6


@dataclass(frozen=True)
class OutputFit:
    """What the refinement stage did.

    Attributes
    ----------
    model : Model
        The model written: refined coefficients and their intervals, or the input model.
    derivative_coef : ndarray of shape (n_terms, n_states)
        The derivative-fit coefficients it started from (the report shows both).
    refinement : discover.refine_types.Refinement or None
    applied : bool
    note : str or None
        Why the refinement was not applied, or what to know about it.
    """

    model: Model
    derivative_coef: np.ndarray
    refinement: object
    applied: bool
    note: str | None = None


def refine_model(model, training, smoothed, refine_settings, simulation, divergence_factor):
    """Refine ``model``'s non-zero coefficients on the training runs by output error.

    Parameters
    ----------
    model : Model
        Every state measured (its own output).
    training : data.Dataset
        In memory (the measured states, the recorded inputs).
    smoothed : smoothing.SmoothedRuns
        Starting trajectories for the segment starts.
    refine_settings : the ``[refine]`` settings (enabled, max_evaluations, time_limit, level)
    simulation : discover.simulate.SimulationSettings
    divergence_factor : float
        ``[simulation].divergence_factor``: a segment leaving the region so widened is diverged.
    """
    from scipy.stats import norm

    from .refine import refine
    from .refine_types import MeasuredRun, coefficient_name, structure_from_model

    if not np.any(model.coef):
        return OutputFit(model, model.coef, None, False, "The model has no terms; nothing to refine.")
    runs = [MeasuredRun(run.t, run.x, run.u) for run in training.runs]
    options = dict(state_guess=[run.x for run in smoothed.full],
                   interpolation=[simulation.interpolation_for(run.u) for run in training.runs],
                   max_nfev=refine_settings.max_evaluations, time_limit=refine_settings.time_limit,
                   divergence_factor=divergence_factor)
    result = refine(structure_from_model(model), runs, **options)
    if not result.converged:
        return OutputFit(model, model.coef, result, False,
                         f"The output-error refinement did not converge ({result.message.strip() or 'no reason given'}); "
                         "model.json keeps the derivative-fit coefficients.")
    # Backward elimination by the Wald test on the HAC standard errors: a term whose
    # refined coefficient is within WALD_Z standard errors of zero is dropped (the least
    # significant first) and the rest refitted. Typical of such terms: one that only
    # compensated the derivative fit's smoothing bias.
    current, dropped = model, []
    for _ in range(MAX_WALD_ROUNDS):
        weakest = _least_significant(result, current)
        if not weakest:
            break
        coef = np.array(current.coef)
        for k, state in enumerate(current.state_names):
            for m in np.flatnonzero(coef[:, k]):
                coef[m, k] = result.coefficients[state][current.terms[m]]
        for j, i in weakest:
            coef[j, i] = 0.0
        reduced = replace(current, coef=coef)
        again = refine(structure_from_model(reduced), runs, **options)
        if not again.converged:
            break
        dropped += [f"{current.terms[j]} in d{current.state_names[i]}/dt" for j, i in weakest]
        current, result = reduced, again
    z = float(norm.ppf(0.5 + refine_settings.level / 2))
    coef = np.where(current.coef != 0, model.coef, 0.0)
    stats = {name: values.copy() for name, values in model.term_stats.items()}
    for name in ("derivative_fit", "standard_error", "interval_low", "interval_high"):
        stats[name] = np.full(coef.shape, np.nan)
    for i, state in enumerate(model.state_names):
        for j in np.flatnonzero(current.coef[:, i]):
            term = model.terms[j]
            value = result.coefficients[state][term]
            se = result.standard_errors_hac[state].get(term, np.nan)
            coef[j, i] = value
            stats["derivative_fit"][j, i] = model.coef[j, i]
            stats["standard_error"][j, i] = se
            stats["interval_low"][j, i], stats["interval_high"][j, i] = value - z * se, value + z * se
    not_determined = [coefficient_name(s, t) for s, t in _undetermined(result, current)]
    info = dict(model.info)
    info["refinement"] = {
        "method": "output error, multiple shooting",
        "segment_length": int(result.segment_length),
        "iterations": int(result.iterations),
        "hac_lags": int(result.hac_lags),
        "interval_level": float(refine_settings.level),
        "interval_meaning": (f"coefficient ± {z:.3f} standard errors (Newey-West covariance of the output "
                             "residuals): a confidence interval given the structure"),
        "dropped_by_wald_test": dropped,
        "not_identifiable": list(result.not_identifiable),
    }
    notes = []
    if dropped:
        notes.append(f"The output-error fit dropped {', '.join(dropped)}: within {WALD_Z:g} standard errors of zero "
                     "(Wald test on the Newey-West standard errors).")
    if not_determined:
        notes.append("The output-error fit does not determine " + ", ".join(not_determined)
                     + "; their intervals are left empty (see the report).")
    refined = replace(model, coef=coef, term_stats=stats, info=info)
    return OutputFit(refined, model.coef, result, True, " ".join(notes) or None)


def _least_significant(result, model):
    """Per equation, (term row, state column) of the free term with the smallest |coefficient| / SE
    below WALD_Z; equations with none (or a single term, which is kept) are left out."""
    found = []
    for i, state in enumerate(model.state_names):
        if np.count_nonzero(model.coef[:, i]) <= 1:
            continue  # an equation keeps at least one term
        worst, where = WALD_Z, None
        for j in np.flatnonzero(model.coef[:, i]):
            term = model.terms[j]
            se = result.standard_errors_hac[state].get(term, np.nan)
            if np.isfinite(se) and se > 0 and abs(result.coefficients[state][term]) / se < worst:
                worst, where = abs(result.coefficients[state][term]) / se, (j, i)
        if where is not None:
            found.append(where)
    return found


def _undetermined(result, model):
    """(state, term) pairs whose HAC standard error is NaN although the term is free."""
    out = []
    for i, state in enumerate(model.state_names):
        for j in np.flatnonzero(model.coef[:, i]):
            se = result.standard_errors_hac[state].get(model.terms[j], np.nan)
            if not np.isfinite(se) and (state, model.terms[j]) not in result.fixed:
                out.append((state, model.terms[j]))
    return out
