"""Bootstrap ensembles of sparse fits: inclusion probabilities, intervals, prediction bands.

The method is the ensemble approach to sparse identification (Fasel, Kutz, Brunton &
Brunton 2022, Proc. R. Soc. A 478): fit many members on resamples of the data, count
how often each term is kept (its inclusion probability), and take coefficient
statistics over the members.

Resampling respects time: by default a circular block bootstrap within each run
(Politis & Romano 1992), whose blocks start on a grid of sub-blocks so that a member's
Gram is a weighted sum of the sub-block Grams already computed (DESIGN.md, "Scale"):
no member touches the rows again. With many runs, whole runs can be resampled
instead. Row-wise resampling is offered only when asked for: neighbouring samples of a
time series are nearly identical, so row resamples understate the spread.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from .selection import Scale, fit_scaled, least_squares_gram, scaled_problem
from .terms import TermEvaluator

#: Sub-blocks per bootstrap block: block starts fall on a grid of block_length / 4.
SUB_PER_BLOCK = 4
#: Upper bound on the number of sub-block Grams kept in memory.
MAX_SUB_BLOCKS = 4000
#: Whole runs are resampled under resample = "auto" from this many training runs on.
MIN_RUNS_FOR_RUN_RESAMPLING = 10


def correlation_length(series):
    """Lag (in samples) where the autocorrelation first drops below 1/e.

    Parameters
    ----------
    series : ndarray of shape (n_samples, n_columns)

    Returns
    -------
    int
        The largest such lag over the columns (at least 1).
    """
    x = series - series.mean(axis=0)
    n = len(x)
    spectrum = np.fft.rfft(x, n=2 * n, axis=0)
    acf = np.fft.irfft(spectrum * np.conj(spectrum), axis=0)[:n]
    lags = []
    for j in range(x.shape[1]):
        if acf[0, j] <= 0:
            continue
        below = np.flatnonzero(acf[:, j] / acf[0, j] < np.exp(-1.0))
        lags.append(int(below[0]) if below.size else n)
    return max(lags, default=1) or 1


def block_plan(run_lengths, correlation, block_length=None):
    """Resolve ``(sub_length, block_length)`` in samples.

    The default block length is twice the correlation length of the derivative
    signal (common practice for block bootstraps: blocks must span the dependence),
    at least 8 samples and at most a fifth of the shortest run. Blocks are made of
    SUB_PER_BLOCK sub-blocks, whose count is capped at MAX_SUB_BLOCKS.
    """
    shortest, total = min(run_lengths), sum(run_lengths)
    if block_length is None:
        block_length = int(np.clip(2 * correlation, 8, max(8, shortest // 5)))
    sub_length = max(1, block_length // SUB_PER_BLOCK, -(-total // MAX_SUB_BLOCKS))
    return sub_length, sub_length * SUB_PER_BLOCK


def resolve_scheme(scheme, n_runs):
    if scheme == "auto":
        return "runs" if n_runs >= MIN_RUNS_FOR_RUN_RESAMPLING else "blocks"
    return scheme


def circular_block_starts(n_sub, n_draws, rng):
    """Start sub-block of each drawn block in one run."""
    return rng.integers(0, n_sub, size=n_draws)


def block_indices(start, n_sub, sub_per_block=SUB_PER_BLOCK):
    """Sub-blocks covered by a block starting at ``start`` (wrapping around the run)."""
    return (start + np.arange(sub_per_block)) % n_sub


def member_weights(runs, n_members, scheme, rng, sub_per_block=SUB_PER_BLOCK):
    """Weight of each sub-block in each member.

    Parameters
    ----------
    runs : ndarray of shape (n_blocks,)
        Run index of each sub-block (sub-blocks of a run are contiguous and in order).
    scheme : {"blocks", "runs"}

    Returns
    -------
    ndarray of shape (n_members, n_blocks)
        How many times each sub-block enters each member.
    """
    labels, first, counts = np.unique(runs, return_index=True, return_counts=True)
    weights = np.zeros((n_members, len(runs)))
    for m in range(n_members):
        if scheme == "runs":
            picks = rng.integers(0, len(labels), size=len(labels))
            for r in picks:
                weights[m, first[r]: first[r] + counts[r]] += 1
            continue
        for offset, n_sub in zip(first, counts):
            n_draws = -(-n_sub // sub_per_block)
            for start in circular_block_starts(n_sub, n_draws, rng):
                np.add.at(weights[m], offset + block_indices(start, n_sub, sub_per_block), 1)
    return weights


def library_masks(n_members, n_terms, fraction, rng):
    """Terms available to each member (library bagging); all True when fraction is 1."""
    if fraction >= 1.0:
        return np.ones((n_members, n_terms), dtype=bool)
    keep = max(1, int(round(fraction * n_terms)))
    masks = np.zeros((n_members, n_terms), dtype=bool)
    for m in range(n_members):
        masks[m, rng.choice(n_terms, size=keep, replace=False)] = True
    return masks


def fit_member(gram, count, n_terms, available, thresholds, ridge, max_iter):
    scale = Scale.from_gram(gram, count, n_terms)
    scale = Scale(scale.terms, scale.targets, scale.zero | ~available)
    coef, _ = fit_scaled(gram, count, n_terms, threshold=thresholds, ridge=ridge, max_iter=max_iter, scale=scale)
    return coef


def member_grams(grams, weights):
    """Every member's Gram in one product: (members, blocks) @ (blocks, p*p)."""
    return (weights @ grams.reshape(len(grams), -1)).reshape(len(weights), *grams.shape[1:])


