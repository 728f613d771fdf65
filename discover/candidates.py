"""The ranking stage: collect candidate structures, score them on equal footing, rank them.

Candidates are the ensemble's model, the supports at other inclusion levels of the
ensemble, every distinct term set along the threshold path, the fits of other
libraries, the user's hypotheses and the SR3 supports, all fitted from block Grams
(:mod:`discover.grams`). :func:`rank_candidates` simulates them on data not used to fit
them (cross-validation folds of the training runs and the held-out runs, see
:mod:`discover.choice`) and orders them, the recommended one first
(:mod:`discover.ranking`).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from . import choice, ranking
from .grams import fold_labels, library_for
from .selection import select_terms, threshold_grid
from .smoothing import smooth_runs
from .sr3 import sr3_candidates_gram
from .terms import build_library, term_key


@dataclass(frozen=True)
class Ranking:
    """The ranked candidates.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per distinct candidate, best first (see :func:`discover.ranking.score_table`).
    candidates : tuple of discover.ranking.Candidate
    criterion : str
    scored_on : str
        "held-out runs" or "training runs".
    first_run : dict of str -> ndarray of shape (n_samples, n_states)
        Each candidate's simulated trajectory on the first scored run (by name), as
        scored: the report draws these instead of simulating again.
    """

    table: pd.DataFrame
    candidates: tuple
    criterion: str
    scored_on: str
    first_run: dict


def hypothesis_candidate(settings, hypothesis, model, backend, plan):
    """A user's term set, fitted by least squares; states it leaves out keep the model's terms."""
    data = settings.data
    per_state = []
    for i, state in enumerate(data.states):
        if state in hypothesis:
            per_state.append(list(hypothesis[state]))
        else:
            per_state.append([model.terms[j] for j in np.flatnonzero(model.coef[:, i])])
    texts = list(dict.fromkeys(t for terms in per_state for t in terms))
    library = build_library(data.states, data.inputs, degree=0, constant=False, custom=texts,
                            where=f"{settings.source}: [[ranking.hypotheses]] {hypothesis['name']!r}")
    keys = [term_key(t) for t in library.names]
    support = np.zeros((len(library), len(per_state)), dtype=bool)
    for i, terms in enumerate(per_state):
        for t in terms:
            support[keys.index(term_key(t)), i] = True
    return ranking.least_squares_candidate(f"hypothesis {hypothesis['name']!r}", "hypothesis", library,
                                           support, backend.grams(library, plan).blocks)


#: Inclusion probabilities at which the ensemble's supports become candidates too.
INCLUSION_LEVELS = (0.3, 0.7, 0.9)


def collect_candidates(settings, model, gram_blocks, library, backend, inclusion=None):
    """The model itself, the user's hypotheses, other inclusion levels, the threshold path,
    other libraries and SR3."""
    sel, rank_cfg = settings.selection, settings.ranking
    grid = threshold_grid(sel)
    blocks, plan = gram_blocks.blocks, gram_blocks.plan
    # Order matters for names: a duplicate term set keeps the first name (user's names first).
    candidates = [ranking.Candidate("model", "model", model.terms, model.coef, blocks=blocks)]
    for hypothesis in rank_cfg.hypotheses:
        candidates.append(hypothesis_candidate(settings, hypothesis, model, backend, plan))
    if inclusion is not None:
        for level in INCLUSION_LEVELS:
            support = inclusion >= level
            if support.any():
                candidates.append(ranking.least_squares_candidate(
                    f"ensemble inclusion >= {level:g}", "ensemble", library, support, blocks))
    if rank_cfg.path:
        candidates += ranking.path_candidates(blocks, library, grid, ridge=sel.ridge, max_iter=sel.max_iter,
                                              label="path")
    for table in rank_cfg.libraries:
        other = library_for(settings, table, label=f"[[ranking.libraries]] {table['name']!r}")
        other_blocks = backend.grams(other, plan).blocks
        folds, split = fold_labels(other_blocks, sel.cv_folds, sel.cv_split)
        fit = select_terms(sel, other_blocks, folds, settings.data.states, split=split)
        candidates.append(ranking.Candidate(f"library {table['name']!r} (cv)", "library", tuple(other.names),
                                            fit.coef, blocks=other_blocks))
        candidates += ranking.path_candidates(other_blocks, other, grid, ridge=sel.ridge, max_iter=sel.max_iter,
                                              label=f"library {table['name']!r}")
    if rank_cfg.sr3:
        candidates += [replace(c, blocks=blocks) for c in sr3_candidates_gram(blocks, library, grid)]
    return ranking.merge_duplicates(candidates, model.state_names)


#: Backward elimination: at most this many rounds, each from the recommended candidate.
MAX_PRUNE_ROUNDS = 12


def rank_candidates(candidates, model, settings, *, prune=True, **scoring):
    """Score candidates by simulation on data not used to fit them (:func:`score_unseen`), order them.

    With ``prune``, backward elimination follows (:func:`pruned_children`): the
    recommended candidate's terms are dropped one at a time, each child scored the same
    way; while a child becomes the recommendation (fewer terms, within Δ ≤ 2), the
    next round starts from it. The candidate pool holds whole threshold-path supports,
    where a small real term often comes only together with spurious ones; elimination
    by the simulation criterion separates them.
    """
    criterion = settings.ranking.criterion
    scores, scored_on = score_unseen(candidates, model, settings, **scoring)
    table = ranking.score_table(candidates, scores, criterion)
    pool = list(candidates)
    first_run = {c.name: score["first_run"] for c, score in zip(candidates, scores)}
    seen = {c.structure(model.state_names) for c in pool}
    for _ in range(MAX_PRUNE_ROUNDS if prune else 0):
        best = next(c for c in pool if c.name == table.iloc[0]["candidate"])
        children = [c for c in pruned_children(best, model.state_names) if c.structure(model.state_names) not in seen]
        if not children:
            break
        seen |= {c.structure(model.state_names) for c in children}
        child_scores, _ = score_unseen(children, model, settings, **scoring)
        table = ranking.order_table(pd.concat([table, ranking.score_table(children, child_scores, criterion)],
                                              ignore_index=True), criterion)
        pool += children
        first_run.update({c.name: score["first_run"] for c, score in zip(children, child_scores)})
        if table.iloc[0]["candidate"] not in {c.name for c in children}:
            break
    return Ranking(table, tuple(pool), criterion, scored_on, first_run)


def pruned_children(candidate, state_names):
    """The candidate without each one of its terms, refitted by least squares on all training blocks."""
    root, _, dropped = candidate.name.partition(" without ")
    out = []
    for j, i in zip(*np.nonzero(candidate.coef)):
        support = candidate.coef != 0
        support[j, i] = False
        if not support.any():
            continue
        child = replace(candidate, coef=np.where(support, 1.0, 0.0), also=(), source="pruned")
        coef = choice.refit_without(child, np.ones(len(candidate.blocks.counts), dtype=bool))
        term = f"{candidate.terms[j]} in d{state_names[i]}/dt"
        name = f"{root} without {dropped + ', ' if dropped else ''}{term}"
        out.append(replace(child, name=name, coef=coef))
    return out


def score_unseen(candidates, model, settings, *, training, smoothed, held_out, held_smoothed, simulation,
                 folds=None, horizon=None, inclusion=None, library_terms=None):
    """Every candidate's scores (:func:`discover.ranking.score_candidates`) and what they were scored on.

    Parameters
    ----------
    training, held_out : data.Dataset
    smoothed, held_smoothed : smoothing.SmoothedRuns or None
        Training runs (None when read in chunks: then only held-out runs, or the thin
        training runs, are scored, with every candidate fitted on all data) and held-out runs.
    folds : (labels, split) or None
        CV fold of every training block, as the selection used them.
    horizon : float or None
        Simulation segment length (chaotic systems); None: whole stretches.
    """
    union = ranking.union_terms(candidates)
    pieces, runs, pairs = [], [], []
    if smoothed is not None and folds is not None:
        pieces += choice.fold_pieces(candidates, union, smoothed, candidates[0].blocks, folds[0], simulation,
                                     horizon)
        runs += list(training.runs)
        pairs += smoothed.scoring_pairs()
    n_cv = len(pieces)
    if held_out.runs:
        pieces += ranking.held_out_pieces(candidates, union, held_out.runs, held_smoothed.scoring_pairs(),
                                          simulation, horizon)
        runs += list(held_out.runs)
        pairs = held_smoothed.scoring_pairs()  # one-step derivative errors on unseen data
    if not pieces:  # chunked, nothing held out: the thin training runs, fitted on all of them
        thin = smooth_runs(training, settings.derivatives)
        pieces = ranking.held_out_pieces(candidates, union, training.runs, thin.scoring_pairs(), simulation,
                                         horizon)
        runs, pairs = list(training.runs), thin.scoring_pairs()
    scores = ranking.score_candidates(candidates, model.state_names, model.input_names, runs, pairs,
                                      settings=simulation, inclusion=inclusion, library_terms=library_terms,
                                      pieces=pieces, union=union)
    return scores, choice.scoring_description(folds[1] if folds else None, n_cv, bool(held_out.runs))
