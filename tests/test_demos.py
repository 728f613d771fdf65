"""Both bundled demos, end to end: true terms recovered, held-out run predicted, outputs written.

The truths are the coefficients the demo generators simulate (data_demo/make_*.py);
the held-out runs use input signals the fit never saw.
"""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import discover
from data_demo.make_bioreactor import TRUE_COEFFICIENTS as BIOREACTOR_TRUTH
from data_demo.make_ship import TRUE_COEFFICIENTS as SHIP_TRUTH
from discover.cli import main
from discover.terms import term_key
from systems import coefficient_map, truth_map

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module", params=[("ship", SHIP_TRUTH), ("bioreactor", BIOREACTOR_TRUTH)],
                ids=["ship", "bioreactor"])
def demo(request):
    name, truth = request.param
    return discover.run(ROOT / "configs" / f"{name}.toml"), truth


def test_true_term_set_and_coefficients(demo):
    result, truth = demo
    found, expected = coefficient_map(result.model), truth_map(truth)
    for state in expected:
        assert set(found[state]) == set(expected[state]), state
        for key, value in expected[state].items():
            # 1.5 % measurement noise: coefficients within 5 % (our tolerance).
            assert found[state][key] == pytest.approx(value, rel=0.05), (state, key)


def test_held_out_fit_above_90_percent(demo):
    result, _ = demo
    assert result.validation, "the demo config holds a run out"
    for item in result.validation:
        assert not item.simulation.diverged
        assert np.all(item.metrics["fit_percent"] > 90.0), item.metrics["fit_percent"]


def test_bioreactor_products_have_high_inclusion_probability():
    # The light·nitrate·biomass growth product and the dilution·biomass washout of the
    # demo's true model (data_demo/make_bioreactor.py) are kept by >= 90 % of the members.
    result = discover.run(ROOT / "configs" / "bioreactor.toml")
    p = result.ensemble.summary.inclusion_probability
    keys = [term_key(t) for t in result.library_terms]
    biomass = result.model.state_names.index("biomass")
    assert p[keys.index(term_key("light*nitrate*biomass")), biomass] >= 0.9
    assert p[keys.index(term_key("dilution*biomass")), biomass] >= 0.9


