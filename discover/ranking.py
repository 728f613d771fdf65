"""Rank candidate model structures on equal footing.

Model selection for dynamical systems by sparse regression and simulation (Mangan,
Kutz, Brunton & Proctor 2017, Proc. R. Soc. A 473): collect candidate term sets (the
threshold path of each library, the structures the user writes down, a second sparse
method, the ensemble's inclusion levels), simulate each on data not used to fit it
(:mod:`discover.choice`) and rank them.

The criterion: the free-run residuals of every state, divided by that state's
standard deviation, give RSS over n samples. Free-run residuals are strongly
autocorrelated, so the likelihood counts the effective number of independent samples
n_eff (:func:`effective_samples`) rather than n: deviance = n_eff · ln(RSS/n)
(−2 ln L up to a constant shared by all candidates). AIC, AICc and BIC add their usual
penalties on that n_eff (Akaike 1974; Hurvich & Tsai 1989; Schwarz 1978). Δ is taken
against the best candidate; weights are exp(−Δ/2) / Σ exp(−Δ/2). The recommendation and
its parsimony rule: :func:`order_table`.

:func:`information_criteria` keeps statsmodels' OLS definitions (variance not counted
in k) for one-step (derivative) residuals, where samples are close to independent.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

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
    blocks : selection.BlockGrams or None
        Training block Grams of the candidate's library (rows of ``terms``), so that
        cross-validation can refit the support without a fold.
    """

    name: str
    source: str
    terms: tuple
    coef: np.ndarray
    also: tuple = field(default_factory=tuple)
    blocks: object = field(default=None, compare=False, repr=False)

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
            kept[index[key]] = replace(first, also=first.also + (candidate.name,))
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


def score_table(candidates, scores, criterion="simulation"):
    """The ranking as a DataFrame, the recommended candidate first (see :func:`order_table`).

    Every column a candidate's scores give is its own; the derived columns
    (:data:`DERIVED`) are recomputed by :func:`order_table` whenever rows are added.

    Parameters
    ----------
    candidates : list of Candidate
    scores : list of dict, one per candidate, from :func:`score_candidates`.
    """
    rows = []
    for c, s in zip(candidates, scores):
        k = c.n_terms
        _, d_aicc, _ = information_criteria(s["derivative_rss"], s["derivative_n"], k)
        row = {"candidate": c.name, "source": c.source, "n_terms": k, "rss": s["rss"], "n": s["n"],
               "n_effective": s["n_effective"], "simulation_error": s["simulation_error"],
               "derivative_error": s["derivative_error"], "derivative_aicc": d_aicc,
               "diverged": s["diverged"], "mean_inclusion_probability": s.get("mean_inclusion", np.nan),
               "also": "; ".join(c.also)}
        row.update({f"simulation_error_{name}": value for name, value in s["per_state"].items()})
        rows.append(row)
    return order_table(pd.DataFrame(rows), criterion)


#: Columns that order_table derives; everything else is a candidate's own score.
DERIVED = ("rank", "deviance", "aic", "aicc", "bic", "delta", "weight", "support", "pareto", "recommended",
           "delta_aicc", "akaike_weight")  # the last two: names in files of older versions

#: Criteria that are −2·log-likelihoods (plus a penalty): differences of 2 mean the same everywhere.
LIKELIHOOD_CRITERIA = ("simulation", "aic", "aicc", "bic")

#: Candidates within this Δ of the best have substantial support (Burnham & Anderson 2002).
SUPPORT_DELTA = 2.0


