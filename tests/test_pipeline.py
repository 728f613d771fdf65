"""End-to-end identification of published and textbook systems through discover.run."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import discover
from discover.terms import term_key
from systems import (
    C_FARAD,
    L_HENRY,
    LORENZ_INPUT_TRUTH,
    R_OHM,
    coefficient_map,
    lorenz_runs,
    rlc_runs,
    truth_map,
    write_runs,
)

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "data_demo"
CONFIGS = ROOT / "configs"


def lorenz_config(pattern, **selection):
    return {
        "seed": 0,
        "data": {"files": [pattern], "states": ["x", "y", "z"], "inputs": ["u"], "held_out": ["run_2"]},
        "derivatives": {"method": "savitzky_golay", "window": 9, "order": 4},
        "terms": {"degree": 2, "input_degree": 1},
        "selection": {"cv_folds": 4, **selection},
        "output": {"figures": False},
    }


@pytest.fixture(scope="module")
def lorenz_result(tmp_path_factory):
    folder = tmp_path_factory.mktemp("lorenz")
    pattern = write_runs(folder, lorenz_runs(noise=1e-4, n_runs=3))
    return discover.run(lorenz_config(pattern))


def test_lorenz_with_input_recovers_terms_and_coefficients(lorenz_result):
    # Lorenz (1963), sigma=10, rho=28, beta=8/3, plus an input u on dx/dt; low noise.
    found = coefficient_map(lorenz_result.model)
    truth = truth_map(LORENZ_INPUT_TRUTH)
    for state in truth:
        assert set(found[state]) == set(truth[state]), state
        for key, value in truth[state].items():
            assert found[state][key] == pytest.approx(value, rel=0.01), (state, key)


def test_lorenz_held_out_run_is_predicted(lorenz_result):
    # A chaotic system diverges from any model eventually; over the first second the
    # recovered model must track the held-out run closely.
    item = lorenz_result.validation[0]
    first_second = item.t < item.t[0] + 1.0
    error = item.simulation.x[first_second] - item.x[first_second]
    assert np.max(np.abs(error)) < 0.5


def test_rlc_components_backed_out_of_linear_model(tmp_path):
    # Series RLC: A = [[0, 1/C], [-1/L, -R/L]], B = [0, 1/L]^T (Kirchhoff's voltage law;
    # common practice). R, L and C from the identified coefficients within 1 % on clean data.
    pattern = write_runs(tmp_path, rlc_runs())
    result = discover.run({
        "data": {"files": [pattern], "states": ["v", "i"], "inputs": ["vin"], "held_out": ["run_1"]},
        "derivatives": {"method": "savitzky_golay", "window": 7, "order": 3},
        "terms": {"degree": 1},
        "selection": {"cv_folds": 4},
        "output": {"figures": False},
    })
    found = coefficient_map(result.model)
    assert set(found["v"]) == {term_key("i")}
    assert set(found["i"]) == {term_key("v"), term_key("i"), term_key("vin")}
    c_est = 1.0 / found["v"][term_key("i")]
    l_est = 1.0 / found["i"][term_key("vin")]
    r_est = -found["i"][term_key("i")] * l_est
    assert c_est == pytest.approx(C_FARAD, rel=0.01)
    assert l_est == pytest.approx(L_HENRY, rel=0.01)
    assert r_est == pytest.approx(R_OHM, rel=0.01)
    assert -found["i"][term_key("v")] * l_est == pytest.approx(1.0, rel=0.01)


def test_rescaling_a_state_column_leaves_the_term_set_unchanged(tmp_path):
    # Unit invariance (DESIGN.md): yaw rate in millidegrees per second instead of degrees.
    frames = [pd.read_csv(p) for p in sorted((DEMO / "ship").glob("*.csv"))]
    names = [p.stem for p in sorted((DEMO / "ship").glob("*.csv"))]
    supports = []
    for factor in (1.0, 1000.0):
        folder = tmp_path / f"scale_{factor:g}"
        folder.mkdir()
        for name, frame in zip(names, frames):
            scaled = frame.copy()
            scaled["yaw_rate"] *= factor
            scaled.to_csv(folder / f"{name}.csv", index=False)
        raw = {"seed": 1, "data": {"files": [str(folder / "*.csv")], "states": ["heading", "yaw_rate"],
                                   "inputs": ["rudder"], "held_out": ["heldout_sine"]},
               "derivatives": {"method": "savitzky_golay", "window": 15, "order": 3},
               "terms": {"degree": 3, "variables": ["yaw_rate", "rudder"], "input_degree": 1},
               "selection": {"cv_folds": 4}, "output": {"figures": False}}
        model = discover.run(raw).model
        supports.append({s: {term_key(e) for e, _, _ in kept} for s, kept in model.equations()})
    assert supports[0] == supports[1]
