"""Memory bounds, checked from the sizes before anything large is allocated.

A run whose estimate exceeds the limit is refused with one line that gives the
sizes, the estimate and the key to change, instead of dying later in numpy.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

from .exceptions import ConfigError

GIB = 1024**3
#: Largest system (members × states) integrated at once; LSODA keeps a dense Jacobian of
#: its square, so 1,000 states cost 8 MB and the ensemble is cut into batches above it.
MAX_BATCH_STATES = 1000


@dataclass(frozen=True)
class MemoryEstimate:
    """Bytes of the big allocations of a run, by part."""

    parts: dict

    @property
    def total(self):
        return sum(self.parts.values())

    def describe(self):
        shown = sorted(self.parts.items(), key=lambda item: -item[1])
        return ", ".join(f"{name} {size / GIB:.2f} GiB" for name, size in shown if size >= 0.005 * GIB)


def machine_memory():
    """Physical memory of this machine in bytes (None where the platform does not say)."""
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):  # pragma: no cover
        return None


def estimate(*, library_terms, n_states, run_lengths, sub_length, n_folds, members, keep_rows, chunk_rows):
    """Estimate the peak memory of the regression and ensemble stages.

    Parameters
    ----------
    library_terms, n_states : int
        Columns of Θ and of Ẋ.
    run_lengths : list of int
        Usable samples of each training run.
    sub_length, n_folds : int
        The sub-block plan (see :func:`discover.bootstrap.block_plan`).
    members : int
        Bootstrap members (their Grams are formed in one product).
    keep_rows : bool
        Whether the library rows of every run are kept (row resampling, SR3).
    chunk_rows : int or None
        Rows per chunk when training runs are read in chunks.
    """
    width = library_terms + n_states
    gram = 8 * width * width
    n_blocks = sum(min(n, max(n_folds, n // max(sub_length, 1))) for n in run_lengths)  # as sub_block_sizes
    rows_at_once = sum(run_lengths) if keep_rows else max(run_lengths, default=0)
    if chunk_rows:
        rows_at_once = min(rows_at_once, 3 * chunk_rows)
    return MemoryEstimate({
        "library rows": 8 * rows_at_once * width,
        "block Grams": n_blocks * gram,
        "ensemble Grams": members * gram,
        "ensemble weights": 8 * members * n_blocks,
    })


def check_memory(needed, limit_gib, where):
    """Refuse a run whose estimate is above ``limit_gib`` (default: half of this machine)."""
    total_memory = machine_memory()
    limit = limit_gib * GIB if limit_gib is not None else (total_memory / 2 if total_memory else None)
    if limit is None or needed.total <= limit:
        return
    raise ConfigError(
        f"{where}: this run would need about {needed.total / GIB:.1f} GiB ({needed.describe()}), above the "
        f"limit of {limit / GIB:.1f} GiB. Lower [terms].degree or the number of variables, "
        "[bootstrap].members, or read runs in chunks with [data].chunk_rows; or raise "
        "[compute].memory_limit (GiB)."
    )


def ensemble_batches(n_members, n_states):
    """Index ranges of members simulated together, at most MAX_BATCH_STATES states per solve."""
    size = max(1, MAX_BATCH_STATES // max(n_states, 1))
    return [range(start, min(start + size, n_members)) for start in range(0, n_members, size)]