def test_cli_writes_output_folder_and_refuses_to_overwrite(tmp_path, capsys):
    out = tmp_path / "ship"
    assert main(["run", str(ROOT / "configs" / "ship.toml"), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "d(yaw_rate)/dt = " in printed and "fit heading" in printed and "Caution" in printed
    expected = {"model.json", "coefficients.csv", "heldout_metrics.csv", "cv_curve.csv", "cv_curve.png",
                "heldout_heldout_sine.png", "config_effective.toml", "provenance.json", "summary.txt",
                "inclusion_probabilities.csv", "inclusion_map.png", "coefficient_distributions.png",
                "band_heldout_sine.csv"}
    assert expected <= {p.name for p in out.iterdir()}
    first = (out / "model.json").read_bytes()
    document = json.loads(first)
    assert document["format"] == "discover-model/1"
    assert document["states"] == ["heading", "yaw_rate"] and document["inputs"] == ["rudder"]
    for equation in document["equations"]:
        for term in equation["terms"]:
            assert 0.5 <= term["inclusion_probability"] <= 1.0
            assert term["coefficient_low"] <= term["coefficient_high"]  # the member spread
            assert term["interval_low"] < term["coefficient"] < term["interval_high"]  # confidence interval

    # Without --force an existing folder is kept as it is (exit status 6, one line).
    assert main(["run", str(ROOT / "configs" / "ship.toml"), "--out", str(out)]) == 6
    assert "exists already" in capsys.readouterr().err
    assert (out / "model.json").read_bytes() == first

    # The same config and data give the same model file, byte for byte.
    assert main(["run", str(ROOT / "configs" / "ship.toml"), "--out", str(out), "--force"]) == 0
    assert (out / "model.json").read_bytes() == first
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")], "no staging folder left"


def test_printed_recommendation_is_the_model_written(demo, tmp_path):
    # One answer: the summary's "Recommended" candidate is the model (less any term the
    # Wald test dropped after refinement, which the model file lists).
    from discover.report import summary

    result, _ = demo
    name = result.ranking.table.iloc[0]["candidate"]
    assert f"Recommended: {name!r}" in summary(result)
    assert result.model.info["choice"]["candidate"] == name
    candidate = {c.name: c for c in result.candidates}[name]
    dropped = {tuple(reversed(d.split(" in d")[:2])) for d in result.model.info["refinement"]["dropped_by_wald_test"]}
    dropped = {(state.removesuffix("/dt"), term_key(term)) for state, term in dropped}
    written = {(s, term_key(t)) for s, kept in result.model.equations() for t, _, _ in kept}
    assert written == set(candidate.structure(result.model.state_names)) - dropped


def test_saved_model_reproduces_the_in_memory_model(demo, tmp_path):
    result, _ = demo
    result.model.save(tmp_path / "model.json")
    loaded = discover.load_model(tmp_path / "model.json")
    rng = np.random.default_rng(0)
    x = rng.normal(size=(50, len(loaded.state_names)))
    u = rng.normal(size=(50, len(loaded.input_names)))
    # Coefficients round-trip exactly through JSON; only the summation order may differ.
    np.testing.assert_allclose(loaded.rhs(x, u), result.model.rhs(x, u), rtol=1e-13, atol=1e-15)


def test_cli_error_is_one_line_with_status(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[data]\nfiles = ["nothing/*.csv"]\nstates = ["x"]\n')
    proc = subprocess.run([sys.executable, "-m", "discover", "run", str(bad)], capture_output=True, text=True)
    assert proc.returncode == 3
    assert proc.stderr.count("\n") == 1 and "matches no file" in proc.stderr
    assert "Traceback" not in proc.stderr


# --------------------------------------------------------------------------- two tanks, upper level hidden


@pytest.fixture(scope="module")
def tanks(tmp_path_factory):
    # Through the README command, into a folder of its own (figures and report as the demo writes them).
    out = tmp_path_factory.mktemp("tanks") / "out"
    assert main(["run", str(ROOT / "configs" / "tanks.toml"), "--out", str(out), "--force"]) == 0
    return out, discover.load_model(out / "model.json")


def test_tanks_hidden_upper_level_within_5_percent(tanks):
    # Truth: the generator's noise-free trajectories (data_demo/make_tanks.py, solve_ivp DOP853).
    import pandas as pd

    from data_demo.make_tanks import RUNS, true_levels

    out, _ = tanks
    for name in RUNS:
        t, _, levels, _ = true_levels(name)
        estimate = pd.read_csv(out / f"estimate_{name}.csv")
        np.testing.assert_allclose(estimate["time"], t)
        error = estimate["level_upper"].to_numpy() - levels[:, 0]
        assert np.sqrt(np.mean(error ** 2)) < 0.05 * np.sqrt(np.mean(levels[:, 0] ** 2)), name
        assert (estimate["level_upper_low"] <= estimate["level_upper"]).all()
        assert (estimate["level_upper"] <= estimate["level_upper_high"]).all()


def test_tanks_equations_and_files(tanks):
    from data_demo.make_tanks import TRUE_COEFFICIENTS as TANKS_TRUTH

    out, model = tanks
    assert model.hidden_states == ("level_upper",)
    found = coefficient_map(model)
    for state, expected in truth_map(TANKS_TRUTH).items():
        assert set(found[state]) == set(expected), state
        for key, value in expected.items():
            assert found[state][key] == pytest.approx(value, rel=0.02), (state, key)  # 1.5 % noise: our tolerance
    assert model.info["identifiability"]["arbitrary"] == []
    assert {"estimate_heldout.png", "report.html", "heldout_metrics.csv"} <= {p.name for p in out.iterdir()}
    assert "Hidden-state estimation" in (out / "report.html").read_text(encoding="utf-8")
    with open(out / "heldout_metrics.csv") as handle:
        header, row = handle.readline().strip().split(","), handle.readline().strip().split(",")
    metrics = dict(zip(header, row))
    assert metrics["output"] == "level_lower" and float(metrics["nrmse_fit_percent"]) > 90.0
