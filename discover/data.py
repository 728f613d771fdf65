"""Load logged runs (CSV, Parquet), check them, and split training from held-out runs.

Every check names the file, the column and the row (1-based data row; the CSV line
is one more because of the header) and says what would be accepted.
"""

from __future__ import annotations

import csv
import difflib
import glob
import hashlib
import io
import keyword
import os
import re
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .exceptions import DataError
from .expressions import FUNCTIONS

READERS = {".csv": "csv", ".txt": "csv", ".parquet": "parquet", ".pq": "parquet"}


@dataclass(frozen=True)
class Run:
    """One logged run.

    Attributes
    ----------
    name : str
        The file's stem; held-out runs are named by it.
    t : ndarray of shape (n_samples,)
    x : ndarray of shape (n_samples, n_states)
    u : ndarray of shape (n_samples, n_inputs)
    source : str
        The file it came from.
    touched : int
        Samples dropped or interpolated by gap handling.
    sha256 : str
        SHA-256 of the file's bytes, taken from the same bytes that were parsed.
    time_note : str
        How the time column was read when it was not plain numbers (date-times).
    columns : tuple of str
        Every column name of the file (after renaming), read or not.
    """

    name: str
    t: np.ndarray
    x: np.ndarray
    u: np.ndarray
    source: str = ""
    touched: int = 0
    sha256: str = ""
    time_note: str = ""
    columns: tuple = ()
    #: For a run read in chunks: its full length and the exact extremes of x and u
    #: (t, x, u then hold only evenly spaced samples, for plots).
    n_total: int | None = None
    extremes: tuple | None = None

    @property
    def n_samples(self):
        return len(self.t) if self.n_total is None else self.n_total

    def ranges(self):
        """(x_min, x_max, u_min, u_max), exact even for a thinned run."""
        if self.extremes is not None:
            return self.extremes
        return (self.x.min(axis=0), self.x.max(axis=0), self.u.min(axis=0, initial=np.inf),
                self.u.max(axis=0, initial=-np.inf))


@dataclass(frozen=True)
class Dataset:
    """Runs that share state and input names."""

    state_names: tuple
    input_names: tuple
    runs: tuple = field(default_factory=tuple)

    @property
    def n_samples(self):
        return sum(len(run.t) for run in self.runs)


def resolve_files(patterns, base, where):
    """Expand glob patterns (relative to ``base``) into a sorted list of files."""
    files = []
    for pattern in patterns:
        full = pattern if Path(pattern).is_absolute() else os.path.normpath(Path(base) / pattern)
        matches = sorted(m for m in glob.glob(full) if not os.path.isdir(m))
        if not matches:
            folders = [m for m in glob.glob(full) if os.path.isdir(m)]
            hint = (f" It names the folder {folders[0]}; give the files in it, e.g. "
                    f"{os.path.join(pattern, '*.csv')!r}." if folders else "")
            raise DataError(f"{where}: [data].files pattern {pattern!r} matches no file (looked in {base}).{hint}")
        files.extend(m for m in matches if m not in files)
    return [Path(f) for f in files]


def normalize_name(name):
    """Column and config names in Unicode NFKC form, the form Python's parser gives identifiers."""
    return unicodedata.normalize("NFKC", str(name).strip())


def read_bytes(path):
    """The file's bytes and their SHA-256, read once, so the hash is of what is parsed."""
    try:
        content = Path(path).read_bytes()
    except FileNotFoundError:
        raise DataError(f"{path}: file not found.") from None
    except IsADirectoryError:
        raise DataError(f"{path}: is a folder, not a data file.") from None
    except OSError as err:
        raise DataError(f"{path}: cannot read the file ({err.strerror}).") from None
    return content, hashlib.sha256(content).hexdigest()


