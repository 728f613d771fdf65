"""Rank candidate model structures on equal footing.

Model selection for dynamical systems by sparse regression and information criteria
(Mangan, Kutz, Brunton & Proctor 2017, Proc. R. Soc. A 473): collect candidate term
sets (the threshold path of each library, the structures the user writes down, a
second sparse method), fit each by least squares on the same training rows, score
each on the same held-out runs by free-run simulation, and rank them by AICc.

Information criteria, for n residuals with residual sum of squares RSS and k fitted
coefficients, with the Gaussian log-likelihood ln L = −n/2 · (ln(2π·RSS/n) + 1):

* AIC  = −2 ln L + 2k                          (Akaike 1974)
* AICc = AIC + 2k(k + 1) / (n − k − 1)         (Hurvich & Tsai 1989)
* BIC  = −2 ln L + k ln n                      (Schwarz 1978)

These are the definitions statsmodels' OLS results use (variance not counted in k),
so our one-step criteria equal ``OLS(...).fit().aic`` on the same regression.
Residuals of different states are made comparable by dividing each state's
residuals by the standard deviation of its measured signal.

ΔAICc is taken against the best candidate; Akaike weights are
exp(−Δ/2) / Σ exp(−Δ/2). Burnham & Anderson's rule of thumb (Model Selection and
Multimodel Inference, 2002), used by Mangan et al.: Δ ≤ 2 substantial support,
Δ > 10 essentially none.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .terms import term_key



@dataclass(frozen=True)
class Candidate:
    """One candidate structure and its least-squares coefficients.

    Attributes
    ----------
    name : str
    source : str
        "model", "path", "library", "hypothesis" or "sr3".
    terms : tuple of str
        Expressions of the rows of ``coef``.
    coef : ndarray of shape (n_terms, n_states)
    also : tuple of str
        Names of merged duplicates (the same term sets from other sources).
    """

    name: str
    source: str
    terms: tuple
    coef: np.ndarray
    also: tuple = field(default_factory=tuple)

    @property
    def n_terms(self):
        return int(np.count_nonzero(self.coef))

    def structure(self, state_names):
        """The term set as a hashable key: {(state, canonical term)}."""
        return frozenset(
            (state_names[i], term_key(self.terms[j])) for j, i in zip(*np.nonzero(self.coef))
        )


def merge_duplicates(candidates, state_names):
    """Keep the first candidate of each distinct term set; note the others in ``also``."""
    kept, index = [], {}
    for candidate in candidates:
        key = candidate.structure(state_names)
        if key in index:
            first = kept[index[key]]
            kept[index[key]] = Candidate(first.name, first.source, first.terms, first.coef,
                                         first.also + (candidate.name,))
        else:
            index[key] = len(kept)
            kept.append(candidate)
    return kept


def information_criteria(rss, n, k):
    """AIC, AICc and BIC from a residual sum of squares (formulas in the module docstring).

    AICc is +inf when n − k − 1 <= 0 (too many coefficients for the data).
    """
    rss = max(float(rss), 1e-300)
    log_likelihood = -0.5 * n * (np.log(2 * np.pi * rss / n) + 1.0)
    aic = -2.0 * log_likelihood + 2.0 * k
    aicc = aic + 2.0 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else np.inf
    bic = -2.0 * log_likelihood + k * np.log(n)
    return aic, aicc, bic


def akaike_weights(delta):
    """exp(−Δ/2), normalised over the finite Δ."""
    finite = np.isfinite(delta)
    w = np.zeros_like(delta, dtype=float)
    if finite.any():
        w[finite] = np.exp(-0.5 * (delta[finite] - delta[finite].min()))
        w /= w.sum()
    return w


def pareto_front(complexity, error):
    """Bool mask of candidates no other candidate beats on both complexity and error."""
    complexity, error = np.asarray(complexity, dtype=float), np.asarray(error, dtype=float)
    front = np.zeros(len(error), dtype=bool)
    for i in range(len(error)):
        if not np.isfinite(error[i]):
            continue
        dominated = (complexity <= complexity[i]) & (error <= error[i]) & (
            (complexity < complexity[i]) | (error < error[i])
        )
        front[i] = not dominated.any()
    return front


def support_label(delta):
    if not np.isfinite(delta):
        return "none (diverged)"
    if delta <= 2:
        return "substantial"
    if delta <= 10:
        return "less"
    return "essentially none"


def score_table(candidates, scores, criterion="aicc"):
    """The ranking as a DataFrame, ordered by ``criterion`` (ascending), best first.

    Every column a candidate's scores give is its own; the derived columns
    (:data:`DERIVED`) are recomputed by :func:`order_table` whenever rows are added.

    Parameters
    ----------
    candidates : list of Candidate
    scores : list of dict, one per candidate, with keys simulation_error,
        derivative_error, rss, n, diverged, per-state errors and mean_inclusion.
    """
    rows = []
    for c, s in zip(candidates, scores):
        k = c.n_terms
        if s["diverged"]:
            aic = aicc = bic = np.inf
        else:
            aic, aicc, bic = information_criteria(s["rss"], s["n"], k)
        _, d_aicc, _ = information_criteria(s["derivative_rss"], s["derivative_n"], k)
        row = {"candidate": c.name, "source": c.source, "n_terms": k, "aic": aic, "aicc": aicc,
               "bic": bic, "simulation_error": s["simulation_error"],
               "derivative_error": s["derivative_error"], "derivative_aicc": d_aicc,
               "diverged": s["diverged"], "mean_inclusion_probability": s.get("mean_inclusion", np.nan),
               "also": "; ".join(c.also)}
        row.update({f"simulation_error_{name}": value for name, value in s["per_state"].items()})
        rows.append(row)
    return order_table(pd.DataFrame(rows), criterion)


#: Columns that order_table derives; everything else is a candidate's own score.
DERIVED = ("rank", "delta_aicc", "akaike_weight", "support", "pareto")


def order_table(table, criterion="aicc"):
    """Add ΔAICc, Akaike weights, support labels, the Pareto flag and the rank."""
    table = table.drop(columns=[c for c in DERIVED if c in table.columns]).reset_index(drop=True)
    finite = np.isfinite(table["aicc"].to_numpy(dtype=float))
    best = table["aicc"][finite].min() if finite.any() else np.nan
    table["delta_aicc"] = np.where(finite, table["aicc"] - best, np.inf)
    table["akaike_weight"] = akaike_weights(table["delta_aicc"].to_numpy())
    table["support"] = [support_label(d) for d in table["delta_aicc"]]
    table["pareto"] = pareto_front(table["n_terms"], table["simulation_error"].where(~table["diverged"], np.inf))
    table = table.sort_values([criterion, "n_terms"], kind="stable").reset_index(drop=True)
    table.insert(0, "rank", np.arange(1, len(table) + 1))
    return table


def why_chosen(table, criterion, scored_on="held-out runs"):
    """One sentence on the rank-1 candidate."""
    best = table.iloc[0]
    text = (f"Chosen: {best['candidate']!r} ({best['n_terms']} terms), lowest {criterion} on the "
            f"{scored_on}")
    close = table[(table["delta_aicc"] <= 2) & (table["rank"] > 1)]
    if len(close):
        text += (f"; {len(close)} other candidate(s) within ΔAICc ≤ 2 have substantial support too: "
                 + ", ".join(repr(n) for n in close["candidate"]))
    else:
        text += "; no other candidate is within ΔAICc ≤ 2"
    return text + "."


# --------------------------------------------------------------------------- candidates


def path_candidates(blocks, library, thresholds, *, ridge, max_iter, label):
    """Every distinct term set along the threshold path (one threshold for all states)."""
    from .selection import fit_path

    total, count = blocks.total()
    out = []
    path = fit_path(total, count, len(library), thresholds, ridge=ridge, max_iter=max_iter)
    for threshold, coef in zip(thresholds, path):
        if np.any(coef):
            out.append(Candidate(f"{label} threshold {threshold:.3g}", "path" if label == "path" else "library",
                                 tuple(library.names), coef))
    return out


def least_squares_candidate(name, source, library, support, blocks):
    """Fit a given term set by least squares (on scaled columns) from the training Grams."""
    from .selection import Scale, least_squares_gram, scaled_problem

    total, count = blocks.total()
    scale = Scale.from_gram(total, count, len(library))
    g, b = scaled_problem(total, count, len(library), scale)
    coef = scale.to_units(least_squares_gram(g, b, support & ~scale.zero[:, None]))
    return Candidate(name, source, tuple(library.names), coef)


# --------------------------------------------------------------------------- scoring


def simulation_segments(t, horizon):
    """Row indices of consecutive segments of at most ``horizon`` time units (one if None).

    Short segments, each started from the measured state, let chaotic systems be
    compared over the time their trajectories stay predictable (Mangan et al. 2017
    score the Lorenz system on many short simulations).
    """
    if horizon is None:
        return [np.arange(len(t))]
    labels = np.floor((t - t[0]) / horizon).astype(int)
    return [rows for rows in np.split(np.arange(len(t)), np.flatnonzero(np.diff(labels)) + 1) if len(rows) > 1]


def score_candidates(candidates, state_names, input_names, runs, smoothed, *, settings,
                     inclusion=None, library_terms=None, horizon=None):
    """Score every candidate on the same runs.

    Parameters
    ----------
    runs : sequence of data.Run
        The runs scored on (held-out runs), simulated with their recorded inputs.
    smoothed : sequence of (pipeline.Smoothed, ndarray)
        For each run: its derivative-stage result (trimmed), for one-step derivative
        errors, and its smoothed states on every sample, where simulations start.
    settings : discover.simulate.SimulationSettings
        How to simulate (method, tolerances, interpolation, bounded region, time limit).
    horizon : float or None
        Simulate segments of this length, each from the smoothed measured state.
    """
    from .bootstrap import simulate_ensemble
    from .expressions import parse_expression
    from .model import Model

    known = tuple(state_names) + tuple(input_names)
    # All candidates in one batch: the union of their terms, one coefficient slice each.
    union = []
    for c in candidates:
        for j in np.flatnonzero(np.any(c.coef != 0, axis=1)):
            if c.terms[j] not in union:
                union.append(c.terms[j])
    expressions = [parse_expression(t, known) for t in union]
    coef = np.zeros((len(candidates), len(union), len(state_names)))
    for m, c in enumerate(candidates):
        for j in np.flatnonzero(np.any(c.coef != 0, axis=1)):
            coef[m, union.index(c.terms[j])] = c.coef[j]
    measured = np.vstack([run.x for run in runs])
    sigma = np.where(measured.std(axis=0) > 0, measured.std(axis=0), 1.0)
    squared = np.zeros((len(candidates), len(state_names)))
    diverged = np.zeros(len(candidates), dtype=bool)
    first_run = None  # every candidate's trajectory on the first run, for the report's figure
    for r, (run, (_, x_start)) in enumerate(zip(runs, smoothed)):
        interpolation = settings.interpolation_for(run.u)
        if r == 0:
            first_run = np.full((len(candidates), len(run.t), len(state_names)), np.nan)
        for rows in simulation_segments(run.t, horizon):
            x, div = simulate_ensemble(expressions, state_names, input_names, coef, run.t[rows],
                                       x_start[rows[0]], run.u[rows], interpolation=interpolation,
                                       method=settings.method, rtol=settings.rtol, atol=settings.atol,
                                       limits=settings.limits, time_limit=settings.time_limit)
            diverged |= div
            squared += np.nansum(((x - run.x[rows][None]) / sigma) ** 2, axis=1)
            if r == 0:
                first_run[:, rows] = x
    n_sim = sum(len(rows) for run in runs for rows in simulation_segments(run.t, horizon))
    x_dot = np.vstack([s.x_dot for s, _ in smoothed])
    d_sigma = np.where(x_dot.std(axis=0) > 0, x_dot.std(axis=0), 1.0)
    scores = []
    for m, c in enumerate(candidates):
        model = Model(tuple(state_names), tuple(input_names), c.terms, c.coef)
        predicted = np.vstack([model.rhs(s.x, s.u) for s, _ in smoothed])
        d_res = (predicted - x_dot) / d_sigma
        nrmse = np.sqrt(squared[m] / n_sim)
        score = {
            "rss": float(squared[m].sum()),
            "n": n_sim * len(state_names),
            "simulation_error": float(nrmse.mean()) if not diverged[m] else np.inf,
            "per_state": {s: (float(v) if not diverged[m] else np.inf) for s, v in zip(state_names, nrmse)},
            "derivative_rss": float(np.sum(d_res**2)),
            "derivative_n": d_res.size,
            "derivative_error": float(np.mean(d_res**2)),
            "diverged": bool(diverged[m]),
            "first_run": first_run[m] if first_run is not None else None,
        }
        if inclusion is not None:
            keys = [term_key(t) for t in library_terms]
            values = [inclusion[keys.index(term_key(c.terms[j])), i]
                      for j, i in zip(*np.nonzero(c.coef)) if term_key(c.terms[j]) in keys]
            score["mean_inclusion"] = float(np.mean(values)) if values else np.nan
        scores.append(score)
    return scores
