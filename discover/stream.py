"""Training runs larger than memory: read in chunks, differentiate with overlap, sum Grams.

With ``[data].chunk_rows`` set, a training run is never held whole. Each pass reads
the file chunk by chunk (CSV chunks, Parquet record batches), smooths and
differentiates each chunk together with the last samples of the one before, so that
every sample sees the same neighbours as in a whole-run computation, evaluates the
library on those rows only, and adds them to the sub-block Grams of the run. The
sub-blocks have fixed boundaries in the run, so the Grams (and the model) do not
depend on the chunk size. Peak memory is bounded by the chunk size and the number of
terms, not by the length of the runs.

Only local derivative methods can stream (finite differences, Savitzky–Golay); the
smoothing spline and the Kalman smoother see the whole run at once.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .data import READERS, Run, _check_csv_layout, _column, file_hash, head_lines, normalize_name
from .derivatives import DERIVATIVE_METHODS, stream_half_width
from .exceptions import DataError
from .selection import BlockGrams, sub_block_sizes

#: Rows of each run used to estimate the correlation length (both in memory and streaming).
CORRELATION_ROWS = 20_000
#: Training runs keep at most this many evenly spaced samples in memory, for plots and limits.
THIN_ROWS = 2_000


@dataclass(frozen=True)
class ChunkReading:
    """How training runs are read in chunks: the ``[data]`` and ``[derivatives]`` settings,
    the resolved trim and the chunk size."""

    data: object
    derivatives: object
    trim: int
    chunk_rows: int

    @property
    def half_width(self):
        """Neighbours on each side one derivative sample depends on."""
        return stream_half_width(self.derivatives.method, dict(self.derivatives.options))


def raw_chunks(path, rename, chunk_rows):
    """DataFrames of at most ``chunk_rows`` rows, with the config's column names."""
    kind = READERS.get(path.suffix.lower())
    reverse = {normalize_name(column): name for name, column in rename.items()}
    if kind == "parquet":
        import pyarrow.parquet as pq

        try:
            handle = pq.ParquetFile(path)
        except Exception as err:
            raise DataError(f"{path}: not a readable Parquet file ({type(err).__name__}: {err}).") from None
        for batch in handle.iter_batches(batch_size=chunk_rows):
            frame = batch.to_pandas()
            frame.columns = [normalize_name(c) for c in frame.columns]
            yield frame.rename(columns=reverse)
        return
    _check_csv_layout(path, head_lines(path))
    for frame in pd.read_csv(path, chunksize=chunk_rows, skipinitialspace=True):
        frame.columns = [normalize_name(c) for c in frame.columns]
        yield frame.rename(columns=reverse)


def checked_chunks(path, *, time, states, inputs, rename, chunk_rows):
    """``(t, x, u)`` chunks with the checks of :func:`discover.data.load_run` (rows named
    by their place in the whole file); missing values are refused."""
    names = list(states) + list(inputs)
    offset, last_t = 0, None
    for frame in raw_chunks(path, rename, chunk_rows):
        t = _column(frame, time, path, offset)
        values = np.column_stack([_column(frame, n, path, offset) for n in names])
        bad = ~np.isfinite(values)
        if bad.any() or not np.isfinite(t).all():
            row = int(np.flatnonzero(bad.any(axis=1) | ~np.isfinite(t))[0])
            raise DataError(f"{path}: a NaN or infinite value at row {offset + row + 1}; with [data].chunk_rows "
                            "missing values are refused. Fill them first or load the run whole.")
        joined = t if last_t is None else np.concatenate([[last_t], t])
        steps = np.diff(joined)
        if (steps <= 0).any():
            row = int(np.flatnonzero(steps <= 0)[0]) + offset + (0 if last_t is not None else 1)
            raise DataError(f"{path}: time column {time!r} does not increase at row {row + 1}. "
                            "Time must increase strictly; remove duplicated samples or split the run.")
        yield t, values[:, : len(states)], values[:, len(states):]
        offset += len(t)
        last_t = t[-1]


@dataclass
class RunStats:
    """What a streaming pass learns about one run besides its Grams, and its thin samples.

    Every ``thin_step``-th raw sample is kept for plots and limits (collected during the
    Gram pass, so no other pass over the file is needed).
    """

    thin_step: int = 1
    thin: list = field(default_factory=list)
    n_samples: int = 0
    x_min: np.ndarray | None = None
    x_max: np.ndarray | None = None
    u_min: np.ndarray | None = None
    u_max: np.ndarray | None = None
    noise_sum: np.ndarray | None = None
    noise_sq: np.ndarray | None = None
    n_trimmed: int = 0

    def add_raw(self, t, x, u):
        rows = np.arange((-self.n_samples) % self.thin_step, len(t), self.thin_step)
        self.thin.append((t[rows], x[rows], u[rows]))
        self.n_samples += len(x)
        for name, values in (("x", x), ("u", u)):
            low, high = values.min(axis=0, initial=np.inf), values.max(axis=0, initial=-np.inf)
            old_low, old_high = getattr(self, f"{name}_min"), getattr(self, f"{name}_max")
            setattr(self, f"{name}_min", low if old_low is None else np.minimum(old_low, low))
            setattr(self, f"{name}_max", high if old_high is None else np.maximum(old_high, high))


