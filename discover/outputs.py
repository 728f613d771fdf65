"""The output folder: who owns it, how it is replaced, and what goes into it.

A run's results are written into a staging folder beside the target and renamed
into place at the end, so a failed or interrupted run never leaves half a result.
Every folder discover writes carries a marker file (:data:`MARKER`, format
:data:`MARKER_FORMAT`); ``--force`` replaces only such a folder. Refused, with one
line and nothing touched: a regular file, a folder without the marker, the working
directory or any folder above it, and any folder that holds an input (data file or
config). One lock per target (``fcntl.flock`` on a hidden file beside it) keeps two
runs from replacing each other; the kernel drops it when a process dies, so a
killed run never leaves a stale lock. Staging folders of killed runs are
recognised by their marker and removed by the next run to the same target; a
previous result left aside by an interrupted swap is put back.
"""

from __future__ import annotations

import fcntl
import json
import os
import secrets
import shutil
import signal
from pathlib import Path

import pandas as pd

from .config import to_toml
from .exceptions import OutputError
from .model import Model
from .provenance import provenance

MARKER = ".discover-output"
MARKER_FORMAT = "discover-output/1"
_STAGING = ".incomplete-"
_ASIDE = ".old-"


def default_output_dir(output_dir, config_source, config_base):
    """``[output].dir`` (relative to the config's folder), else ``out/<config name>``."""
    if output_dir is not None:
        return Path(os.path.normpath(Path(config_base) / output_dir))
    stem = Path(config_source).stem if config_source != "config" else "run"
    return Path("out") / stem


def is_discover_output(folder):
    """True if ``folder`` is a directory that carries discover's marker."""
    marker = Path(folder) / MARKER
    try:
        return json.loads(marker.read_text()).get("format") == MARKER_FORMAT
    except (OSError, ValueError, AttributeError):
        return False


def _inside(path, folder):
    try:
        path.relative_to(folder)
        return True
    except ValueError:
        return False


def _absolute(path):
    # normpath, not resolve(): a symbolic link at the target itself must stay visible.
    return Path(os.path.normpath(Path.cwd() / Path(path)))


def check_target(target, *, force, inputs=()):
    """Refuse a target discover must not write or replace; return its absolute path.

    Parameters
    ----------
    target : path-like
        The output folder asked for.
    force : bool
        Replace an earlier discover output folder at ``target``.
    inputs : iterable of path-like
        Files the run reads (data files, the config); no folder holding one is replaced.

    Raises
    ------
    OutputError
        One line saying why; nothing has been touched.
    """
    path = _absolute(target)
    shown = Path(target)
    cwd = Path.cwd().resolve()
    real = path.resolve()
    if real == cwd or _inside(cwd, real):
        raise OutputError(f"{shown}: is the working directory or a folder above it; discover never "
                          "replaces it. Choose a new folder with --out, e.g. --out out/run1.")
    if path.is_symlink():
        raise OutputError(f"{shown}: is a symbolic link; give the folder itself with --out.")
    if path.exists():
        if not path.is_dir():
            raise OutputError(f"{shown}: exists and is not a folder; discover does not replace files. "
                              "Choose another path with --out.")
        if not is_discover_output(path):
            raise OutputError(f"{shown}: exists and was not written by discover (it has no {MARKER} "
                              "marker), so it is never replaced, not even with --force. Choose another "
                              "folder with --out, or move it away yourself.")
        if not force:
            raise OutputError(f"{shown}: the output folder exists already. Pass --force to replace it, "
                              "or choose another folder with --out.")
        for item in inputs:
            item = Path(item).resolve()
            if _inside(item, real):
                raise OutputError(f"{shown}: holds an input of this run ({item}); discover never "
                                  "replaces a folder with its own inputs. Choose another folder with --out.")
        foreign = foreign_entries(path)
        if foreign:
            listed = ", ".join(foreign[:3]) + (f" and {len(foreign) - 3} more" if len(foreign) > 3 else "")
            raise OutputError(f"{shown}: holds {listed}, which discover did not write, so it is not replaced, "
                              "not even with --force. Move them out, or choose another folder with --out.")
    _check_parent(path, shown)
    return path


