"""States nobody measured, through the whole pipeline (discover.run with a [hidden] config).

Series RLC circuit with only the capacitor voltage logged and the source voltage as input:
dv_C/dt = i / C, di/dt = (-v_C - R i + u) / L (Kirchhoff's voltage law; common practice).
From v_C alone the data determine 1/(LC) and R/L, not L and C apart (the current's scale);
fixing C makes the rest identifiable. Truth trajectories: ``scipy.integrate.solve_ivp``
(DOP853, rtol 1e-10) on the continuous system with its continuous input (reference
library); the pipeline sees 1 % noise on the voltage samples only.
"""

import json
from functools import lru_cache
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy.integrate import solve_ivp

import discover
from discover.exceptions import ConfigError
from discover.export import export_text
from discover.hidden_report import summary

# Component values as in tests/test_refine.py (ours).
R_OHM, L_HENRY, C_FARAD = 5.0, 0.1, 1e-3
W2 = 1.0 / (L_HENRY * C_FARAD)  # 1/(LC), rad²/s²
STARTS = {"run_0": (0.0, 0.0), "run_1": (2.0, -0.1), "run_2": (-1.0, 0.05)}


def source(t):
    return 10.0 * np.sin(40.0 * t) + 6.0 * np.sin(170.0 * t + 1.0) + 3.0


def rlc(t, state):
    v, i = state
    return [i / C_FARAD, (-v - R_OHM * i + source(t)) / L_HENRY]


@lru_cache(maxsize=None)
def truth(name, n_samples=500):
    t = np.arange(n_samples) * 1e-3
    sol = solve_ivp(rlc, (t[0], t[-1]), STARTS[name], t_eval=t, method="DOP853", rtol=1e-10, atol=1e-12)
    return t, sol.y.T  # solve_ivp is (n_states, n_points); rows = time here


@pytest.fixture(scope="module")
def rlc_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("rlc")
    rng = np.random.default_rng(0)
    for name in STARTS:
        t, x = truth(name)
        v = x[:, 0] + 0.01 * x[:, 0].std() * rng.standard_normal(len(t))  # 1 % noise on v_C only
        pd.DataFrame({"t": t, "v_C": v, "u": source(t)}).to_csv(folder / f"{name}.csv", index=False)
    return folder


def rlc_config(folder, **hidden):
    return {"data": {"files": [str(folder / "*.csv")], "states": ["v_C"], "inputs": ["u"], "held_out": ["run_2"]},
            "derivatives": {"window": 11},
            "hidden": {"states": ["i"], "equations": {"v_C": ["i"], "i": ["v_C", "i", "u"]}, **hidden},
            "output": {"figures": False, "report": False}}


def coefficients(model):
    return {s: {t: v for t, v, _ in kept} for s, kept in model.equations()}


@pytest.fixture(scope="module")
def unfixed(rlc_folder):
    return discover.run(rlc_config(rlc_folder, estimate=False))


def test_rlc_identifiable_combinations_within_one_percent(unfixed):
    # 1 % tolerance at 1 % noise: ours (the requirement).
    c = coefficients(unfixed.model)
    assert_allclose(-c["v_C"]["i"] * c["i"]["v_C"], W2, rtol=0.01)  # 1/(LC)
    assert_allclose(c["v_C"]["i"] * c["i"]["u"], W2, rtol=0.01)  # 1/(LC) again, through the input
    assert_allclose(-c["i"]["i"], R_OHM / L_HENRY, rtol=0.01)  # R/L