def _fit_batch(grams_of_members, counts_of_members, n_terms, available, thresholds, ridge, max_iter):
    return [fit_member(gram, count, n_terms, mask, thresholds, ridge, max_iter)
            for gram, count, mask in zip(grams_of_members, counts_of_members, available)]


def _fit_batch_task(batch, n_terms, thresholds, ridge, max_iter):
    grams_of_members, counts_of_members, available = batch
    return _fit_batch(grams_of_members, counts_of_members, n_terms, available, thresholds, ridge, max_iter)


def fit_ensemble(block_set, weights, available, thresholds, *, ridge, max_iter, executor, progress=False):
    """Fit every member from its weighted sum of block Grams.

    Members are fitted in batches, one task each on the ``executor``
    (:class:`discover.compute.Executor`: this process, joblib or Dask) and collected
    in member order, so the result does not depend on where they ran.

    Returns
    -------
    ndarray of shape (n_members, n_terms, n_targets)
    """
    n_members = len(weights)
    batches = np.array_split(np.arange(n_members), min(n_members, 20))
    # The members' Grams in one product here, so that every way of fitting them sees the same bits.
    all_grams, all_counts = member_grams(block_set.grams, weights), weights @ block_set.counts
    items = [(all_grams[b], all_counts[b], available[b]) for b in batches]
    done = executor.map(_fit_batch_task, items, block_set.n_terms, thresholds, ridge, max_iter,
                        progress="bootstrap members" if progress else None, sizes=[len(b) for b in batches])
    return np.array([coef for batch in done for coef in batch])


def row_weights_ensemble(pieces, n_members, rng):
    """Row-wise bootstrap: per-member Grams from multinomial row counts (one pass per member)."""
    grams, counts = [], []
    z = np.vstack([np.hstack([theta, x_dot]) for _, theta, x_dot in pieces])
    for _ in range(n_members):
        w = np.bincount(rng.integers(0, len(z), size=len(z)), minlength=len(z)).astype(float)
        grams.append(z.T @ (z * w[:, None]))
        counts.append(w.sum())
    return np.array(grams), np.array(counts)


@dataclass(frozen=True)
class EnsembleSummary:
    """Per term (rows) and state (columns) statistics over the members.

    ``*_kept`` statistics are over the members that keep the term (NaN when none
    does); ``*_all`` over every member that had the term in its library, zeros included.
    """

    inclusion_probability: np.ndarray
    median_kept: np.ndarray
    mean_kept: np.ndarray
    low_kept: np.ndarray
    high_kept: np.ndarray
    median_all: np.ndarray
    mean_all: np.ndarray
    low_all: np.ndarray
    high_all: np.ndarray
    level: float

    def as_stats(self):
        return {name: getattr(self, name) for name in self.__dataclass_fields__ if name != "level"}