def order_table(table, criterion="simulation"):
    """Derive the criteria, Δ, weights, support, the Pareto flag and the recommendation; order.

    All likelihood criteria use one effective sample size, that of the candidate with
    the smallest residual sum of squares (:func:`effective_samples`), so their
    differences compare the candidates on the same footing:
    deviance = n_eff · ln(RSS / n), AIC = deviance + 2k, AICc = AIC + 2k(k+1)/(n_eff − k − 1),
    BIC = deviance + k ln n_eff.

    The recommendation (parsimony): among the candidates within Δ ≤ 2 of the best,
    the one with the fewest terms (ties: the smaller Δ). Burnham & Anderson (Model
    Selection and Multimodel Inference, 2002, §2.6) read Δ ≤ 2 as substantial support;
    preferring the simplest of the supported models is the rule of parsimony of their
    §1.4 and of Richards (2008, J. Wildl. Manage. 72(1)). For the plain errors
    (``simulation_error``, ``derivative_error``) the lowest wins.
    The recommended candidate is rank 1; the rest follow by the criterion.
    """
    table = table.drop(columns=[c for c in DERIVED if c in table.columns]).reset_index(drop=True)
    if "n_effective" not in table.columns:  # a table of an older version: samples counted as independent
        table["n_effective"] = table["n"] / max(1, table.filter(like="simulation_error_").shape[1])
    diverged = table["diverged"].astype(bool).to_numpy()
    rss = np.maximum(table["rss"].to_numpy(dtype=float), 1e-300)
    n = table["n"].to_numpy(dtype=float)
    k = table["n_terms"].to_numpy(dtype=float)
    ok = ~diverged & np.isfinite(rss)
    n_eff = float(table["n_effective"].to_numpy(dtype=float)[ok][np.argmin(rss[ok])]) if ok.any() else np.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        deviance = np.where(ok, n_eff * np.log(rss / n), np.inf)
        aicc_extra = np.where(n_eff - k - 1 > 0, 2 * k * (k + 1) / (n_eff - k - 1), np.inf)
    table["deviance"] = deviance
    table["aic"] = deviance + 2 * k
    table["aicc"] = np.where(ok, table["aic"] + aicc_extra, np.inf)
    table["bic"] = deviance + k * np.log(n_eff) if np.isfinite(n_eff) else np.inf
    value = table["deviance" if criterion == "simulation" else criterion].to_numpy(dtype=float)
    value = np.where(ok, value, np.inf)
    finite = np.isfinite(value)
    best = value[finite].min() if finite.any() else np.nan
    table["delta"] = np.where(finite, value - best, np.inf)
    likelihood = criterion in LIKELIHOOD_CRITERIA
    table["weight"] = akaike_weights(table["delta"].to_numpy()) if likelihood else np.nan
    table["support"] = [support_label(d) if likelihood else ("none (diverged)" if not f else "")
                        for d, f in zip(table["delta"], finite)]
    table["pareto"] = pareto_front(table["n_terms"], table["simulation_error"].where(~table["diverged"], np.inf))
    recommended = np.zeros(len(table), dtype=bool)
    if finite.any():
        pool = np.flatnonzero(table["delta"].to_numpy() <= (SUPPORT_DELTA if likelihood else 0.0))
        pick = min(pool, key=lambda i: (k[i], table["delta"].iloc[i]))
        recommended[pick] = True
    table["recommended"] = recommended
    order = sorted(range(len(table)), key=lambda i: (not recommended[i], value[i], k[i]))
    table = table.iloc[order].reset_index(drop=True)
    table.insert(0, "rank", np.arange(1, len(table) + 1))
    return table


def why_chosen(table, criterion, scored_on="held-out runs"):
    """One sentence on the rank-1 (recommended) candidate and the evidence for it."""
    best = table.iloc[0]
    measure = "simulation deviance" if criterion == "simulation" else criterion
    if not np.isfinite(best["delta"]):
        return f"No candidate could be scored on the {scored_on}: every simulation diverged."
    text = f"Recommended: {best['candidate']!r} ({best['n_terms']} terms)"
    if criterion in LIKELIHOOD_CRITERIA:
        close = table[(table["delta"] <= SUPPORT_DELTA) & (table["rank"] > 1)]
        text += (f", the fewest terms among the {len(close) + 1} candidate(s) within Δ ≤ {SUPPORT_DELTA:g} of the "
                 f"lowest {measure} on the {scored_on}")
        lowest = table.loc[table["delta"].idxmin()]
        if lowest["candidate"] != best["candidate"]:
            text += f" (lowest: {lowest['candidate']!r}, {lowest['n_terms']} terms, Δ of ours {best['delta']:.2f})"
        text += f"; {len(close)} other candidate(s) have substantial support" if len(close) else \
            "; no other candidate is within Δ ≤ 2"
    else:
        text += f", lowest {measure} on the {scored_on}"
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
                                 tuple(library.names), coef, blocks=blocks))
    return out