def file_hash(path):
    """SHA-256 of a file, read in pieces."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def head_lines(path, n=3):
    """The first lines of a text file (for the layout checks of a file read in chunks)."""
    try:
        with open(path, "rb") as handle:
            content = handle.read(1 << 16)
    except FileNotFoundError:
        raise DataError(f"{path}: file not found.") from None
    except OSError as err:
        raise DataError(f"{path}: cannot read the file ({err.strerror}).") from None
    return _first_lines(path, content, n)


def _first_lines(path, content, n=3):
    try:
        text = content[: 1 << 16].decode("utf-8")
    except UnicodeDecodeError as err:
        if err.start < (1 << 16) - 4:  # not just a character cut at the end of the sample
            raise DataError(f"{path}: not a UTF-8 text file; export the run as CSV (UTF-8) or Parquet.") from None
        text = content[: err.start].decode("utf-8")
    return [line.rstrip("\r") for line in text.split("\n")[:n]]


def _check_csv_layout(path, lines):
    """Catch the usual spreadsheet exports before pandas misreads them."""
    if not lines or not lines[0].strip():
        raise DataError(f"{path}: the file is empty or its first line is blank; the first line must be the header.")
    header = next(csv.reader([lines[0]]))
    if len(header) == 1:
        for sep, name in ((";", "semicolons"), ("\t", "tabs")):
            if sep in lines[0]:
                decimal = any(re.search(r"\d,\d", line) for line in lines[1:])
                hint = " and commas as decimal marks" if decimal else ""
                raise DataError(f"{path}: the columns are separated by {name}{hint}. Accepted: ',' "
                                "between columns and '.' as the decimal mark; re-export the file.")
    names = [h.strip() for h in header]
    duplicated = sorted({n for n in names if names.count(n) > 1})
    if duplicated:
        raise DataError(f"{path}: duplicate column names {duplicated}. Each column needs its own name.")
    for number, line in enumerate(lines[1:], start=2):
        fields = next(csv.reader([line])) if line else []
        if len(fields) > len(header):
            raise DataError(f"{path}: line {number} has {len(fields)} fields but the header has "
                            f"{len(header)}; are commas used as decimal marks? Accepted: '.' decimals.")


def read_table(path):
    """Read one file into a DataFrame of raw cells and the SHA-256 of its bytes.

    Refuses the common format problems.
    """
    kind = READERS.get(path.suffix.lower())
    if kind is None:
        raise DataError(f"{path}: unsupported file type {path.suffix!r}. Accepted: .csv, .txt, .parquet, .pq.")
    content, digest = read_bytes(path)
    if kind == "parquet":
        try:
            return pd.read_parquet(io.BytesIO(content)), digest
        except Exception as err:  # pyarrow raises its own types for corrupt files
            raise DataError(f"{path}: not a readable Parquet file ({type(err).__name__}: {err}).") from None
    _check_csv_layout(path, _first_lines(path, content))
    try:
        return pd.read_csv(io.BytesIO(content), skipinitialspace=True, encoding="utf-8"), digest
    except pd.errors.ParserError as err:
        raise DataError(f"{path}: cannot parse the CSV ({err}). Check that every line has as many "
                        "fields as the header and that decimals use '.'.") from None
    except (OSError, UnicodeDecodeError, ValueError) as err:
        raise DataError(f"{path}: cannot read the file ({type(err).__name__}: {err}).") from None


def check_names(names, where):
    """Names become variables of term expressions: they must be plain identifiers."""
    for name in names:
        if not name.isidentifier() or keyword.iskeyword(name) or name in FUNCTIONS:
            raise DataError(
                f"{where}: column {name!r} cannot be used in term expressions (it must be a "
                "Python identifier and not a function name). Map it to a new name in "
                f"[data].rename, e.g. rename = {{ my_name = {name!r} }}."
            )


def _column(frame, name, path, row_offset=0):
    if name not in frame.columns:
        close = difflib.get_close_matches(name, [str(c) for c in frame.columns], n=1)
        hint = f" Did you mean {close[0]!r}?" if close else ""
        raise DataError(
            f"{path}: missing column {name!r}.{hint} Columns in the file: "
            f"{', '.join(str(c) for c in frame.columns)}."
        )
    raw = frame[name]
    if isinstance(raw, pd.DataFrame):
        raise DataError(f"{path}: column {name!r} appears more than once.")
    values = pd.to_numeric(raw, errors="coerce")
    bad = values.isna() & raw.notna()
    if bad.any():
        row = int(np.flatnonzero(bad.to_numpy())[0])
        raise DataError(
            f"{path}: column {name!r} has a non-numeric value {raw.iloc[row]!r} at row {row_offset + row + 1} "
            f"(line {row_offset + row + 2} of a CSV). Accepted: numbers with '.' as the decimal mark."
        )
    return values.to_numpy(dtype=float)


def _gaps(missing):
    """Lengths of the runs of consecutive True values."""
    padded = np.concatenate([[False], missing, [False]]).astype(int)
    edges = np.diff(padded)
    return np.flatnonzero(edges == -1) - np.flatnonzero(edges == 1)


def handle_missing(path, columns, names, t, *, missing, max_gap):
    """Refuse, drop or interpolate NaN/inf samples; return the arrays and how many were touched."""
    bad = ~np.isfinite(columns)
    if not bad.any():
        return columns, t, 0
    j = int(np.flatnonzero(bad.any(axis=0))[0])
    first = int(np.flatnonzero(bad[:, j])[0])
    count = int(bad[:, j].sum())
    if missing == "refuse":
        raise DataError(
            f"{path}: column {names[j]!r} has {count} NaN or infinite values (first at row "
            f"{first + 1}). Drop or interpolate them first, or set [data].missing = "
            "'drop' or 'interpolate' to handle gaps of up to [data].max_gap samples."
        )
    rows = bad.any(axis=1)
    longest = _gaps(rows).max()
    if longest > max_gap:
        raise DataError(
            f"{path}: a gap of {longest} consecutive samples with NaN/inf is longer than "
            f"[data].max_gap = {max_gap}. Split the run at the gap or raise max_gap."
        )
    if rows[0] or rows[-1]:
        missing = "drop"  # nothing to interpolate from at the ends of a run
    if missing == "drop":
        return columns[~rows], t[~rows], int(rows.sum())
    filled = columns.copy()
    for k in range(columns.shape[1]):
        ok = ~bad[:, k]
        filled[~ok, k] = np.interp(t[~ok], t[ok], columns[ok, k])
    return filled, t, int(bad.any(axis=1).sum())


def time_column(frame, name, path):
    """The time column in seconds; date-times become seconds from the first sample.

    Returns the values and a note for the summary ("" for plain numbers).
    """
    if name in frame.columns and not isinstance(frame[name], pd.DataFrame):
        raw = frame[name]
        if pd.api.types.is_datetime64_any_dtype(raw) or isinstance(raw.dtype, pd.DatetimeTZDtype):
            if raw.isna().any():
                row = int(np.flatnonzero(raw.isna().to_numpy())[0])
                raise DataError(f"{path}: time column {name!r} has a missing date-time at row {row + 1}.")
            seconds = (raw - raw.iloc[0]).dt.total_seconds().to_numpy(dtype=float)
            return seconds, (f"time column {name!r} holds date-times; read as seconds from the first "
                             f"sample ({raw.iloc[0]})")
        if pd.api.types.is_timedelta64_dtype(raw):
            return raw.dt.total_seconds().to_numpy(dtype=float), f"time column {name!r} holds durations; read as seconds"
    return _column(frame, name, path), ""


def load_run(path, *, time, states, inputs, rename, missing, max_gap):
    """Read and check one run."""
    frame, digest = read_table(path)
    frame.columns = [normalize_name(c) for c in frame.columns]
    duplicated = sorted({c for c in frame.columns if list(frame.columns).count(c) > 1})
    if duplicated:  # Parquet; CSV headers are checked before pandas renames duplicates
        raise DataError(f"{path}: duplicate column names {duplicated}. Each column needs its own name.")
    if len(frame) == 0:
        raise DataError(f"{path}: the file has a header but no data rows.")
    reverse = {normalize_name(column): name for name, column in rename.items()}
    frame = frame.rename(columns=reverse)
    t, time_note = time_column(frame, time, path)
    names = list(states) + list(inputs)
    columns = np.column_stack([_column(frame, name, path) for name in names]) if names else np.empty((len(t), 0))
    if not np.isfinite(t).all():
        row = int(np.flatnonzero(~np.isfinite(t))[0])
        raise DataError(f"{path}: time column {time!r} has a missing or infinite value at row {row + 1}.")
    columns, t, touched = handle_missing(path, columns, names, t, missing=missing, max_gap=max_gap)
    steps = np.diff(t)
    if (steps <= 0).any():
        row = int(np.flatnonzero(steps <= 0)[0]) + 1
        what = "repeats" if steps[row - 1] == 0 else "goes backwards"
        raise DataError(
            f"{path}: time column {time!r} {what} at row {row + 1} ({float(t[row - 1])!r} then {float(t[row])!r}). "
            "Time must increase strictly; remove duplicated samples or split the run."
        )
    n_states = len(states)
    return Run(
        name=path.stem,
        t=t,
        x=np.ascontiguousarray(columns[:, :n_states]),
        u=np.ascontiguousarray(columns[:, n_states:]),
        source=str(path),
        touched=touched,
        sha256=digest,
        time_note=time_note,
        columns=tuple(str(c) for c in frame.columns),
    )


def split_held_out(runs, held_out, held_out_count, seed, where):
    """Split runs into training and held-out by name, or by a seeded draw."""
    names = [run.name for run in runs]
    if held_out:
        unknown = [name for name in held_out if name not in names]
        if unknown:
            raise DataError(
                f"{where}: [data].held_out names {unknown}, which are not among the runs: "
                f"{', '.join(names)}."
            )
        chosen = set(held_out)
    else:
        count = min(held_out_count, len(runs) - 1)
        rng = np.random.default_rng(seed)
        chosen = {names[i] for i in rng.choice(len(runs), size=count, replace=False)} if count > 0 else set()
    train = tuple(run for run in runs if run.name not in chosen)
    test = tuple(run for run in runs if run.name in chosen)
    if not train:
        raise DataError(f"{where}: every run is held out; at least one run must remain for fitting.")
    return train, test


def load_dataset(settings, *, lazy_training=False):
    """Load the runs the settings name; return ``(training, held_out)`` Datasets.

    With ``lazy_training`` the training runs are only named (their ``source`` is set,
    their arrays are empty): discover.stream reads them chunk by chunk.
    """
    data, where = settings.data, settings.source
    states, inputs = tuple(data.states), tuple(data.inputs)
    check_names((data.time,) + states + inputs, where)
    paths = resolve_files(data.files, settings.base, where)
    names = [path.stem for path in paths]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise DataError(f"{where}: several files share the run name(s) {repeated}; rename the files.")
    empty = np.empty((0, 0))
    placeholders = [Run(path.stem, np.empty(0), empty, empty, str(path)) for path in paths]
    train, test = split_held_out(placeholders, data.held_out, data.held_out_count, settings.seed, where)

    def load(run):
        return load_run(Path(run.source), time=data.time, states=states, inputs=inputs,
                        rename=data.rename, missing=data.missing, max_gap=data.max_gap)

    train = train if lazy_training else tuple(load(run) for run in train)
    return Dataset(states, inputs, train), Dataset(states, inputs, tuple(load(run) for run in test))


# --------------------------------------------------------------------------- checks of the loaded runs

SHORT_RUN = 50  # fewer usable samples than this in a run earns a warning


def frozen(low, high):
    """True where a channel does not move, relative to its own magnitude (not its units)."""
    return (high - low) <= 1e-12 * np.maximum(np.abs(low), np.abs(high))


def check_excitation(training, where):
    """A state or input that never moves in any training run cannot be identified."""
    ranges = [run.ranges() for run in training.runs]
    for kind, names, low, high in (("state", training.state_names, 0, 1), ("input", training.input_names, 2, 3)):
        for j, name in enumerate(names):
            if all(frozen(r[low][j], r[high][j]) for r in ranges):
                raise DataError(
                    f"{where}: {kind} {name!r} never moves in any training run (constant "
                    f"{float(ranges[0][low][j])!r}); its effect cannot be identified. Remove it from "
                    f"[data].{kind}s or add runs that excite it."
                )


def data_warnings(training, held_out):
    """Channels frozen in a run, short runs, gap handling and date-time clocks, one line each."""
    notes = []
    for run in list(training.runs) + list(held_out.runs):
        x_min, x_max, u_min, u_max = run.ranges()
        for kind, names, low, high in (("state", training.state_names, x_min, x_max),
                                       ("input", training.input_names, u_min, u_max)):
            for j in np.flatnonzero(frozen(low, high)):
                notes.append(f"{run.source}: {kind} {names[j]!r} never moves in this run (constant "
                             f"{float(low[j])!r}); its effect cannot be identified from it.")
        if run.time_note:
            notes.append(f"{run.source}: {run.time_note}.")
        if run.n_samples < SHORT_RUN:
            notes.append(f"{run.source}: only {run.n_samples} samples; estimates from it are fragile.")
        if run.touched:
            notes.append(f"{run.source}: {run.touched} samples were dropped or interpolated by gap handling.")
    return notes
