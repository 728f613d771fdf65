"""The choice stage: score candidate structures by free-run simulation on data not used
to fit them, and recommend the one the run writes.

Scoring data:

* **cross-validation folds of the training runs** — whole runs when there are enough
  of them, else contiguous stretches of every run (the folds of the threshold
  selection, :func:`discover.grams.fold_labels`). Each candidate's support is refitted
  by least squares on the block Grams of the other folds and simulated over the fold
  from the smoothed state at its start, with the recorded input. This is
  cross-validation of the simulation error (Stone 1974, J. R. Stat. Soc. B 36), so a
  term that only fits derivative noise does not help, and a small real term (a light
  damping) that the derivative error barely sees does;
* **the held-out runs**, with the candidates fitted on all training data.

Chaotic systems: nearby trajectories separate, so a long free run says nothing about a
structure. Simulations then run over segments of a *horizon*, each from the smoothed
measured state. Unless ``[ranking].horizon`` sets it, the horizon is measured: the
derivative-fit model is simulated from the smoothed start of the longest training run
and from a start displaced by the measurement noise; the horizon is the time the two
take to separate to a quarter of the states' spread (for a stable system they never do,
and runs are simulated whole). This is the predictability time of the system as the
data show it (the separation of nearby trajectories, Wolf et al. 1985, Physica D 16).

The criterion and the parsimony rule (effective sample size, Δ ≤ 2, fewest terms) are
those of :func:`discover.ranking.order_table`.
"""

from __future__ import annotations

import numpy as np

from . import ranking
from .exceptions import ConfigError
from .selection import Scale, least_squares_gram, scaled_problem

#: The two trajectories have separated when their RMS distance, in units of each
#: state's standard deviation, passes this.
SEPARATION = 0.25

#: A measured horizon shorter than this many samples is raised to it (a segment needs
#: enough samples for its residuals to say anything).
MIN_HORIZON_SAMPLES = 20


def refit_without(candidate, keep):
    """The candidate's support refitted by least squares on the blocks where ``keep`` is True."""
    blocks = candidate.blocks
    total, count = blocks.total(keep.astype(float))
    scale = Scale.from_gram(total, count, blocks.n_terms)
    g, b = scaled_problem(total, count, blocks.n_terms, scale)
    support = (candidate.coef != 0) & ~scale.zero[:, None]
    return scale.to_units(least_squares_gram(g, b, support))


def fold_stretches(blocks, labels, trim):
    """(run index, fold, rows of the untrimmed run) for every contiguous stretch of one fold."""
    out = []
    sizes = blocks.counts if blocks.samples is None else blocks.samples
    for r in np.unique(blocks.runs):
        mine = np.flatnonzero(blocks.runs == r)
        mine = mine[np.argsort(blocks.positions[mine], kind="stable")]
        start = trim
        for b in mine:
            stop = start + int(sizes[b])
            if out and out[-1][0] == r and out[-1][1] == labels[b] and out[-1][2][-1] == start - 1:
                out[-1] = (r, labels[b], np.arange(out[-1][2][0], stop))
            else:
                out.append((r, labels[b], np.arange(start, stop)))
            start = stop
    return out


def fold_pieces(candidates, union, smoothed, blocks, labels, settings, horizon):
    """Pieces of the training runs, each simulated with coefficients fitted without its fold."""
    n_states = smoothed.full[0].x.shape[1]
    coef_of = {}
    for fold in np.unique(labels):
        coefs = [refit_without(c, labels != fold) for c in candidates]
        coef_of[fold] = ranking.stacked_coef(candidates, union, n_states, coefs)
    pieces = []
    for r, fold, rows in fold_stretches(blocks, labels, smoothed.trim):
        run = smoothed.full[r]
        interpolation = settings.interpolation_for(run.u)
        for seg in ranking.simulation_segments(run.t[rows], horizon):
            at = rows[seg]
            pieces.append(ranking.Piece(run.t[at], run.x_raw[at], run.u[at], run.x[at[0]], coef_of[fold],
                                        interpolation))
    return pieces


