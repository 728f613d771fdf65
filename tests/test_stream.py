"""Training runs read in chunks: the model does not depend on the chunk size."""

from pathlib import Path

import numpy as np
import pytest

import discover
from discover import stream
from discover.config import load_config
from discover.data import load_dataset
from discover.derivatives import METHODS
from discover.smoothing import resolve_trim, smooth_runs
from discover.window_choice import resolve_window

ROOT = Path(__file__).resolve().parents[1]


def ship(chunk_rows=None, **derivatives):
    import tomllib
    raw = tomllib.loads((ROOT / "configs" / "ship.toml").read_text())
    raw["data"]["files"] = [str(ROOT / "configs" / f) for f in raw["data"]["files"]]
    raw["data"]["chunk_rows"] = chunk_rows
    if derivatives:
        raw["derivatives"] = derivatives
    raw["bootstrap"] = {"members": 20, "bands": False}
    raw["ranking"]["sr3"] = False
    raw["output"] = {"figures": False, "report": False}
    return raw


STREAMING = [(name, options) for name, record in METHODS.items() if record.stream_half_width is not None
             for options in ({}, {"order": 4} if name == "finite_difference" else {"window": 21, "order": 2})]


@pytest.mark.parametrize("method, options", STREAMING)
@pytest.mark.parametrize("chunk_rows", [100, 333])
def test_streamed_derivatives_equal_whole_run_derivatives(chunk_rows, method, options):
    # Every method whose record says it streams: reference is the same method on the whole
    # run in memory (scipy savgol_filter, numpy gradient).
    settings = load_config(ship(None, method=method, **options))
    training, _ = load_dataset(settings)
    # A window left to the data is resolved before any smoothing, as the pipeline does.
    derivatives, _ = resolve_window(settings.derivatives, lambda: [run.x for run in training.runs])
    trim = resolve_trim(derivatives)
    reading = stream.ChunkReading(settings.data, derivatives, trim, chunk_rows)
    for run, whole in zip(training.runs, smooth_runs(training, derivatives).trimmed):
        pieces = list(stream.trimmed_pieces(Path(run.source), reading, len(run.t)))
        for streamed, expected in zip((np.concatenate([p[i] for p in pieces]) for i in range(5)),
                                      (whole.t, whole.x, whole.x_dot, whole.u, whole.x_raw)):
            np.testing.assert_array_equal(streamed, expected)


def test_thin_samples_come_from_the_gram_pass(monkeypatch):
    monkeypatch.setattr(stream, "THIN_ROWS", 100)
    result = discover.run(ship(100))
    whole, _ = load_dataset(load_config(ship(None)))
    for run, full in zip(result.training.runs, whole.runs):
        step = -(-len(full.t) // 100)
        np.testing.assert_array_equal(run.t, full.t[::step])
        np.testing.assert_array_equal(run.x, full.x[::step])
        assert run.n_total == len(full.t) and run.sha256 == full.sha256


def test_two_chunk_sizes_give_identical_models_and_match_the_whole_run():
    small, large = (discover.run(ship(n)) for n in (100, 333))
    assert small.model.to_dict() == large.model.to_dict()
    # Chunked mode skips the output-error refinement (it needs whole runs, with a note), so the
    # whole run is compared with refinement off: the derivative fit must agree to rounding.
    assert any("refinement was skipped" in note for note in small.warnings)
    whole_config = ship(None)
    whole_config["refine"] = {"enabled": False}
    whole = discover.run(whole_config)
    np.testing.assert_array_equal(small.model.support, whole.model.support)
    np.testing.assert_allclose(small.model.coef, whole.model.coef, rtol=1e-10, atol=1e-15)


def test_chunked_mode_refuses_what_needs_whole_runs():
    with pytest.raises(discover.ConfigError, match=r"with \[data\].chunk_rows set, \[derivatives].method must be one of"):
        discover.run(ship(1000, method="smoothing_spline"))


def test_rank_on_a_chunked_run_reads_the_training_runs_in_chunks(tmp_path, monkeypatch, capsys):
    # discover rank on an output of a chunked run: no training run is loaded whole.
    from discover import data
    from discover.cli import main

    raw = ship(100)
    config = tmp_path / "chunked.toml"
    from discover.schema import to_toml
    from discover.config import validate

    config.write_text(to_toml(validate(raw, str(config), tmp_path)))
    out = tmp_path / "out"
    assert main(["run", str(config), "--out", str(out)]) == 0
    extra = tmp_path / "more.toml"
    extra.write_text('[[ranking.hypotheses]]\nname = "rudder only"\nyaw_rate = ["rudder"]\n')
    loaded = []
    real = data.load_run
    monkeypatch.setattr(data, "load_run", lambda path, **kw: loaded.append(path.stem) or real(path, **kw))
    capsys.readouterr()
    assert main(["rank", str(out), str(extra)]) == 0
    assert loaded == ["heldout_sine"]  # only the held-out run is loaded whole
