"""The regression pair as block Grams: one interface, an in-memory and a chunked backend.

A backend turns training runs and a term library into :class:`~discover.selection.BlockGrams`:
each run is cut into contiguous sub-blocks (:func:`~discover.selection.sub_block_sizes`,
the one split every path uses) and one augmented Gram ``[Θ Ẋ]ᵀ[Θ Ẋ]`` is kept per
sub-block. Selection, cross-validation and the bootstrap only ever see those Grams.

Interface (both backends):

- ``lengths``: usable rows of each training run; ``correlation``: correlation length
  of the derivative signal (samples), for the block plan;
- ``grams(library, plan, *, rows=False) -> GramBlocks``;
- ``noise()``: per-state measurement-noise estimate (raw minus smoothed);
- ``thin_training()``: the training runs for plots and limits.

Where the per-run work runs is the :class:`~discover.compute.Executor` passed in.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import bootstrap, stream
from .data import Dataset
from .derivatives import min_samples
from .exceptions import DataError
from .selection import BlockGrams, Scale, block_grams, scaled_problem, sub_block_sizes
from .terms import build_library


@dataclass(frozen=True)
class GramPlan:
    """How runs are cut: rows per sub-block, rows per bootstrap block, CV folds."""

    sub_length: int
    block_length: int
    n_folds: int
    correlation: int


@dataclass(frozen=True)
class GramBlocks:
    """The block Grams of one library on the training runs.

    ``rows`` holds ``(run_index, Θ_block, Ẋ_block)`` for every sub-block when the rows
    were asked for (row-wise resampling), else None.
    """

    blocks: BlockGrams
    rows: tuple | None
    plan: GramPlan


def make_plan(backend, n_folds, block_length=None):
    sub_length, block_length = bootstrap.block_plan(backend.lengths, backend.correlation, block_length)
    return GramPlan(sub_length, block_length, n_folds, backend.correlation)


def library_for(settings, table=None, label="[terms]"):
    """The candidate library of ``[terms]`` (or of another table with the same keys)."""
    terms = settings.library_table() if table is None else table
    data = settings.data
    return build_library(
        data.states, data.inputs, degree=terms["degree"], variables=terms["variables"],
        input_degree=terms["input_degree"], state_input_products=terms["state_input_products"],
        constant=terms["constant"], trig_variables=terms["trig_variables"],
        trig_frequencies=terms["trig_frequencies"], trig_input_products=terms["trig_input_products"],
        custom=terms["custom"], where=f"{settings.source}: {label}",
    )


def run_blocks(run_index, run, library, plan):
    """One run's ``(run_index, z_block, None)`` sub-blocks, z = [Θ Ẋ] side by side."""
    k = len(library)
    with np.errstate(all="ignore"):
        z = library.evaluate(run.x, run.u, append=run.x_dot)  # one allocation per run
    bad = ~np.isfinite(z[:, :k])
    if bad.any():
        row, j = np.argwhere(bad)[0]
        raise DataError(
            f"run {run.name!r}: the candidate term {library.names[j]!r} is not finite at row "
            f"{row + 1} of the trimmed run (value {float(z[row, j])!r}); a division by zero or a log/sqrt "
            "of a negative number? Change the term or the data's range."
        )
    edges = np.cumsum([0] + sub_block_sizes(len(run.t), plan.sub_length, plan.n_folds))
    return [(run_index, z[a:b], None) for a, b in zip(edges[:-1], edges[1:])]


def _run_grams(item, library, plan):
    """One run's sub-block Grams (a task)."""
    run_index, run = item
    return block_grams(run_blocks(run_index, run, library, plan), n_terms=len(library))


def _concatenate(per_run, n_terms):
    return BlockGrams(np.concatenate([b.grams for b in per_run]), np.concatenate([b.counts for b in per_run]),
                      np.concatenate([np.full(len(b.counts), r) for r, b in enumerate(per_run)]), n_terms,
                      np.concatenate([b.positions for b in per_run]))


class MemoryBackend:
    """Training runs held in memory (the default)."""

    row_unit = "usable samples"  # what a row of the regression pair is (check_library_size)

    def __init__(self, smoothed, executor):
        self.runs = smoothed.trimmed
        self.smoothed = smoothed
        self.executor = executor
        self.lengths = [len(r.t) for r in self.runs]
        self.n_rows = sum(self.lengths)
        self.correlation = int(np.median([bootstrap.correlation_length(r.x_dot[: stream.CORRELATION_ROWS])
                                          for r in self.runs]))

    def grams(self, library, plan, *, rows=False):
        per_run = self.executor.map(_run_grams, list(enumerate(self.runs)), library, plan)
        blocks = _concatenate(per_run, len(library))
        pieces = None
        if rows:
            k = len(library)
            pieces = tuple((r, z[:, :k], z[:, k:]) for r, run in enumerate(self.runs)
                           for _, z, _ in run_blocks(r, run, library, plan))
        return GramBlocks(blocks, pieces, plan)

    def noise(self):
        return self.smoothed.noise()

    def thin_training(self, training):
        return training