def test_rlc_reports_l_and_c_apart_not_identifiable(unfixed, tmp_path):
    record = unfixed.model.info["identifiability"]
    assert len(record["not_identifiable"]) == 1
    for name in ("d(v_C)/dt:i", "d(i)/dt:v_C", "d(i)/dt:u"):
        assert name in record["not_identifiable"][0] and name in record["arbitrary"]
    assert "d(i)/dt:i" not in record["arbitrary"]  # R/L is determined
    assert any("'i'" in note and "[hidden].known" in note for note in record["scale"])
    text = summary(unfixed)
    assert "Not identifiable" in text and "arbitrary" in text and "[hidden].known" in text
    # The model file says so too, and its standard errors are empty where undetermined.
    folder = discover.write_outputs(unfixed, tmp_path / "out")
    document = json.loads((Path(folder) / "model.json").read_text())
    assert document["hidden"] == ["i"] and document["outputs"] == [{"name": "v_C", "expr": "v_C"}]
    assert document["identifiability"]["arbitrary"] == record["arbitrary"]
    terms = {t["expr"]: t for e in document["equations"] if e["state"] == "i" for t in e["terms"]}
    assert terms["v_C"]["standard_error"] is None and terms["i"]["standard_error"] > 0


@pytest.fixture(scope="module")
def fixed(rlc_folder):
    # C known (a capacitor's rated value): the fixed term 1/C sets the current's scale.
    return discover.run(rlc_config(rlc_folder, known={"v_C": {"i": 1.0 / C_FARAD}}))


def test_fixing_c_makes_l_and_r_identifiable(fixed):
    c = coefficients(fixed.model)
    assert c["v_C"]["i"] == 1.0 / C_FARAD
    inductance = 1.0 / c["i"]["u"]
    assert_allclose(inductance, L_HENRY, rtol=0.01)
    assert_allclose(-c["i"]["i"] * inductance, R_OHM, rtol=0.01)
    assert_allclose(-c["i"]["v_C"], 1.0 / L_HENRY, rtol=0.01)
    record = fixed.model.info["identifiability"]
    assert record["not_identifiable"] == [] and record["arbitrary"] == []
    assert any("scale set by the fixed coefficient d(v_C)/dt:i" in note for note in record["scale"])


def test_hidden_current_estimated_on_every_run(fixed):
    # The smoothed current against solve_ivp's, training and held-out runs alike.
    roles = {item.run: item.role for item in fixed.estimates.runs}
    assert roles == {"run_0": "training", "run_1": "training", "run_2": "held_out"}
    for item in fixed.estimates.runs:
        current = truth(item.run)[1][:, 1]
        error = item.estimate.smoothed[:, 1] - current
        assert np.sqrt(np.mean(error ** 2)) < 0.02 * current.std(), item.run  # our tolerance
        inside = np.mean(np.abs(error) <= 2 * item.estimate.smoothed_std[:, 1])
        assert inside > 0.8, (item.run, inside)  # the ±2σ band is not overconfident
    held = [item for item in fixed.estimates.runs if item.role == "held_out"][0]
    assert held.metrics["fit_percent"][0] > 95.0


def test_loaded_model_estimates_like_the_run(fixed, tmp_path):
    fixed.model.save(tmp_path / "model.json")
    loaded = discover.load_model(tmp_path / "model.json")
    assert loaded.hidden_states == ("i",) and list(loaded.output_expressions) == ["v_C"]
    held = [item for item in fixed.estimates.runs if item.role == "held_out"][0]
    # Noise levels, start and prior spread from the model file's estimation record.
    again = loaded.estimate_states(held.t, held.y, held.u)
    current = truth(held.run)[1][:, 1]
    assert np.sqrt(np.mean((again.smoothed[:, 1] - current) ** 2)) < 0.02 * current.std()


def test_linear_export_carries_c_and_d(fixed):
    # Kirchhoff: A = [[0, 1/C], [-1/L, -R/L]], B = [0, 1/L]; y = v_C: C = [1, 0], D = [0].
    document = json.loads(export_text(fixed.model, "linear"))
    assert document["outputs"] == ["v_C"]
    assert_allclose(document["C"], [[1.0, 0.0]])
    assert_allclose(document["D"], [[0.0]])
    assert_allclose(document["A"], [[0.0, 1.0 / C_FARAD], [-1.0 / L_HENRY, -R_OHM / L_HENRY]], rtol=0.01)
    assert_allclose(document["B"], [[0.0], [1.0 / L_HENRY]], rtol=0.01)
    space = json.loads(export_text(fixed.model, "control"))
    assert_allclose(space["C"], [[1.0, 0.0]]) and space["outputs"] == ["v_C"]