def foreign_entries(folder):
    """Entries under an earlier output that its marker does not list (files a user added, mount
    points, anything else); links are not followed. Empty means discover wrote all of it."""
    folder = Path(folder)
    try:
        listed = set(json.loads((folder / MARKER).read_text()).get("files", []))
    except (OSError, ValueError, AttributeError):
        listed = set()
    found = []
    for root, dirs, files in os.walk(folder):
        here = Path(root)
        for name in sorted(dirs):
            if os.path.ismount(here / name) or (here / name).is_symlink():
                found.append(str((here / name).relative_to(folder)))
        dirs[:] = [d for d in sorted(dirs) if not os.path.ismount(here / d) and not (here / d).is_symlink()]
        for name in sorted(files):
            relative = str((here / name).relative_to(folder))
            if relative != MARKER and relative not in listed:
                found.append(relative)
    return found


def _check_parent(path, shown):
    """The nearest existing folder above the target must be a writable folder."""
    ancestor = path.parent
    while not ancestor.exists():
        ancestor = ancestor.parent
    if not ancestor.is_dir():
        raise OutputError(f"{shown}: cannot be created because {ancestor} is a file, not a folder.")
    if not os.access(ancestor, os.W_OK | os.X_OK):
        raise OutputError(f"{shown}: cannot be created: {ancestor} is not writable.")