def predictability_horizon(model, smoothed, noise, settings):
    """The time nearby trajectories of ``model`` take to separate (None: they do not).

    Parameters
    ----------
    model : discover.model.Model
        The derivative-fit model.
    smoothed : smoothing.SmoothedRuns
        Training runs; the longest is used.
    noise : ndarray of shape (n_states,)
        Measurement-noise estimate per state: the size of the displacement.
    settings : discover.simulate.SimulationSettings
    """
    from .simulate import run_model

    run = max(smoothed.full, key=lambda r: len(r.t))
    spread = run.x.std(axis=0)
    spread = np.where(spread > 0, spread, 1.0)
    step = np.where(np.asarray(noise) > 0, noise, 1e-3 * spread)
    signs = np.where(np.arange(len(step)) % 2 == 0, 1.0, -1.0)
    a = run_model(model, run.t, run.x[0], run.u, settings)
    b = run_model(model, run.t, run.x[0] + signs * step, run.u, settings)
    if a.diverged or b.diverged:
        return None
    distance = np.sqrt(np.mean(((a.x - b.x) / spread) ** 2, axis=1))
    apart = np.flatnonzero(distance > SEPARATION)
    if not apart.size:
        return None
    dt = float(np.median(np.diff(run.t)))
    return max(float(run.t[apart[0]] - run.t[0]), MIN_HORIZON_SAMPLES * dt)


def scoring_description(split, n_pieces_cv, held_out):
    parts = []
    if n_pieces_cv:
        parts.append("run-wise folds of the training runs" if split == "runs" else
                     "contiguous folds of the training runs")
    if held_out:
        parts.append("the held-out runs")
    return " and ".join(parts) or "the training runs"


def written_candidate(table, choose, hypotheses):
    """The row written to model.json: the recommended one unless ``[ranking].choose`` says otherwise.

    Returns (candidate name, note or None). ``choose`` is "recommended", "lowest" (the
    lowest criterion, no parsimony rule), "ensemble" (the ensemble's own model) or the
    name of a ``[[ranking.hypotheses]]`` entry.
    """
    if choose == "recommended" or not len(table):
        return (table.iloc[0]["candidate"] if len(table) else "model"), None
    names = list(table["candidate"])
    also = {n: row for row in table.itertuples() for n in str(row.also).split("; ") if n}
    if choose == "lowest":
        name = table.loc[table["delta"].idxmin(), "candidate"]
    elif choose == "ensemble":
        name = "model"
    elif choose in hypotheses:
        name = f"hypothesis {choose!r}"
    else:
        raise ConfigError(f"[ranking].choose = {choose!r}: use 'recommended', 'lowest', 'ensemble' or the name of "
                          f"a [[ranking.hypotheses]] entry ({', '.join(map(repr, hypotheses)) or 'none given'}).")
    if name not in names and name in also:
        name = also[name].candidate
    if name == table.iloc[0]["candidate"]:
        return name, None
    return name, (f"model.json holds {name!r}, as [ranking].choose = {choose!r} asks; the ranking recommends "
                  f"{table.iloc[0]['candidate']!r} ({table.iloc[0]['n_terms']} terms).")


def chosen_model(model, ranking_result, name, horizon):
    """The model of the candidate ``name``: its terms and coefficients, the ensemble's term
    statistics where its terms are the library's, and how it was chosen (``info["choice"]``)."""
    from dataclasses import replace

    from .model import Model

    table = ranking_result.table
    row = table[table["candidate"] == name].iloc[0]
    info = dict(model.info)
    info["choice"] = {
        "candidate": name,
        "recommended": str(table.iloc[0]["candidate"]),
        "criterion": ranking_result.criterion,
        "rule": "fewest terms within delta <= 2 of the lowest criterion" if ranking_result.criterion in
                ranking.LIKELIHOOD_CRITERIA else "lowest criterion",
        "scored_on": ranking_result.scored_on,
        "effective_samples": float(row["n_effective"]) if np.isfinite(row["n_effective"]) else None,
        "horizon": horizon,
    }
    if name == "model":
        return replace(model, info=info)
    candidate = next(c for c in ranking_result.candidates if c.name == name)
    same_terms = tuple(candidate.terms) == tuple(model.terms)
    stats = {k: v for k, v in model.term_stats.items() if k == "inclusion_probability"} if same_terms else {}
    return Model(model.state_names, model.input_names, tuple(candidate.terms), np.array(candidate.coef),
                 stats, info)
