"""Issue 10: never hang, never crash on real data, never a traceback, never a silent wrong result.

One regression test per case the issue lists; each asserts the message and that
nothing was lost. Expected behaviours are the project's own rules (DESIGN.md);
float64 range limits are IEEE 754 (common practice).
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import discover
from discover import simulate as sim_module
from discover.cli import main
from discover.exceptions import ConfigError, ExpressionError, ModelFileError
from discover.expressions import parse_expression
from discover.model import from_dict, load_model
from test_faults import small_config

ROOT = Path(__file__).resolve().parents[1]


def decay_run(folder, name, *, x0=1.0, u=None, scale=1.0, n=201):
    t = np.linspace(0, 10, n)
    u = np.sin(t) if u is None else u
    # dx/dt = -x + u, integrated exactly enough on this grid by scipy.
    from scipy.integrate import solve_ivp

    sol = solve_ivp(lambda s, x: -x + np.interp(s, t, u), (0, 10), [x0], t_eval=t, rtol=1e-10, atol=1e-12)
    frame = pd.DataFrame({"t": t, "x": scale * sol.y[0], "u": u})
    frame.to_csv(folder / f"{name}.csv", index=False)
    return frame


def model_document(coefficient=1.0, expr="x", extra=None):
    doc = {"format": "discover-model/1", "states": ["x"], "inputs": ["u"],
           "equations": [{"state": "x", "terms": [{"expr": expr, "coefficient": coefficient}]}]}
    doc.update(extra or {})
    return doc


# --------------------------------------------------------------------------- hangs


@pytest.mark.parametrize("coefficient, expr", [(1e308, "x"), (1.0, "x/0"), (-1.0, "x/0")])
def test_simulate_returns_within_seconds_on_a_non_finite_right_hand_side(tmp_path, coefficient, expr):
    decay_run(tmp_path, "run")
    path = tmp_path / "model.json"
    path.write_text(json.dumps(model_document(coefficient, expr)))
    start = time.monotonic()
    proc = subprocess.run([sys.executable, "-m", "discover", "simulate", str(path), str(tmp_path / "run.csv")],
                          capture_output=True, text=True, timeout=60)
    assert time.monotonic() - start < 60
    assert proc.returncode == 0 and "Traceback" not in proc.stderr
    assert "diverged" in proc.stdout and ("not finite" in proc.stdout or "bounded region" in proc.stdout)


def test_infinite_coefficient_is_refused_at_load(tmp_path):
    path = tmp_path / "model.json"
    path.write_text(json.dumps(model_document(float("inf"))))  # json writes Infinity
    with pytest.raises(ModelFileError, match="not a finite number"):
        load_model(path)


def test_simulation_time_limit_stops_a_slow_solve():
    # A stiff system with an explicit method and a slow right-hand side (1 ms an evaluation):
    # the wall-clock limit stops it long before the evaluation budget would.
    def slow(x, u):
        time.sleep(0.001)
        return -1e6 * (x - np.cos(1e3 * np.atleast_1d(x)))

    t = np.linspace(0, 1000, 50)
    result = sim_module.simulate(slow, t, np.array([1.0]), np.empty((50, 0)), method="RK45", rtol=1e-10,
                                 atol=1e-12, time_limit=0.5)
    assert result.diverged and "time limit of 0.5 s" in result.message


# --------------------------------------------------------------------------- crash on real data


def test_a_solver_that_stops_without_a_sample_is_a_failed_member_not_an_exception(monkeypatch):
    from scipy.integrate._ivp.ivp import OdeResult

    def failing(fun, span, y0, **kwargs):
        return OdeResult(t=np.array([]), y=[], status=-1, message="step size too small", t_events=None,
                         y_events=None, success=False)

    monkeypatch.setattr(sim_module, "solve_ivp", failing)
    t = np.linspace(0, 1, 20)
    x, stopped_at, message = sim_module.simulate_batch(lambda X, u, m: -X, t, np.ones((3, 2)), np.empty((20, 0)))
    assert np.isnan(x[:, 1:]).all() and np.isfinite(stopped_at).all() and "step size too small" in message


def test_unstable_model_reports_when_it_left_not_the_end_of_the_run():
    t = np.linspace(0, 600, 601)
    result = sim_module.simulate(lambda x, u: 0.5 * x, t, np.array([1.0]), np.empty((601, 0)),
                                 limits=(np.array([0.0]), np.array([100.0])))
    assert result.diverged
    at = float(result.message.split("t=")[1].split(" ")[0])
    assert abs(at - np.log(100) / 0.5) < 1.0  # e^{0.5 t} = 100 at t = 9.2, not 600


# --------------------------------------------------------------------------- memory


def test_memory_estimate_refuses_before_allocation(tmp_path):
    decay_run(tmp_path, "a")
    config = small_config(tmp_path)
    config["terms"] = {"degree": 3}
    config["bootstrap"] = {"members": 100000}
    config["compute"] = {"memory_limit": 0.01}
    with pytest.raises(ConfigError, match=r"would need about .* GiB .*\[compute\]\.memory_limit"):
        discover.run(config)


def test_large_ensembles_are_simulated_in_batches():
    from discover import bootstrap
    from discover.resources import MAX_BATCH_STATES, ensemble_batches

    batches = ensemble_batches(2500, 2)
    assert sum(len(b) for b in batches) == 2500 and max(len(b) for b in batches) * 2 <= MAX_BATCH_STATES
    expressions = [parse_expression("x", ["x", "u"])]
    coef = -np.linspace(0.5, 1.5, 1200).reshape(1200, 1, 1)
    t = np.linspace(0, 1, 11)
    x, diverged = bootstrap.simulate_ensemble(expressions, ["x"], ["u"], coef, t, [1.0], np.zeros((11, 1)),
                                              interpolation="linear", method="LSODA", rtol=1e-8, atol=1e-10,
                                              limits=None)
    np.testing.assert_allclose(x[:, -1, 0], np.exp(coef[:, 0, 0]), rtol=1e-5)  # exact solution e^{-a t}
    assert not diverged.any()


# --------------------------------------------------------------------------- one-line errors


@pytest.mark.parametrize("text, why", [
    ("1" + "0" * 309, "beyond the floating-point range"),
    ("x*1e400", "beyond the floating-point range"),
    ("-" * 3000 + "x", "characters long"),
    ("-" * 100 + "x", "nested more than"),
    ("+".join(["x"] * 100000), "characters long"),
    ("+".join(["x"] * 100), "nested more than"),
])
def test_hostile_expressions_give_one_located_error(text, why):
    with pytest.raises(ExpressionError, match=why):
        parse_expression(text, ["x", "u"], where="cfg.toml: [terms].custom[0]")


@pytest.mark.parametrize("terms, why", [
    (5, "must be a list"),
    (["x"], "must be an object"),
    ([{"expr": "x", "coefficient": True}], "not a boolean"),
    ([{"expr": "x", "coefficient": float("nan")}], "not a boolean, NaN or infinity"),
    ([{"expr": "x", "coefficient": 10**400}], "finite number"),
])
def test_malformed_model_files_are_refused(terms, why):
    doc = model_document()
    doc["equations"][0]["terms"] = terms
    with pytest.raises(ModelFileError, match=why):
        from_dict(doc, where="model.json")


def test_deeply_nested_model_json_is_refused(tmp_path):
    path = tmp_path / "model.json"
    path.write_text("[" * 100000 + "]" * 100000)
    with pytest.raises(ModelFileError, match="nested too deeply|cannot read"):
        load_model(path)


def test_nan_coefficient_cannot_reach_linearize(tmp_path, capsys):
    path = tmp_path / "model.json"
    path.write_text(json.dumps(model_document(float("nan"))))
    assert main(["export", str(path), "--to", "linearize", "--x-op=0", "--u-op=0"]) == 5
    err = capsys.readouterr().err
    assert "finite number" in err and len(err.strip().splitlines()) == 1


def test_config_that_is_not_utf8(tmp_path):
    path = tmp_path / "c.toml"
    path.write_bytes(b'[data]\nfiles = ["caf\xe9.csv"]\nstates = ["x"]\n')
    with pytest.raises(ConfigError, match="not a UTF-8 text file"):
        discover.run(path)


def test_output_under_a_regular_file_is_refused_before_computing(tmp_path, capsys):
    decay_run(tmp_path, "a")
    config = tmp_path / "c.toml"
    config.write_text(f'[data]\nfiles = ["{tmp_path}/*.csv"]\nstates = ["x"]\ninputs = ["u"]\n')
    (tmp_path / "notes.txt").write_text("mine")
    start = time.monotonic()
    assert main(["run", str(config), "--out", str(tmp_path / "notes.txt" / "out")]) == 6
    assert time.monotonic() - start < 5  # refused before the computation, not after it
    assert "is a file, not a folder" in capsys.readouterr().err
    assert (tmp_path / "notes.txt").read_text() == "mine"


def test_run_name_with_math_text_draws_its_figures(tmp_path):
    decay_run(tmp_path, "a")
    decay_run(tmp_path, "cost_$_{$x", x0=2.0)
    config = small_config(tmp_path, held_out=["cost_$_{$x"])
    config["output"] = {"figures": True, "report": True}
    out = discover.write_outputs(discover.run(config), tmp_path / "out")
    assert (out / "heldout_cost_____x.png").exists() and (out / "report.html").exists()


def test_rank_save_in_a_missing_folder(tmp_path, capsys):
    assert main(["rank", str(tmp_path), str(tmp_path / "h.toml"), "--save", str(tmp_path / "nope" / "x.csv")]) == 6
    assert "does not exist" in capsys.readouterr().err


# --------------------------------------------------------------------------- silent wrong results


def _ranked_run(tmp_path):
    decay_run(tmp_path, "a")
    decay_run(tmp_path, "b", x0=2.0, u=np.cos(np.linspace(0, 10, 201)))
    config = small_config(tmp_path, held_out=["b"])
    config["ranking"] = {"enabled": True, "sr3": False}
    out = discover.write_outputs(discover.run(config), tmp_path / "out")
    hypotheses = tmp_path / "more.toml"
    hypotheses.write_text('[[ranking.hypotheses]]\nname = "input only"\nx = ["u"]\n')
    return out, hypotheses


def test_rank_refuses_data_that_changed_since_the_run(tmp_path, capsys):
    out, hypotheses = _ranked_run(tmp_path)
    assert main(["rank", str(out), str(hypotheses)]) == 0
    frame = pd.read_csv(tmp_path / "b.csv")
    frame["x"] *= 3
    frame.to_csv(tmp_path / "b.csv", index=False)
    capsys.readouterr()
    assert main(["rank", str(out), str(hypotheses)]) == 3
    assert "changed since" in capsys.readouterr().err
    assert main(["rank", str(out), str(hypotheses), "--allow-changed-data"]) == 0


def test_datetime_time_column_becomes_seconds_with_a_note(tmp_path):
    t = pd.date_range("2026-01-01 08:00", periods=201, freq="50ms")
    u = np.sin(np.linspace(0, 10, 201))
    frame = decay_run(tmp_path, "tmp", u=u)
    (tmp_path / "tmp.csv").unlink()
    pd.DataFrame({"t": t, "x": frame["x"], "u": u}).to_parquet(tmp_path / "a.parquet")
    config = small_config(tmp_path)
    config["data"]["files"] = [str(tmp_path / "*.parquet")]
    result = discover.run(config)
    run = result.training.runs[0]
    assert run.t[0] == 0.0 and abs(run.t[-1] - 10.0) < 1e-9
    assert any("holds date-times; read as seconds" in w for w in result.warnings)


def test_state_frozen_in_one_training_run_is_warned(tmp_path):
    decay_run(tmp_path, "a")
    t = np.linspace(0, 10, 201)
    pd.DataFrame({"t": t, "x": np.full(201, 0.5), "u": np.sin(t)}).to_csv(tmp_path / "frozen.csv", index=False)
    result = discover.run(small_config(tmp_path))
    assert any("frozen.csv: state 'x' never moves in this run" in w for w in result.warnings)


def test_held_out_runs_with_clashing_file_names_get_their_own_files(tmp_path):
    decay_run(tmp_path, "a")
    decay_run(tmp_path, "run 1", x0=2.0)
    decay_run(tmp_path, "run_1", x0=3.0)
    config = small_config(tmp_path, held_out=["run 1", "run_1"])
    config["output"] = {"figures": True, "report": False}
    config["bootstrap"] = {"members": 5}
    out = discover.write_outputs(discover.run(config), tmp_path / "out")
    assert {p.name for p in out.glob("heldout_*.png")} == {"heldout_run_1.png", "heldout_run_1-2.png"}
    assert {p.name for p in out.glob("band_*.csv")} == {"band_run_1.csv", "band_run_1-2.csv"}


def test_compatibility_characters_in_column_names(tmp_path):
    # U+2126 OHM SIGN normalises (NFKC) to U+03A9 GREEK CAPITAL OMEGA, as Python's parser does.
    frame = decay_run(tmp_path, "a")
    frame.rename(columns={"x": "\u2126"}).to_csv(tmp_path / "a.csv", index=False)
    config = small_config(tmp_path, states=["\u2126"])
    config["terms"] = {"custom": ["\u2126**2"]}
    result = discover.run(config)
    assert result.model.state_names == ("\u03a9",)


def test_excitation_check_does_not_depend_on_units(tmp_path):
    decay_run(tmp_path, "a", scale=1e-14)
    result = discover.run(small_config(tmp_path))  # a state of order 1e-14 still moves
    assert result.model.coef.any()


def test_effective_config_runs_again_as_it_is(tmp_path):
    decay_run(tmp_path, "a")
    decay_run(tmp_path, "b", x0=2.0)
    config = small_config(tmp_path, held_out=["b"])
    config["data"]["files"] = ["*.csv"]  # relative to the config's folder
    config["ranking"] = {"enabled": True, "sr3": False,
                         "hypotheses": [{"name": "two\nlines \"quoted\"", "x": ["x", "u"]}]}
    path = tmp_path / "c.toml"
    from discover.config import to_toml, validate

    path.write_text(to_toml(validate(config)))
    first = discover.write_outputs(discover.run(path), tmp_path / "out1")
    again = discover.write_outputs(discover.run(first / "config_effective.toml"), tmp_path / "out2")
    assert (first / "model.json").read_text() == (again / "model.json").read_text()


def test_rank_save_never_overwrites_a_file_that_is_not_a_ranking_table(tmp_path, capsys):
    out, hypotheses = _ranked_run(tmp_path)
    data_file = tmp_path / "b.csv"
    before = data_file.read_bytes()
    assert main(["rank", str(out), str(hypotheses), "--save", str(data_file)]) == 6
    assert "is not a ranking table discover wrote" in capsys.readouterr().err
    assert data_file.read_bytes() == before
    tables = tmp_path / "tables"
    tables.mkdir()
    assert main(["rank", str(out), str(hypotheses), "--save", str(tables / "r.csv")]) == 0
    assert main(["rank", str(out), str(hypotheses), "--save", str(tables / "r.csv")]) == 0  # its own table


def test_rank_refuses_when_a_data_file_of_the_run_is_gone(tmp_path):
    from discover.data import Run
    from discover.rerank import check_same_data

    record = {"data_files": [{"path": str(tmp_path / "a.csv"), "sha256": "1"},
                             {"path": str(tmp_path / "b.csv"), "sha256": "2"}]}
    now = [Run("b", np.empty(0), np.empty((0, 1)), np.empty((0, 1)), source=str(tmp_path / "b.csv"), sha256="2")]
    with pytest.raises(discover.DataError, match="a.csv: was a data file of .* not among the runs now"):
        check_same_data(record, now, tmp_path / "out")


@pytest.mark.parametrize("change, why", [
    (lambda d: d["equations"].append({"state": "x", "terms": [{"expr": "u", "coefficient": 5.0}]}),
     "second equation for 'x'"),
    (lambda d: d["equations"][0]["terms"].append({"expr": "x", "coefficient": 2.0}), "appears twice"),
    (lambda d: d.update(equations=[]), "no equation for the state"),
    (lambda d: d.update(states=["x", "x"]), "distinct names"),
])
def test_inconsistent_model_files_are_refused(change, why):
    doc = model_document()
    change(doc)
    with pytest.raises(ModelFileError, match=why):
        from_dict(doc, where="model.json")


def test_time_column_cannot_be_a_state(tmp_path):
    decay_run(tmp_path, "a")
    with pytest.raises(ConfigError, match=r"\[data\].time = 't' is also named"):
        discover.run(small_config(tmp_path, states=["t", "x"]))


def test_compatibility_characters_in_term_variables_and_a_byte_order_mark(tmp_path):
    frame = decay_run(tmp_path, "a")
    frame.rename(columns={"x": "\u2126"}).to_csv(tmp_path / "a.csv", index=False)
    config = tmp_path / "c.toml"
    text = (f'[data]\nfiles = ["{tmp_path}/*.csv"]\nstates = ["\u2126"]\ninputs = ["u"]\nheld_out_count = 0\n'
            '[terms]\nvariables = ["\u2126", "u"]\n[bootstrap]\nmembers = 0\n[ranking]\nenabled = false\n')
    config.write_bytes(b"\xef\xbb\xbf" + text.encode("utf-8"))  # a UTF-8 byte-order mark, as some editors write
    assert discover.run(config).model.state_names == ("\u03a9",)


def test_rank_on_a_path_that_is_no_output_folder_says_so(tmp_path, capsys):
    # A mistyped output folder (or the config given instead of it): one line naming the path
    # and what is expected, not advice to create a folder (found in a new-user trial).
    extra = tmp_path / "more.toml"
    extra.write_text('[[ranking.hypotheses]]\nname = "h"\nx = ["x"]\n')
    for wrong, what in ((tmp_path / "out_typo", "does not exist"), (extra, "is a file")):
        assert main(["rank", str(wrong), str(extra)]) != 0
        message = capsys.readouterr().err.strip()
        assert message.count("\n") == 0 and f"{wrong}: {what}" in message
        assert "earlier discover run" in message
    assert not (tmp_path / "out_typo").exists()