class OutputClaim:
    """The right to write one output folder: checks done, parent made, lock held.

    Use as a context manager around the computation, then :meth:`publish`. The lock
    is released on exit. :attr:`state` tells an interrupted caller where things are.
    """

    def __init__(self, target, *, force, inputs=()):
        self.path = check_target(target, force=force, inputs=inputs)
        self.shown = Path(target)
        self.force = force
        self.inputs = tuple(inputs)
        self.state = "nothing written"
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as err:
            raise OutputError(f"{self.shown}: cannot create its parent folder ({err.strerror}).") from None
        self._lock = self._acquire()
        self._recover()

    # ------------------------------------------------------------------ lock

    @property
    def _lock_path(self):
        return self.path.parent / f".{self.path.name}.discover-lock"

    def _acquire(self):
        while True:
            try:
                fd = os.open(self._lock_path, os.O_CREAT | os.O_RDWR, 0o644)
            except OSError as err:
                raise OutputError(f"{self.shown}: cannot write in {self.path.parent} "
                                  f"({err.strerror}).") from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                os.close(fd)
                raise OutputError(f"{self.shown}: another discover run is writing this folder now; "
                                  "wait for it or choose another folder with --out.") from None
            # The lock file may have been removed by a run that released it meanwhile.
            try:
                same = os.stat(self._lock_path).st_ino == os.fstat(fd).st_ino
            except FileNotFoundError:
                same = False
            if same:
                return fd
            os.close(fd)

    def release(self):
        if self._lock is not None:
            try:
                os.unlink(self._lock_path)
            except OSError:
                pass
            os.close(self._lock)
            self._lock = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.release()
        return False

    # ------------------------------------------------------------------ leftovers

    def _siblings(self, kind):
        prefix = f".{self.path.name}{kind}"
        return sorted(p for p in self.path.parent.glob(f"{glob_escape(prefix)}*")
                      if p.is_dir() and not p.is_symlink() and is_discover_output(p))

    def _recover(self):
        """Put back a previous result an interrupted swap left aside; remove dead staging folders."""
        aside = self._siblings(_ASIDE)
        if aside and not self.path.exists():
            os.rename(aside[-1], self.path)
            aside = aside[:-1]
        for folder in self._siblings(_STAGING) + aside:
            _remove(folder)

    # ------------------------------------------------------------------ publish

    def publish(self, write_files):
        """Write through ``write_files(folder)`` into a staging folder, then swap it in.

        Returns the target path. On any failure the previous result stays at the
        target; if even putting it back fails, the error says where it is.
        """
        staging = self.path.parent / f".{self.path.name}{_STAGING}{secrets.token_hex(4)}"
        try:
            staging.mkdir()
            write_marker(staging)
            write_files(staging)
            write_marker(staging, listing=True)  # now with the files written, for a later --force
        except OSError as err:
            _remove(staging)
            where = f" ({err.filename})" if err.filename else ""
            raise OutputError(f"{self.shown}: could not write the results ({err.strerror or err}){where}; "
                              "nothing was replaced.") from None
        except BaseException:
            _remove(staging)
            raise
        return self._swap(staging)

    def _swap(self, staging):
        if self.path.exists() or self.path.is_symlink():
            # Checked again: the folder may have appeared or changed while the run computed.
            try:
                check_target(self.shown, force=self.force, inputs=self.inputs)
            except OutputError:
                _remove(staging)
                raise
            aside = self.path.parent / f".{self.path.name}{_ASIDE}{secrets.token_hex(4)}"
        else:
            aside = None
        if aside is not None and _exchange(staging, self.path):
            # One atomic step: the new result is in place and the previous one sits in the staging
            # folder, so no moment leaves the target empty, not even for kill -9.
            self.state = "new result in place"
            _remove(staging)
            return self.path
        blocked = _block_signals()
        try:
            if aside is not None:
                try:
                    os.rename(self.path, aside)
                except OSError as err:
                    _remove(staging)
                    raise OutputError(f"{self.shown}: could not move the previous result aside "
                                      f"({err.strerror}); it is as it was and nothing was replaced.") from None
                self.state = f"previous result moved aside to {aside}"
            try:
                os.rename(staging, self.path)
            except BaseException as err:
                self._undo(staging, aside, err)
            self.state = "new result in place"
        finally:
            _unblock_signals(blocked)
        if aside is not None:
            _remove(aside)  # a leftover is removed by the next run
        return self.path

    def _undo(self, staging, aside, err):
        _remove(staging)
        if aside is not None:
            try:
                os.rename(aside, self.path)
            except OSError:
                self.state = f"previous result at {aside}"
                raise OutputError(f"{self.shown}: could not move the new result into place and could "
                                  f"not put the previous one back; it is intact at {aside}. Rename it "
                                  "back yourself.") from None
        self.state = "nothing written"
        if isinstance(err, OSError):
            raise OutputError(f"{self.shown}: could not move the new result into place ({err.strerror}); "
                              "the previous result, if any, is as it was.") from None
        raise err


def _exchange(first, second):
    """Swap two folders atomically (Linux renameat2 with RENAME_EXCHANGE); False where unavailable."""
    try:
        import ctypes
        import ctypes.util

        libc = ctypes.CDLL(ctypes.util.find_library("c") or None, use_errno=True)
        renameat2 = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd, rename_exchange = -100, 2
    done = renameat2(at_fdcwd, os.fsencode(first), at_fdcwd, os.fsencode(second), rename_exchange)
    return done == 0


def _remove(folder):
    """Remove a folder of ours; a failure only leaves a hidden folder the next run removes."""
    try:
        shutil.rmtree(folder, ignore_errors=True)
    except OSError:
        pass


def _block_signals():
    """Hold SIGINT and SIGTERM during the two renames, so the swap is never cut in half."""
    try:
        return signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
    except (AttributeError, ValueError, OSError):  # pragma: no cover - not on this platform
        return None


def _unblock_signals(previous):
    if previous is not None:
        signal.pthread_sigmask(signal.SIG_SETMASK, previous)


def glob_escape(text):
    """``text`` with glob metacharacters quoted."""
    return "".join(f"[{c}]" if c in "*?[]" else c for c in text)