class ChunkedBackend:
    """Training runs read chunk by chunk (``[data].chunk_rows``); see :mod:`discover.stream`.

    The first Gram pass also records each run's extremes, noise and thin samples.
    """

    def __init__(self, settings, training, trim):
        self.paths = [Path(r.source) for r in training.runs]
        self.reading = stream.ChunkReading(settings.data, settings.derivatives, trim, settings.data.chunk_rows)
        self.sizes = [stream.count_rows(p, self.reading) for p in self.paths]
        options = dict(settings.derivatives.options)
        needed = max(min_samples(settings.derivatives.method, options), 2 * trim + 3)
        for path, n in zip(self.paths, self.sizes):
            if n < needed:
                raise DataError(f"{path}: {n} samples is too few for [derivatives].method = "
                                f"{settings.derivatives.method!r} (needs at least {needed}).")
        self.lengths = [n - 2 * trim for n in self.sizes]
        self.n_rows, self.row_unit = sum(self.lengths), "usable samples"
        self.correlation = int(np.median([
            bootstrap.correlation_length(stream.prefix_derivative(p, self.reading, n))
            for p, n in zip(self.paths, self.sizes)
        ]))
        self.stats = {}

    def grams(self, library, plan, *, rows=False):
        first = not self.stats  # the first pass records the runs' statistics
        blocks = stream.stream_grams(self.paths, self.reading, library, plan.sub_length, plan.n_folds,
                                     self.sizes, self.stats if first else None)
        return GramBlocks(blocks, None, plan)

    def noise(self):
        total = sum(s.n_trimmed for s in self.stats.values())
        mean = sum(s.noise_sum for s in self.stats.values()) / total
        return np.sqrt(np.maximum(sum(s.noise_sq for s in self.stats.values()) / total - mean**2, 0.0))

    def thin_training(self, training):
        runs = [stream.thin_run(p, n, self.stats[r]) for r, (p, n) in enumerate(zip(self.paths, self.sizes))]
        return Dataset(training.state_names, training.input_names, tuple(runs))


def fold_labels(blocks, n_folds, split):
    """CV fold of each sub-block; rows are never assigned at random.

    ``"runs"``: whole runs are folds (run i in fold i mod n_folds). ``"blocks"``: each
    run is cut into n_folds contiguous stretches and fold k holds the k-th stretch of
    every run. ``"auto"`` takes runs when there are at least n_folds of them.
    Neighbouring samples are nearly identical; random rows would leak.

    Returns (labels of shape (n_blocks,), the split used).
    """
    n_runs = len(np.unique(blocks.runs))
    if split == "auto":
        split = "runs" if n_runs >= n_folds else "blocks"
    if split == "runs":
        return blocks.runs % n_folds, split
    per_run = np.bincount(blocks.runs)[blocks.runs]
    return blocks.positions * n_folds // per_run, split


def check_library_size(library, n_rows, where, unit="usable samples"):
    """More terms than rows of the regression pair (samples, or weak windows) cannot be fitted."""
    if len(library) >= n_rows:
        raise DataError(
            f"{where}: the library has {len(library)} terms but the training runs give only "
            f"{n_rows} {unit}. Lower [terms].degree or add data."
        )


def check_collinear_terms(blocks, library, where):
    """Refuse a library whose columns are exactly linearly dependent on the training rows."""
    total, count = blocks.total()
    k = len(library)
    scale = Scale.from_gram(total, count, k)
    g, _ = scaled_problem(total, count, k, scale)
    keep = np.flatnonzero(~scale.zero)
    values, vectors = np.linalg.eigh(g[np.ix_(keep, keep)])
    if values[0] > 1e-11 * values[-1]:
        return
    involved = [library.names[keep[j]] for j in np.flatnonzero(np.abs(vectors[:, 0]) > 0.05)]
    raise DataError(
        f"{where}: the candidate terms {involved} are collinear on the training data (a combination "
        "of them is zero on every row), so their coefficients cannot be told apart. Remove one of "
        "them, e.g. with [terms].variables, input_degree or degree."
    )