def least_squares_candidate(name, source, library, support, blocks):
    """Fit a given term set by least squares (on scaled columns) from the training Grams."""
    from .selection import Scale, least_squares_gram, scaled_problem

    total, count = blocks.total()
    scale = Scale.from_gram(total, count, len(library))
    g, b = scaled_problem(total, count, len(library), scale)
    coef = scale.to_units(least_squares_gram(g, b, support & ~scale.zero[:, None]))
    return Candidate(name, source, tuple(library.names), coef, blocks=blocks)


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


def effective_samples(residuals):
    """Effective number of independent samples in autocorrelated residuals, summed over columns.

    For an AR(1) series with lag-one correlation ρ the variance of a mean is that of
    n(1 − ρ)/(1 + ρ) independent samples (Bayley & Hammersley 1946, J. R. Stat. Soc.
    Suppl. 8; Bretherton et al. 1999, J. Climate 12). With ρ = exp(−1/L), L the lag
    where the autocorrelation first drops below 1/e, (1 + ρ)/(1 − ρ) ≈ 2L; we take
    τ = 2L − 1, which is 1 for white residuals and tends to 2L. L is measured per
    column (:func:`discover.bootstrap.correlation_length`), so a free-run residual
    that wanders slowly counts as few samples, as it should.
    """
    from .bootstrap import correlation_length

    residuals = np.asarray(residuals, dtype=float)
    total = 0.0
    for j in range(residuals.shape[1]):
        column = residuals[:, j]
        column = column[np.isfinite(column)]
        if len(column) < 3 or not np.any(column != column[0]):
            total += 1.0  # a constant residual carries one number
            continue
        tau = 2 * correlation_length(column[:, None]) - 1
        total += min(len(column), max(1.0, len(column) / tau))
    return total


@dataclass(frozen=True)
class Piece:
    """A stretch of a run on which every candidate is simulated from the same start.

    ``coef`` holds each candidate's coefficients for this piece (shape
    (n_candidates, n_union_terms, n_states)): fitted without the piece's fold in
    cross-validation, on all training data for held-out runs.
    """

    t: np.ndarray
    x: np.ndarray  # measured states
    u: np.ndarray
    x0: np.ndarray  # smoothed state at the first sample
    coef: np.ndarray
    interpolation: str
    figure_rows: np.ndarray | None = None  # rows of the run the report draws (first held-out run)
    figure_length: int = 0


def union_terms(candidates):
    """Every term any candidate uses, in first-seen order (one batch simulates them all)."""
    union = []
    for c in candidates:
        for j in np.flatnonzero(np.any(c.coef != 0, axis=1)):
            if c.terms[j] not in union:
                union.append(c.terms[j])
    return union


def stacked_coef(candidates, union, n_states, coefs=None):
    """Coefficients of every candidate on the union terms, shape (n_candidates, n_union, n_states)."""
    coefs = [c.coef for c in candidates] if coefs is None else coefs
    out = np.zeros((len(candidates), len(union), n_states))
    for m, (c, coef) in enumerate(zip(candidates, coefs)):
        for j in np.flatnonzero(np.any(coef != 0, axis=1)):
            out[m, union.index(c.terms[j])] = coef[j]
    return out


def simulate_pieces(candidates, union, state_names, input_names, pieces, settings, sigma):
    """Simulate every candidate on every piece; residuals scaled by ``sigma`` per state.

    Returns a dict: ``squared`` (n_candidates, n_states) sums of squared scaled
    residuals, ``n`` samples per state, ``n_effective`` (n_candidates,) effective
    samples of each candidate's residuals (:func:`effective_samples`), ``diverged``
    and ``first_run`` (each candidate's trajectory on the piece marked first).
    """
    from .bootstrap import simulate_ensemble
    from .expressions import parse_expression

    known = tuple(state_names) + tuple(input_names)
    expressions = [parse_expression(t, known) for t in union]
    n_cand, n_states = len(candidates), len(state_names)
    squared, n_eff = np.zeros((n_cand, n_states)), np.zeros(n_cand)
    diverged, n, first_run = np.zeros(n_cand, dtype=bool), 0, None
    for piece in pieces:
        x, div = simulate_ensemble(expressions, state_names, input_names, piece.coef, piece.t, piece.x0, piece.u,
                                   interpolation=piece.interpolation, method=settings.method, rtol=settings.rtol,
                                   atol=settings.atol, limits=settings.limits, time_limit=settings.time_limit)
        diverged |= div
        residual = (x - piece.x[None]) / sigma
        squared += np.nansum(residual**2, axis=1)
        n += len(piece.t)
        for m in range(n_cand):
            if not div[m]:
                n_eff[m] += effective_samples(residual[m])
        if piece.figure_rows is not None:
            if first_run is None:
                first_run = np.full((n_cand, piece.figure_length, n_states), np.nan)
            first_run[:, piece.figure_rows] = x
    return {"squared": squared, "n": n, "n_effective": n_eff, "diverged": diverged, "first_run": first_run}


