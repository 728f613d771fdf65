"""Ranking candidate structures (Mangan, Kutz, Brunton & Proctor 2017, Proc. R. Soc. A 473)."""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import discover
from discover import ranking
from discover.cli import main
from discover.config import validate
from discover.exceptions import ExpressionError
from discover.schema import to_toml
from discover.selection import least_squares_gram
from discover.terms import term_key
from systems import LORENZ_INPUT_TRUTH, lorenz_runs, truth_map, write_runs

statsmodels_api = pytest.importorskip("statsmodels.api")
ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("with_constant", [True, False])
def test_information_criteria_equal_statsmodels_ols(with_constant):
    # Reference: statsmodels OLS results .aic and .bic on the same regression, fixed term set.
    rng = np.random.default_rng(7)
    x = rng.normal(size=(250, 3))
    theta = np.column_stack([np.ones(250), x]) if with_constant else x
    y = theta @ rng.normal(size=theta.shape[1]) + 0.3 * rng.standard_normal(250)
    coef = least_squares_gram(theta.T @ theta, (theta.T @ y)[:, None], np.ones((theta.shape[1], 1), bool))
    rss = float(np.sum((y - theta @ coef[:, 0]) ** 2))
    aic, aicc, bic = ranking.information_criteria(rss, len(y), theta.shape[1])
    fit = statsmodels_api.OLS(y, theta).fit()
    assert aic == pytest.approx(fit.aic, rel=1e-9, abs=1e-9)
    assert bic == pytest.approx(fit.bic, rel=1e-9, abs=1e-9)
    # AICc (Hurvich & Tsai 1989): AIC + 2k(k+1)/(n-k-1).
    k, n = theta.shape[1], len(y)
    assert aicc == pytest.approx(fit.aic + 2 * k * (k + 1) / (n - k - 1), rel=1e-12)


def test_akaike_weights_and_support_labels():
    # Burnham & Anderson (2002): w_i = exp(-Δ_i/2) / Σ exp(-Δ_j/2); Δ ≤ 2 substantial, > 10 none.
    w = ranking.akaike_weights(np.array([0.0, 2.0, np.inf]))
    assert w == pytest.approx([1 / (1 + np.exp(-1)), np.exp(-1) / (1 + np.exp(-1)), 0.0])
    assert [ranking.support_label(d) for d in (0.0, 2.0, 5.0, 10.5)] == \
        ["substantial", "substantial", "less", "essentially none"]


def test_pareto_front():
    # A point is on the front when no other point is at least as good on both axes.
    front = ranking.pareto_front([1, 2, 3, 3, 4], [5.0, 3.0, 3.5, 1.0, 1.0])
    assert front.tolist() == [True, True, False, True, False]


@pytest.fixture(scope="module")
def ship():
    return discover.run(ROOT / "configs" / "ship.toml")


def structure_of(result, name):
    return {c.name: c for c in result.candidates}[name].structure(result.model.state_names)


def test_ship_true_structure_ranks_first_and_no_cubic_is_far_behind(ship):
    # Truth: data_demo/make_ship.py (Norrbin's cubic yaw damping).
    from data_demo.make_ship import TRUE_COEFFICIENTS

    truth = frozenset((s, k) for s, terms in truth_map(TRUE_COEFFICIENTS).items() for k in terms)
    table = ship.ranking.table
    assert structure_of(ship, table.loc[0, "candidate"]) == truth
    row = table[table["candidate"] == "hypothesis 'no cubic damping'"].iloc[0]
    assert row["rank"] > 1 and row["delta"] > 10


def test_lorenz_true_structure_on_pareto_front_and_first_among_path_candidates(tmp_path):
    # Lorenz (1963), sigma=10, rho=28, beta=8/3, with an input on dx/dt.
    # Low noise (1e-4 of each state's std); scored on 0.5 s segments, as chaos allows.
    pattern = write_runs(tmp_path, lorenz_runs(noise=1e-4, n_runs=3, duration=6.0))
    result = discover.run({
        "data": {"files": [pattern], "states": ["x", "y", "z"], "inputs": ["u"], "held_out": ["run_2"]},
        "derivatives": {"method": "savitzky_golay", "window": 9, "order": 4},
        "terms": {"degree": 2, "input_degree": 1},
        "selection": {"cv_folds": 4},
        "bootstrap": {"members": 0},
        "ranking": {"sr3": False, "horizon": 0.5},
        "output": {"figures": False},
    })
    truth = frozenset((s, k) for s, terms in truth_map(LORENZ_INPUT_TRUTH).items() for k in terms)
    table = result.ranking.table
    is_path = (table["source"] == "path") | table["also"].str.contains("path threshold")
    first_path = table[is_path].iloc[0]
    assert structure_of(result, first_path["candidate"]) == truth
    assert bool(first_path["pareto"])


@pytest.mark.parametrize("term, fragment", [
    ("yaw_rate*wind", r"'no wind'.*\.yaw_rate\[1\]: 'yaw_rate\*wind' at column 10: unknown name 'wind'"),
    ("yaw_rate***3", r"'no wind'.*\.yaw_rate\[1\]: 'yaw_rate\*\*\*3' does not parse \(at column 11\)"),
])
def test_bad_hypothesis_names_itself_and_the_position(term, fragment):
    raw = {"data": {"files": ["x.csv"], "states": ["heading", "yaw_rate"], "inputs": ["rudder"]},
           "ranking": {"hypotheses": [{"name": "no wind", "yaw_rate": ["yaw_rate", term]}]}}
    with pytest.raises(ExpressionError, match=fragment):
        validate(raw, "cfg.toml")