def summarize(coef, available, level=0.9):
    """Inclusion probabilities and coefficient statistics of an ensemble.

    Parameters
    ----------
    coef : ndarray of shape (n_members, n_terms, n_targets)
    available : bool ndarray of shape (n_members, n_terms)
    level : float
        Central interval level: the interval runs from quantile (1 − level)/2 to (1 + level)/2.
    """
    lo_q, hi_q = (1 - level) / 2, (1 + level) / 2
    present = np.broadcast_to(available[:, :, None], coef.shape)
    kept = (coef != 0) & present
    n_avail = present.sum(axis=0)
    inclusion = kept.sum(axis=0) / np.maximum(n_avail, 1)
    kept_values = np.where(kept, coef, np.nan)
    all_values = np.where(present, coef, np.nan)
    with warnings.catch_warnings():  # all-NaN columns (a term no member keeps) are expected
        warnings.simplefilter("ignore", RuntimeWarning)
        stats = dict(
            median_kept=np.nanmedian(kept_values, axis=0),
            mean_kept=np.nanmean(kept_values, axis=0),
            low_kept=np.nanquantile(kept_values, lo_q, axis=0),
            high_kept=np.nanquantile(kept_values, hi_q, axis=0),
            median_all=np.nanmedian(all_values, axis=0),
            mean_all=np.nanmean(all_values, axis=0),
            low_all=np.nanquantile(all_values, lo_q, axis=0),
            high_all=np.nanquantile(all_values, hi_q, axis=0),
        )
    return EnsembleSummary(inclusion_probability=inclusion, level=level, **stats)


def final_coefficients(summary, total, count, n_terms, *, inclusion_min, method):
    """Coefficients of the ensemble model.

    Terms with inclusion probability >= inclusion_min are kept. ``"refit"`` fits them by
    least squares on all training rows (so with clean data the model equals the single
    fit); ``"member_median"`` takes the median over all members, zeros included (the
    median aggregation of Fasel et al. 2022).
    """
    support = summary.inclusion_probability >= inclusion_min
    if method == "member_median":
        return np.where(support, np.nan_to_num(summary.median_all), 0.0)
    scale = Scale.from_gram(total, count, n_terms)
    g, b = scaled_problem(total, count, n_terms, scale)
    return scale.to_units(least_squares_gram(g, b, support & ~scale.zero[:, None]))


# --------------------------------------------------------------------------- prediction bands


def ensemble_rhs(expressions, state_names, input_names, coef):
    """Vectorised right-hand side of many members at once.

    Parameters
    ----------
    expressions : list of parsed expressions, the union of the members' terms
    coef : ndarray of shape (n_members, n_used_terms, n_states)

    Returns a function ``f(X, u, members) -> dX`` with X of shape (len(members), n_states):
    one evaluation of each term for all members, then one batched product.
    """

    evaluate = TermEvaluator(expressions, tuple(state_names) + tuple(input_names))

    def rhs(x, u, members):
        theta = evaluate(np.hstack([x, np.broadcast_to(u, (len(x), len(u)))]))
        return np.einsum("mk,mki->mi", theta, coef[members])

    return rhs


def simulate_ensemble(expressions, state_names, input_names, coef, t, x0, u, *, interpolation,
                      method, rtol, atol, limits, time_limit=None):
    """Simulate the members in batches of one solver call each (restarted only when a member escapes).

    A batch holds at most :data:`discover.resources.MAX_BATCH_STATES` states, so the
    solver's dense Jacobian stays small however many members there are.

    Returns
    -------
    x : ndarray of shape (n_members, n_samples, n_states)
        NaN from the time a member left the bounded region.
    diverged : bool ndarray of shape (n_members,)
    """
    from .resources import ensemble_batches
    from .simulate import DEFAULT_TIME_LIMIT, simulate_batch

    n_members = coef.shape[0]
    x0 = np.asarray(x0, dtype=float)
    x = np.empty((n_members, len(t), len(state_names)))
    stopped_at = np.empty(n_members)
    for batch in ensemble_batches(n_members, len(state_names)):
        rows = np.arange(batch.start, batch.stop)
        rhs = ensemble_rhs(expressions, state_names, input_names, coef[rows])
        x[rows], stopped_at[rows], _ = simulate_batch(
            rhs, t, np.tile(x0, (len(rows), 1)), u, interpolation=interpolation, method=method, rtol=rtol,
            atol=atol, limits=limits, time_limit=time_limit or DEFAULT_TIME_LIMIT)
    return x, np.isfinite(stopped_at)


