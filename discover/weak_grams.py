"""The weak (integral) form as a regression target: a backend with the interface of
:class:`discover.grams.MemoryBackend` whose block Grams are ``[V b]ᵀ[V b]``.

``[selection].target = "weak"`` swaps the pointwise pair (Θ, Ẋ) for the weak pair of
:mod:`discover.weak` (Messenger & Bortz 2021): row q of ``V`` is ``∫ φ_q θ dt`` and of
``b`` is ``−∫ φ_q' x dt`` over window q of a run. Selection, cross-validation, the
bootstrap and the candidate fits only see block Grams, so they run unchanged.

Choices made here (see also :mod:`discover.weak`):

* The weak pair integrates the **measured** states (``x_raw``) of the trimmed runs: the
  test functions are the filter, and smoothing first would filter twice. The trimmed
  runs are those of the derivative stage, so the sub-blocks cover the same samples as
  on the pointwise path and the ranking maps folds back onto the runs the same way.
  The derivative settings still smooth the runs for the simulation starts, the noise
  estimate and the block plan (correlation length of the smoothed derivative).
* One half-width for all runs: ``[weak].half_width``, or with ``"auto"`` the median over
  the training runs of :func:`discover.weak.default_half_width` (Messenger & Bortz 2021,
  JCP: the data's corner frequency placed ``tau_hat`` standard deviations out in the
  test function's spectrum).
* Sub-blocks: each run's windows, in order of their centres, are cut by
  :func:`discover.selection.sub_block_sizes` into pieces of ``sub_length // stride``
  windows (about ``sub_length`` samples of centres), at least ``n_folds`` per run,
  exactly as :func:`discover.weak.weak_blocks` cuts them. A block stands for the
  samples from its first window's centre to the next block's (``BlockGrams.samples``).
* The dimensionless threshold scale becomes ``|ξ_ij| · rms(V_j) / rms(b_i)``: a term's
  share of the weak target, with rms over the windows (:class:`discover.selection.Scale`
  computes it from the Gram and the window counts, as it does for samples).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import weak
from .exceptions import DataError
from .grams import GramBlocks, MemoryBackend
from .selection import BlockGrams, block_grams, sub_block_sizes


@dataclass(frozen=True)
class WeakOptions:
    """The test functions of one run, resolved (``[weak]`` with "auto" and defaults filled in)."""

    half_width: int
    degree_p: int
    stride: int

    def to_dict(self):
        return {"half_width": self.half_width, "degree_p": self.degree_p, "stride": self.stride}


def resolve_options(runs, weak_settings):
    """The half-width (from the data when ``"auto"``), degree and stride for these runs."""
    half_width = weak_settings.half_width
    if half_width == "auto":
        half_width = int(np.median([weak.default_half_width(r.t, r.x_raw, degree_p=weak_settings.degree_p,
                                                            tau_hat=weak_settings.tau_hat) for r in runs]))
    stride = weak_settings.stride if weak_settings.stride is not None else max(1, half_width // 2)
    return WeakOptions(int(half_width), int(weak_settings.degree_p), int(stride))


def window_counts(lengths, options):
    """Test-function windows of runs with these sample counts (0 for a run shorter than one window)."""
    span = 2 * options.half_width + 1
    return [max(0, (n - span) // options.stride + 1) for n in lengths]


def weak_run_blocks(run_index, run, library, plan, options):
    """One run's ``(run_index, [V b]_block, None)`` sub-blocks and the samples each stands for."""
    rows = weak.weak_rows(run.t, run.x_raw, run.u, library, half_width=options.half_width,
                          degree_p=options.degree_p, stride=options.stride, name=run.name)
    n_windows = len(rows.z)
    if n_windows < plan.n_folds:
        raise DataError(
            f"run {run.name!r}: {n_windows} test-function windows ([weak].half_width = {options.half_width}, "
            f"stride = {options.stride}) are fewer than the {plan.n_folds} cross-validation folds "
            "([selection].cv_folds). Use a smaller [weak].half_width or stride, or fewer folds."
        )
    sizes = sub_block_sizes(n_windows, max(1, plan.sub_length // options.stride), plan.n_folds)
    edges = np.cumsum([0] + sizes)
    # A block stands for the samples from its first centre up to the next block's first
    # centre; the first block starts at the run's first sample, the last ends at its last.
    bounds = np.concatenate([[0], rows.centres[edges[1:-1]], [len(run.t)]])
    pieces = [(run_index, rows.z[a:b], None) for a, b in zip(edges[:-1], edges[1:])]
    return pieces, np.diff(bounds)


def _run_grams(item, library, plan, options):
    run_index, run = item
    pieces, samples = weak_run_blocks(run_index, run, library, plan, options)
    return block_grams(pieces, n_terms=len(library)), samples


class WeakBackend(MemoryBackend):
    """Block Grams of the weak pair of the training runs (held in memory).

    Lengths, correlation, noise and the training runs are those of
    :class:`~discover.grams.MemoryBackend` on the same smoothed runs; only the rows differ.
    """

    row_unit = "test-function windows"

    def __init__(self, smoothed, executor, weak_settings):
        super().__init__(smoothed, executor)
        self.options = resolve_options(self.runs, weak_settings)
        self.n_rows = sum(window_counts(self.lengths, self.options))

    def grams(self, library, plan, *, rows=False):
        per_run = self.executor.map(_run_grams, list(enumerate(self.runs)), library, plan, self.options)
        parts = [b for b, _ in per_run]
        blocks = BlockGrams(np.concatenate([b.grams for b in parts]), np.concatenate([b.counts for b in parts]),
                            np.concatenate([np.full(len(b.counts), r) for r, b in enumerate(parts)]), len(library),
                            np.concatenate([b.positions for b in parts]), np.concatenate([s for _, s in per_run]))
        pieces = None
        if rows:
            k = len(library)
            pieces = tuple((r, z[:, :k], z[:, k:]) for r, run in enumerate(self.runs)
                           for _, z, _ in weak_run_blocks(r, run, library, plan, self.options)[0])
        return GramBlocks(blocks, pieces, plan)


def training_backend(settings, smoothed, executor):
    """The in-memory backend of ``[selection].target``: pointwise derivatives or the weak form."""
    if settings.selection.target == "weak":
        return WeakBackend(smoothed, executor, settings.weak)
    return MemoryBackend(smoothed, executor)


def target_info(settings, backend):
    """What model.json records about the regression target."""
    if settings.selection.target != "weak":
        return {"target": "derivative",
                "threshold_scale": "dimensionless: |coefficient| * rms(term) / rms(derivative)"}
    return {"target": "weak",
            "threshold_scale": "dimensionless: |coefficient| * rms(weak term) / rms(weak target), over the "
                               "test-function windows",
            "weak": {**backend.options.to_dict(), "windows": int(backend.n_rows),
                     "half_width_from": "data" if settings.weak.half_width == "auto" else "config"}}