def smoothed_chunks(path, reading, stats=None):
    """``(first_row, (t, x_smooth, x_dot, u, x_raw))`` pieces of one run, in order.

    The buffer keeps ``h`` rows before the next row to emit and the ``h`` rows after the
    last one emitted, so every emitted row is computed from the same neighbours as in
    the whole run (and the run's two ends with the same edge handling).
    """
    data = reading.data
    method, options = reading.derivatives.method, dict(reading.derivatives.options)
    h = reading.half_width
    buffer, start_row, t0, emitted = None, 0, None, 0
    chunks = checked_chunks(path, time=data.time, states=data.states, inputs=data.inputs,
                            rename=data.rename, chunk_rows=reading.chunk_rows)
    pending = next(chunks, None)
    while pending is not None:
        following = next(chunks, None)
        if stats is not None:
            stats.add_raw(*pending)
        t0 = pending[0][0] if t0 is None else t0
        buffer = pending if buffer is None else tuple(np.concatenate([b, c]) for b, c in zip(buffer, pending))
        last = following is None
        pending = following
        bt, bx, bu = buffer
        if len(bt) < 2 * h + 1 and not last:
            continue  # too few rows to differentiate yet
        try:
            xs, xd = DERIVATIVE_METHODS[method](bt - t0, bx, **options)
        except DataError as err:
            raise DataError(f"{path}: {err}") from None
        end = start_row + len(bt) - (0 if last else h)
        rows = slice(emitted - start_row, end - start_row)
        yield emitted, (bt[rows], xs[rows], xd[rows], bu[rows], bx[rows])
        emitted = end
        if not last:
            cut = end - h - start_row
            buffer = tuple(b[cut:] for b in buffer)
            start_row += cut


def trimmed_pieces(path, reading, n_samples, stats=None):
    """Pieces of the run without ``trim`` samples at each end."""
    trim = reading.trim
    for first, piece in smoothed_chunks(path, reading, stats):
        lo, hi = max(trim - first, 0), min(n_samples - trim - first, len(piece[0]))
        if hi > lo:
            yield tuple(p[lo:hi] for p in piece)


def count_rows(path, reading):
    """Rows of a run file, from one light pass over its time column."""
    if READERS.get(path.suffix.lower()) == "parquet":
        import pyarrow.parquet as pq

        try:
            return pq.ParquetFile(path).metadata.num_rows
        except Exception as err:
            raise DataError(f"{path}: not a readable Parquet file ({type(err).__name__}: {err}).") from None
    time = reading.data.time
    rename = {v: k for k, v in reading.data.rename.items()}
    column = [c for c, n in rename.items() if n == time] or [time]
    _check_csv_layout(path, head_lines(path))
    try:
        return sum(len(f) for f in pd.read_csv(path, usecols=column, chunksize=max(reading.chunk_rows, 100_000)))
    except ValueError:
        raise DataError(f"{path}: missing column {time!r} (the [data].time column).") from None


def stream_grams(paths, reading, library, sub_length, n_folds, sizes_of_runs, stats=None):
    """BlockGrams of the training runs from one streaming pass per run.

    With ``stats`` (a dict filled per run index) the pass also records each run's
    extremes, noise sums and thin samples.
    """
    k = len(library)
    grams, counts, runs, positions = [], [], [], []
    for r, (path, n_samples) in enumerate(zip(paths, sizes_of_runs)):
        thin_step = max(1, -(-n_samples // THIN_ROWS))
        run_stats = None if stats is None else stats.setdefault(r, RunStats(thin_step))
        sizes = sub_block_sizes(n_samples - 2 * reading.trim, sub_length, n_folds)
        block, filled, position = None, 0, 0
        for t, xs, xd, u, xr in trimmed_pieces(path, reading, n_samples, run_stats):
            if run_stats is not None:
                residual = xr - xs
                run_stats.noise_sum = residual.sum(axis=0) + (0 if run_stats.noise_sum is None else run_stats.noise_sum)
                run_stats.noise_sq = (residual**2).sum(axis=0) + (0 if run_stats.noise_sq is None else run_stats.noise_sq)
                run_stats.n_trimmed += len(t)
            with np.errstate(all="ignore"):
                z = library.evaluate(xs, u, append=xd)
            if not np.isfinite(z[:, :k]).all():
                row, j = np.argwhere(~np.isfinite(z[:, :k]))[0]
                raise DataError(f"{path}: the candidate term {library.names[j]!r} is not finite on this run; "
                                "a division by zero or a log/sqrt of a negative number?")
            while len(z):
                if block is None:
                    block, filled = np.empty((sizes[position], z.shape[1])), 0
                take = min(len(z), len(block) - filled)
                block[filled: filled + take] = z[:take]
                filled, z = filled + take, z[take:]
                if filled == len(block):
                    grams.append(block.T @ block)
                    counts.append(len(block))
                    runs.append(r)
                    positions.append(position)
                    block, position = None, position + 1
    return BlockGrams(np.array(grams), np.array(counts), np.array(runs), k, np.array(positions))


def prefix_derivative(path, reading, n_samples):
    """ẋ of the first CORRELATION_ROWS trimmed samples, for the correlation length."""
    out, total = [], 0
    for piece in trimmed_pieces(path, reading, n_samples):
        out.append(piece[2])
        total += len(piece[2])
        if total >= CORRELATION_ROWS:
            break
    return np.vstack(out)[:CORRELATION_ROWS]


def thin_run(path, n_samples, stats):
    """A run with at most THIN_ROWS evenly spaced raw samples (for plots and limits), from the
    samples the Gram pass kept; its extremes are exact, from the same pass."""
    t, x, u = (np.concatenate([p[i] for p in stats.thin]) for i in range(3))
    return Run(name=path.stem, t=t, x=x, u=u, source=str(path), touched=0, sha256=file_hash(path),
               n_total=n_samples, extremes=(stats.x_min, stats.x_max, stats.u_min, stats.u_max))