def test_hypothesis_for_unknown_state_is_refused():
    raw = {"data": {"files": ["x.csv"], "states": ["heading", "yaw_rate"], "inputs": ["rudder"]},
           "ranking": {"hypotheses": [{"name": "h", "yawrate": ["rudder"]}]}}
    with pytest.raises(discover.ConfigError, match=r"unknown key \[ranking.hypotheses 'h'\].yawrate.*'yaw_rate'"):
        validate(raw, "cfg.toml")


def test_rank_command_adds_hypotheses_without_changing_earlier_rows(tmp_path, capsys):
    out = tmp_path / "ship"
    assert main(["run", str(ROOT / "configs" / "ship.toml"), "--out", str(out)]) == 0
    extra = tmp_path / "more.toml"
    extra.write_text('[[ranking.hypotheses]]\nname = "rudder only"\nyaw_rate = ["rudder"]\n')
    capsys.readouterr()
    assert main(["rank", str(out), str(extra)]) == 0
    assert "hypothesis 'rudder only'" in capsys.readouterr().out
    before = pd.read_csv(out / "ranking.csv")
    after = pd.read_csv(out / "ranking_updated.csv")
    assert len(after) == len(before) + 1
    merged = after.set_index("candidate").loc[before["candidate"]]
    # The earlier rows' own scores are kept as they were (nothing refitted); a worse
    # newcomer leaves their deviances as they were too.
    np.testing.assert_allclose(merged["rss"], before["rss"].to_numpy())
    np.testing.assert_allclose(merged["deviance"], before["deviance"].to_numpy())
    assert after.iloc[0]["candidate"] == before.iloc[0]["candidate"]
    # A name already in ranking.csv is refused with the file named (not a TOML error).
    again = tmp_path / "again.toml"
    again.write_text('[[ranking.hypotheses]]\nname = "no cubic damping"\nyaw_rate = ["rudder"]\n')
    capsys.readouterr()
    assert main(["rank", str(out), str(again)]) == 2
    err = capsys.readouterr().err
    assert "are already in" in err and "ranking.csv" in err and "not valid TOML" not in err


def test_simulate_reproduces_the_held_out_metrics_of_the_run(tmp_path, capsys):
    # The same initial-state rule, tolerances, limits and interpolation as 'discover run'.
    out = tmp_path / "ship"
    assert main(["run", str(ROOT / "configs" / "ship.toml"), "--out", str(out)]) == 0
    capsys.readouterr()
    run_file = ROOT / "data_demo" / "ship" / "heldout_sine.csv"
    assert main(["simulate", str(out / "model.json"), str(run_file)]) == 0
    printed = capsys.readouterr().out
    metrics = pd.read_csv(out / "heldout_metrics.csv")
    fits = ", ".join(f"{r.state} {r.nrmse_fit_percent:.1f} %" for r in metrics.itertuples())
    assert f"heldout_sine: fit {fits}" in printed
    rmse = ", ".join(f"{r.state} {r.rmse:.4g}" for r in metrics.itertuples())
    assert f"heldout_sine: RMSE {rmse}" in printed and "Note:" not in printed


COARSE_SHIP = {"data": {"files": [str(ROOT / "data_demo" / "ship" / "*.csv")], "states": ["heading", "yaw_rate"],
                        "inputs": ["rudder"], "held_out": ["heldout_sine"]},
               "derivatives": {"method": "savitzky_golay", "window": 15, "order": 3},
               "terms": {"degree": 3, "variables": ["yaw_rate", "rudder"], "input_degree": 1},
               "selection": {"threshold": 0.5},  # far too coarse: drops the damping terms
               "bootstrap": {"members": 0}, "ranking": {"sr3": False}, "refine": {"enabled": False},
               "output": {"figures": False}}


def written_structure(result):
    return frozenset((s, term_key(t)) for s, kept in result.model.equations() for t, _, _ in kept)


def test_one_answer_the_recommended_candidate_is_the_model_written(tmp_path, capsys):
    # The coarse threshold's fit is not the best structure; the ranking recommends another
    # and that one is the model: printed, in model.json and in the exports (one answer).
    out = tmp_path / "coarse"
    config = tmp_path / "coarse.toml"
    config.write_text(to_toml(validate(COARSE_SHIP, str(config))))
    assert main(["run", str(config), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    table = pd.read_csv(out / "ranking.csv", keep_default_na=False, na_values=[""])
    best = table.iloc[0]
    assert best["candidate"] != "model" and bool(best["recommended"])
    assert f"Recommended: {best['candidate']!r}" in printed
    written = json.loads((out / "model.json").read_text())
    assert written["choice"]["candidate"] == best["candidate"]
    n_written = sum(len(e["terms"]) for e in written["equations"])
    assert n_written == best["n_terms"]
    result = discover.run(COARSE_SHIP)
    candidate = {c.name: c for c in result.candidates}[best["candidate"]]
    assert written_structure(result) == candidate.structure(result.model.state_names)
    assert not any("model.json holds" in w for w in result.warnings)


def test_a_forced_choice_is_written_and_said(tmp_path):
    # [ranking].choose = "ensemble" keeps the identified (here cross-validated) fit; the run says so.
    raw = {**COARSE_SHIP, "ranking": {"sr3": False, "choose": "ensemble"}}
    result = discover.run(raw)
    assert result.model.info["choice"]["candidate"] == "model"
    assert result.ranking.table.iloc[0]["candidate"] != "model"
    assert any("model.json holds 'model', as [ranking].choose = 'ensemble' asks" in w for w in result.warnings)


def test_choose_names_what_it_accepts():
    raw = {"data": {"files": ["x.csv"], "states": ["heading", "yaw_rate"], "inputs": ["rudder"]},
           "ranking": {"choose": "best"}}
    with pytest.raises(discover.ConfigError, match=r"\[ranking\].choose = 'best' is none of 'recommended'"):
        validate(raw, "cfg.toml")
