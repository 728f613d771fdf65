"""``discover rank``: score extra hypotheses against an earlier run's ranking, no refit of the rest."""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import pandas as pd

from . import ranking
from .candidates import hypothesis_candidate, score_unseen
from .compute import Executor
from .config import load_config, tomllib, with_hypotheses
from .data import file_hash, load_dataset
from .exceptions import ConfigError, DataError, OutputError
from .grams import ChunkedBackend, fold_labels, make_plan
from .model import load_model
from .pipeline import resolve_simulation
from .smoothing import resolve_trim, smooth_runs
from .weak_grams import training_backend


def read_hypotheses(path):
    """The ``[[ranking.hypotheses]]`` entries of a TOML file, and nothing else."""
    try:
        extra = tomllib.loads(path.read_bytes().decode("utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"{path}: file not found.") from None
    except (OSError, UnicodeDecodeError) as err:
        raise ConfigError(f"{path}: cannot read it as UTF-8 text ({err}).") from None
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(f"{path}: not valid TOML: {err}.") from None
    unknown = sorted(set(extra) - {"ranking"}) or sorted(set(extra.get("ranking", {})) - {"hypotheses"})
    if unknown or not extra.get("ranking", {}).get("hypotheses"):
        raise ConfigError(f"{path}: expected only [[ranking.hypotheses]] entries"
                          + (f"; found {unknown}." if unknown else "; found none."))
    return extra["ranking"]["hypotheses"]


def check_same_data(record, runs, out_dir):
    """Refuse data files whose bytes differ from those the earlier run read."""
    recorded = {str(Path(f["path"]).resolve()): f.get("sha256") for f in record.get("data_files", [])}
    present = {str(Path(run.source).resolve()) for run in runs}
    gone = sorted(set(recorded) - present)
    if gone:
        raise DataError(f"{gone[0]}: was a data file of {out_dir} (see its provenance.json) but is not among the "
                        "runs now; the new scores would not be comparable. Put it back, or pass "
                        "--allow-changed-data to score anyway.")
    for run in runs:
        path = str(Path(run.source).resolve())
        if path not in recorded:
            raise DataError(f"{run.source}: was not among the data files of {out_dir} (see its provenance.json); "
                            "the new scores would not be comparable. Pass --allow-changed-data to score anyway.")
        if recorded[path] != (run.sha256 or file_hash(run.source)):  # runs read in chunks: hashed here
            raise DataError(f"{run.source}: changed since {out_dir} was written (SHA-256 differs from its "
                            "provenance.json), so new scores would not be comparable with the table. Run "
                            "'discover run' again, or pass --allow-changed-data to score anyway.")


def rank_more(out_dir, hypotheses_path, *, criterion=None, allow_changed_data=False):
    """Score extra hypotheses against an earlier run's ranking without refitting the rest.

    Reads ``config_effective.toml``, ``provenance.json``, ``model.json`` and
    ``ranking.csv`` from ``out_dir``; checks that the data files are the ones that run
    read (SHA-256), fits and scores only the new hypotheses on the same training and
    held-out runs, and returns the combined, re-ordered table and its criterion.
    """
    out_dir, hypotheses_path = Path(out_dir), Path(hypotheses_path)
    needed = ["config_effective.toml", "provenance.json", "model.json", "ranking.csv"]
    missing = [name for name in needed if not (out_dir / name).is_file()]
    if missing:
        raise OutputError(f"{out_dir}: not a discover output folder with a ranking (missing {', '.join(missing)}).")
    try:
        record = json.loads((out_dir / "provenance.json").read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as err:
        raise OutputError(f"{out_dir}: cannot read the earlier run's provenance ({err}).") from None
    earlier = load_config(out_dir / "config_effective.toml")
    # Older folders wrote data paths relative to the original config's folder.
    earlier = replace(earlier, base=record.get("config_base", earlier.base))
    settings = with_hypotheses(earlier, read_hypotheses(hypotheses_path), str(hypotheses_path))
    criterion = criterion or settings.ranking.criterion
    old = pd.read_csv(out_dir / "ranking.csv", keep_default_na=False, na_values=[""])
    names = {f"hypothesis {h['name']!r}" for h in settings.ranking.hypotheses}
    clash = sorted(names & set(old["candidate"]))
    if clash:
        raise ConfigError(f"{hypotheses_path}: {clash} are already in {out_dir / 'ranking.csv'}; rename them.")
    chunked = bool(settings.data.chunk_rows)
    training, held_out = load_dataset(settings, lazy_training=chunked)
    if not allow_changed_data:
        check_same_data(record, list(training.runs) + list(held_out.runs), out_dir)
    model = load_model(out_dir / "model.json")
    if chunked:  # as the run read them: chunk by chunk, never whole
        backend, smoothed = ChunkedBackend(settings, training, resolve_trim(settings.derivatives)), None
    else:
        smoothed = smooth_runs(training, settings.derivatives)
        backend = training_backend(settings, smoothed, Executor())  # the run's [selection].target
    plan = make_plan(backend, settings.selection.cv_folds, settings.bootstrap.block_length)
    candidates = [hypothesis_candidate(settings, h, model, backend, plan) for h in settings.ranking.hypotheses]
    training = backend.thin_training(training)
    folds = fold_labels(candidates[0].blocks, settings.selection.cv_folds, settings.selection.cv_split)
    # Scored as the run scored: the same folds, held-out runs and horizon.
    horizon = model.info.get("choice", {}).get("horizon", settings.ranking.horizon)
    scores, _ = score_unseen(candidates, model, settings, training=training, smoothed=smoothed, held_out=held_out,
                             held_smoothed=smooth_runs(held_out, settings.derivatives),
                             simulation=resolve_simulation(settings, training), folds=folds, horizon=horizon)
    new = ranking.score_table(candidates, scores, criterion)
    combined = pd.concat([old, new], ignore_index=True)
    combined["also"] = combined["also"].fillna("")
    return ranking.order_table(combined, criterion), criterion