def test_feed_through_output_gives_d(rlc_folder, tmp_path):
    # A sensor reading v_C + 0.5 u (feed-through of the source): D = [0.5]. From the same runs.
    for path in rlc_folder.glob("*.csv"):
        frame = pd.read_csv(path)
        frame["sensor"] = frame["v_C"] + 0.5 * frame["u"]
        frame[["t", "sensor", "u"]].to_csv(tmp_path / path.name, index=False)
    config = rlc_config(tmp_path, known={"v_C": {"i": 1.0 / C_FARAD}}, outputs={"sensor": "v_C + 0.5*u"},
                        estimate=False)
    config["data"]["states"] = []
    config["hidden"]["states"] = ["v_C", "i"]
    result = discover.run(config)
    document = json.loads(export_text(result.model, "linear"))
    assert_allclose(document["C"], [[1.0, 0.0]]) and assert_allclose(document["D"], [[0.5]])
    assert_allclose(-coefficients(result.model)["i"]["i"], R_OHM / L_HENRY, rtol=0.01)


def test_library_equation_made_sparse_by_output_error(rlc_folder):
    # di/dt from the degree-2 library over v_C, i, u; the current in units of dv_C/dt (unit_coupling).
    config = rlc_config(rlc_folder, scale="unit_coupling", estimate=False)
    config["hidden"]["equations"] = {"v_C": ["i"]}
    config["terms"] = {"degree": 2}
    result = discover.run(config)
    c = coefficients(result.model)
    assert set(c["i"]) == {"v_C", "i", "u"}
    assert_allclose(c["i"]["v_C"], -W2, rtol=0.01)
    assert_allclose(c["i"]["u"], W2, rtol=0.01)
    assert_allclose(c["i"]["i"], -R_OHM / L_HENRY, rtol=0.01)
    assert result.model.info["identifiability"]["arbitrary"] == []
    assert "1 in d(i)/dt" in result.model.info["output_error"]["dropped_by_threshold"]


def test_more_hidden_states_than_the_data_support(rlc_folder):
    config = rlc_config(rlc_folder, estimate=False)
    config["hidden"] = {"states": ["i", "q1", "q2", "q3"], "equations": {"v_C": ["i", "q1", "q2", "q3"]}}
    config["terms"] = {"degree": 3}
    with pytest.raises(ConfigError) as info:
        discover.run(config)
    text = str(info.value)
    assert "\n" not in text and "[hidden].states" in text and "per unknown" in text


def test_simulate_command_refuses_a_model_with_hidden_states(fixed, rlc_folder, tmp_path):
    from discover.exceptions import ModelFileError
    from discover.replay import replay_file

    fixed.model.save(tmp_path / "model.json")
    with pytest.raises(ModelFileError, match="hidden states \\(i\\)") as info:
        replay_file(tmp_path / "model.json", rlc_folder / "run_2.csv")
    assert "\n" not in str(info.value) and "estimate_states" in str(info.value)


def test_column_named_like_a_hidden_state_is_reported_not_silently_dropped(rlc_folder, tmp_path):
    # A logged current column beside a config that declares i hidden: the column is not read,
    # and the warnings say so with the file (common practice: never drop a user's data silently).
    for path in rlc_folder.glob("*.csv"):
        frame = pd.read_csv(path)
        frame["i"] = truth(path.stem)[1][:, 1]
        frame.to_csv(tmp_path / path.name, index=False)
    result = discover.run(rlc_config(tmp_path, known={"v_C": {"i": 1.0 / C_FARAD}}, estimate=False))
    notes = [w for w in result.warnings if "'i'" in w and "not used" in w]
    assert len(notes) == 1 and "run_0.csv" in notes[0] and "[data].states" in notes[0]