def prediction_band(x, diverged, level=0.9, *, noise_std=None, rng=None):
    """Median and central prediction band over the members that did not diverge.

    The band is for a *measurement*: each member's trajectory plus Gaussian measurement
    noise of ``noise_std`` per state (estimated from the training runs as the spread
    of raw minus smoothed states). Without noise_std it shows the coefficient
    uncertainty alone.

    Returns (median, low, high), each of shape (n_samples, n_states); NaN if every member diverged.
    """
    ok = x[~diverged]
    if len(ok) == 0:
        nan = np.full(x.shape[1:], np.nan)
        return nan, nan, nan
    median = np.median(ok, axis=0)
    if noise_std is not None:
        ok = ok + rng.standard_normal(ok.shape) * np.asarray(noise_std)[None, None, :]
    lo_q, hi_q = (1 - level) / 2, (1 + level) / 2
    return median, np.quantile(ok, lo_q, axis=0), np.quantile(ok, hi_q, axis=0)


def band_coverage(measured, low, high):
    """Share of measured samples inside the band, per state."""
    inside = (measured >= low) & (measured <= high)
    return inside.mean(axis=0)


# --------------------------------------------------------------------------- the ensemble stage


@dataclass(frozen=True)
class Ensemble:
    """Bootstrap members and their summary.

    Attributes
    ----------
    coef : ndarray of shape (n_members, n_terms, n_states)
    available : bool ndarray of shape (n_members, n_terms)
        The terms each member could choose from (``library_fraction`` < 1).
    summary : EnsembleSummary
    scheme : str
        The resampling used ("blocks", "runs" or "rows").
    block_length : int or None
        Samples per resampled block (block scheme only).
    weights : ndarray of shape (n_members, n_blocks) or None
    """

    coef: np.ndarray
    available: np.ndarray
    summary: EnsembleSummary
    scheme: str
    block_length: int | None
    weights: np.ndarray | None


def run_ensemble(boot, selection, seed, gram_blocks, thresholds, executor, *, progress=False):
    """Fit the bootstrap members at the selected thresholds.

    Parameters
    ----------
    boot, selection : the ``[bootstrap]`` and ``[selection]`` settings
    seed : int
        The config's seed; the members' draws are the only use of this stream.
    gram_blocks : discover.grams.GramBlocks
    thresholds : ndarray of shape (n_states,)
    executor : discover.compute.Executor
    """
    blocks = gram_blocks.blocks
    rng = np.random.default_rng(seed)
    scheme = resolve_scheme(boot.resample, len(np.unique(blocks.runs)))
    n, k = boot.members, blocks.n_terms
    weights = None
    if scheme == "rows":
        grams, counts = row_weights_ensemble(gram_blocks.rows, n, rng)
        available = library_masks(n, k, boot.library_fraction, rng)
        coef = np.array([fit_member(g, c, k, a, thresholds, selection.ridge, selection.max_iter)
                         for g, c, a in zip(grams, counts, available)])
    else:
        weights = member_weights(blocks.runs, n, scheme, rng)
        available = library_masks(n, k, boot.library_fraction, rng)
        coef = fit_ensemble(blocks, weights, available, thresholds, ridge=selection.ridge,
                            max_iter=selection.max_iter, executor=executor, progress=progress)
    summary = summarize(coef, available, boot.level)
    block_length = gram_blocks.plan.block_length if scheme == "blocks" else None
    return Ensemble(coef, available, summary, scheme, block_length, weights)


def ensemble_model(boot, single, ensemble, blocks):
    """The model of the ensemble: the terms kept often enough, with their statistics."""
    from .model import Model

    summary = ensemble.summary
    total, count = blocks.total()
    coef = final_coefficients(summary, total, count, len(single.terms), inclusion_min=boot.inclusion_min,
                              method=boot.coefficients)
    stats = {
        "inclusion_probability": summary.inclusion_probability,
        "coefficient_median": summary.median_kept,
        "coefficient_low": summary.low_kept,
        "coefficient_high": summary.high_kept,
    }
    info = dict(single.info)
    info["ensemble"] = {
        "members": int(boot.members),
        "resample": ensemble.scheme,
        "block_length": ensemble.block_length,
        "library_fraction": boot.library_fraction,
        "inclusion_min": boot.inclusion_min,
        "coefficients": boot.coefficients,
        "interval_level": boot.level,
        "interval_over": "members that keep the term",
        "interval_meaning": "the spread of the bootstrap members' coefficients, not a confidence interval",
    }
    return Model(single.state_names, single.input_names, single.terms, coef, stats, info)