def held_out_pieces(candidates, union, runs, smoothed, settings, horizon):
    """Pieces of runs not used in the fit: every candidate with its coefficients as given."""
    coef = stacked_coef(candidates, union, runs[0].x.shape[1] if runs else 0)
    pieces = []
    for r, (run, (_, x_start)) in enumerate(zip(runs, smoothed)):
        interpolation = settings.interpolation_for(run.u)
        for rows in simulation_segments(run.t, horizon):
            pieces.append(Piece(run.t[rows], run.x[rows], run.u[rows], x_start[rows[0]], coef, interpolation,
                                figure_rows=rows if r == 0 else None, figure_length=len(run.t)))
    return pieces


def score_candidates(candidates, state_names, input_names, runs, smoothed, *, settings,
                     inclusion=None, library_terms=None, horizon=None, pieces=None, union=None):
    """Score every candidate by free-run simulation, and by one-step derivative error.

    Parameters
    ----------
    runs : sequence of data.Run
        The runs whose scale (std of each state) makes residuals comparable; without
        ``pieces`` also the runs simulated (held-out runs, with their recorded inputs).
    smoothed : sequence of (smoothing.Smoothed, ndarray)
        For each run: its derivative-stage result (trimmed), for one-step derivative
        errors, and its smoothed states on every sample, where simulations start.
    settings : discover.simulate.SimulationSettings
    horizon : float or None
        Simulate segments of this length, each from the smoothed measured state.
    pieces : list of Piece, optional
        What to simulate instead of the runs (cross-validation folds: see
        :func:`discover.choice.fold_pieces`); ``union`` are their coefficient rows.
    """
    from .model import Model

    if pieces is None:
        union = union_terms(candidates)
        pieces = held_out_pieces(candidates, union, runs, smoothed, settings, horizon)
    measured = np.vstack([run.x for run in runs])
    sigma = np.where(measured.std(axis=0) > 0, measured.std(axis=0), 1.0)
    sim = simulate_pieces(candidates, union, state_names, input_names, pieces, settings, sigma)
    x_dot = np.vstack([s.x_dot for s, _ in smoothed])
    d_sigma = np.where(x_dot.std(axis=0) > 0, x_dot.std(axis=0), 1.0)
    scores = []
    for m, c in enumerate(candidates):
        model = Model(tuple(state_names), tuple(input_names), c.terms, c.coef)
        predicted = np.vstack([model.rhs(s.x, s.u) for s, _ in smoothed])
        d_res = (predicted - x_dot) / d_sigma
        bad = bool(sim["diverged"][m])
        nrmse = np.sqrt(sim["squared"][m] / max(sim["n"], 1))
        score = {
            "rss": float(sim["squared"][m].sum()),
            "n": sim["n"] * len(state_names),
            "n_effective": float(sim["n_effective"][m]) if not bad else np.nan,
            "simulation_error": float(nrmse.mean()) if not bad else np.inf,
            "per_state": {s: (float(v) if not bad else np.inf) for s, v in zip(state_names, nrmse)},
            "derivative_rss": float(np.sum(d_res**2)),
            "derivative_n": d_res.size,
            "derivative_error": float(np.mean(d_res**2)),
            "diverged": bad,
            "first_run": sim["first_run"][m] if sim["first_run"] is not None else None,
        }
        if inclusion is not None:
            keys = [term_key(t) for t in library_terms]
            values = [inclusion[keys.index(term_key(c.terms[j])), i]
                      for j, i in zip(*np.nonzero(c.coef)) if term_key(c.terms[j]) in keys]
            score["mean_inclusion"] = float(np.mean(values)) if values else np.nan
        scores.append(score)
    return scores