def write_marker(folder, *, listing=False):
    """The marker; with ``listing``, also every file discover wrote there (relative paths)."""
    folder = Path(folder)
    record = {"format": MARKER_FORMAT}
    if listing:
        record["files"] = sorted(str(p.relative_to(folder)) for p in folder.rglob("*")
                                 if p.is_file() and p.name != MARKER)
    (folder / MARKER).write_text(json.dumps(record, indent=1) + "\n")


# --------------------------------------------------------------------------- the files

def coefficient_table(model):
    rows = []
    for state, kept in model.equations():
        for expr, coefficient, stats in kept:
            rows.append({"state": state, "term": expr, "coefficient": coefficient, **stats})
    return pd.DataFrame(rows, columns=["state", "term", "coefficient"] + sorted(model.term_stats))


def candidates_document(result):
    """Every ranked candidate as a model document, so ``discover rank`` can rescore cheaply."""
    models = []
    for c in result.candidates:
        m = Model(result.model.state_names, result.model.input_names, c.terms, c.coef)
        models.append({"name": c.name, "source": c.source, "also": list(c.also), **m.to_dict()})
    return {"format": "discover-candidates/1", "candidates": models}


def input_files(settings, runs=()):
    """The files a run reads: its config file (if any) and its data files."""
    files = [Path(r.source) for r in runs]
    if settings.source != "config":
        files.append(Path(settings.source))
    return files


def target_of(result, out_dir=None):
    settings = result.settings
    if out_dir is not None:
        return Path(out_dir)
    return default_output_dir(settings.output.dir, settings.source, settings.base)


def write_outputs(result, out_dir=None, *, force=False):
    """Write the output folder of a :class:`~discover.pipeline.Result` atomically.

    An existing folder is replaced only with ``force`` and only if discover wrote it
    (see the module docstring); returns the folder's path.
    """
    runs = list(result.training.runs) + list(result.held_out.runs)
    with OutputClaim(target_of(result, out_dir), force=force, inputs=input_files(result.settings, runs)) as claim:
        return claim.publish(lambda folder: write_files(result, folder))


def write_files(result, folder):
    """Every file of the output folder, into ``folder``."""
    from . import report

    if getattr(result, "spec", None) is not None:  # a run with hidden states (discover.hidden_pipeline)
        from .hidden_pipeline import write_hidden_files

        return write_hidden_files(result, folder)

    folder = Path(folder)
    model = result.model
    model.save(folder / "model.json")
    coefficient_table(model).to_csv(folder / "coefficients.csv", index=False)
    result.validation_table().to_csv(folder / "heldout_metrics.csv", index=False)
    if result.cv is not None:
        report.cv_table(result.cv, model.state_names).to_csv(folder / "cv_curve.csv", index=False)
    if result.ensemble is not None:
        result.inclusion_table().to_csv(folder / "inclusion_probabilities.csv", index=False)
    if result.ranking is not None:
        result.ranking.table.to_csv(folder / "ranking.csv", index=False)
        (folder / "candidates.json").write_text(json.dumps(candidates_document(result), indent=1) + "\n")
    stems = report.file_stems([item.run for item in result.validation])
    for item, stem in zip(result.validation, stems):
        if item.band is not None:
            report.band_table(item, model.state_names).to_csv(folder / f"band_{stem}.csv", index=False)
    (folder / "config_effective.toml").write_text(to_toml(result.settings, absolute_paths=True))
    (folder / "provenance.json").write_text(json.dumps(provenance(result), indent=2) + "\n")
    (folder / "warnings.txt").write_text("".join(f"{w}\n" for w in result.warnings))
    (folder / "summary.txt").write_text(report.summary(result) + "\n")
    if result.settings.output.figures:
        report.write_figures(result, folder)
    if result.settings.output.report:
        from . import html_report

        html_report.write_report(result, folder)
