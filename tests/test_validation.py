"""The validation stage's diagnostics on a system of our own with a known missing term.

System (ours): dx/dt = -x + 2·u, dy/dt = x - 0.5·y, driven by a multisine u, measured with
white noise. The input's band (up to 0.3 Hz at 20 samples/s) stays well below the 15-sample
smoother's cutoff: faster inputs leave a smoothing bias in the equation residuals that is itself
correlated with the input (the refinement by output error is the remedy). A model without the input term must be flagged as correlated with u (Ljung,
System Identification, 1999, ch. 16: a residual that follows the input's past means an input
term is missing); the true model must pass. Truth simulated with scipy's solve_ivp.
"""

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from discover.config import validate
from discover.data import Dataset, Run
from discover.model import Model
from discover.smoothing import smooth_runs
from discover.validation import diagnose


def make_run(name, seed, n=2400, dt=0.05):
    t = np.arange(n) * dt
    rng = np.random.default_rng(seed)
    freqs, phases = rng.uniform(0.02, 0.3, 6), rng.uniform(0, 2 * np.pi, 6)
    u_of = lambda s: np.sum(np.sin(2 * np.pi * freqs * s + phases))  # noqa: E731
    sol = solve_ivp(lambda s, z: [-z[0] + 2 * u_of(s), z[0] - 0.5 * z[1]], (0, t[-1]), [0.0, 0.0], t_eval=t,
                    rtol=1e-10, atol=1e-12, max_step=dt)
    u = np.array([u_of(s) for s in t])[:, None]
    x = sol.y.T + 0.01 * sol.y.T.std(axis=0) * rng.standard_normal(sol.y.T.shape)
    return Run(name, t, x, u, source=f"{name}.csv")


@pytest.fixture(scope="module")
def runs():
    training = Dataset(("x", "y"), ("u",), (make_run("a", 1), make_run("b", 2)))
    held = Dataset(("x", "y"), ("u",), (make_run("c", 3),))
    settings = validate({"data": {"files": ["*.csv"], "states": ["x", "y"], "inputs": ["u"]},
                         "derivatives": {"method": "savitzky_golay", "window": 15, "order": 3}})
    return training, held, smooth_runs(training, settings.derivatives), smooth_runs(held, settings.derivatives)


def model(with_input):
    coef = np.array([[-1.0, 1.0], [0.0, -0.5], [2.0 if with_input else 0.0, 0.0]])
    return Model(("x", "y"), ("u",), ("x", "y", "u"), coef)


def test_missing_input_term_is_flagged_and_the_true_model_passes(runs):
    training, held, training_smoothed, held_smoothed = runs
    wrong = diagnose(model(False), training, held, training_smoothed, held_smoothed, ["x", "y", "u"])
    assert any("residuals of d(x)/dt are correlated with u" in w for w in wrong.warnings), wrong.warnings
    right = diagnose(model(True), training, held, training_smoothed, held_smoothed, ["x", "y", "u"])
    assert right.held_out.uncorrelated.all()
    assert not [w for w in right.warnings if "residuals" in w], right.warnings


def test_extrapolation_of_a_held_out_run_is_warned(runs):
    training, held, training_smoothed, held_smoothed = runs
    far = Run("far", held.runs[0].t, held.runs[0].x * 3, held.runs[0].u, source="far.csv")
    result = diagnose(model(True), training, Dataset(("x", "y"), ("u",), (far,)), training_smoothed,
                      smooth_runs(Dataset(("x", "y"), ("u",), (far,)), training_smoothed_settings()),
                      ["x", "y", "u"])
    assert any("held-out run far" in w and "extrapolating" in w for w in result.warnings)


def training_smoothed_settings():
    return validate({"data": {"files": ["*.csv"], "states": ["x", "y"]},
                     "derivatives": {"method": "savitzky_golay", "window": 15, "order": 3}}).derivatives
