"""Output-error refinement by multiple shooting (discover.refine).

Truth trajectories come from ``scipy.integrate.solve_ivp`` (DOP853, rtol = 1e-10) on
the continuous-time systems with their continuous inputs (reference library); the
refinement only sees the samples.
"""

from functools import lru_cache

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.integrate import solve_ivp
from scipy.optimize import approx_fprime

from discover.derivatives import savitzky_golay
from discover.exceptions import ConfigError, DataError, DiscoverError, ExpressionError
from discover.integrator import _Dynamics, _integrate, _layout
from discover.model import Model
from discover.refine import (
    MeasuredRun,
    Structure,
    andrews_lags,
    covariance_from_jacobian,
    newey_west_covariance,
    noise_level,
    refine,
    structure_from_model,
)
from discover.selection import stlsq

# --------------------------------------------------------------------------- systems

# Duffing-type oscillator with an input, ours: dx/dt = v, dv/dt = -k x - c v - a x^3 + b u
# (the Duffing equation with a recorded forcing; Kovacic & Brennan, The Duffing
# Equation, 2011, ch. 1, from memory). Lightly damped: c / (2 sqrt(k)) = 0.05.
K, C, A, B = 4.0, 0.2, 1.0, 1.0
DUFFING_TERMS = ("x", "v", "x**3", "u")
DUFFING_TRUTH = dict(zip(DUFFING_TERMS, (-K, -C, -A, B)))


def duffing_input(t):
    return 8.0 * np.sin(1.3 * t) + 6.0 * np.sin(2.9 * t + 0.5)


def duffing(t, state):
    x, v = state
    return [v, -K * x - C * v - A * x**3 + B * duffing_input(t)]


# Series RLC circuit, states capacitor voltage v_C and inductor current i, source voltage u:
# dv_C/dt = i / C, di/dt = (-v_C - R i + u) / L (Kirchhoff's voltage law; common practice).
# Component values as in tests/systems.py (ours).
R_OHM, L_HENRY, C_FARAD = 5.0, 0.1, 1e-3


def rlc_input(t):
    return 10.0 * np.sin(40.0 * t) + 6.0 * np.sin(170.0 * t + 1.0) + 3.0


def rlc(t, state):
    v, i = state
    return [i / C_FARAD, (-v - R_OHM * i + rlc_input(t)) / L_HENRY]


def truth(fun, x0, t):
    sol = solve_ivp(fun, (t[0], t[-1]), x0, t_eval=t, method="DOP853", rtol=1e-10, atol=1e-12)
    assert sol.success
    return sol.y.T  # solve_ivp is (n_states, n_points); ours is rows = time


@lru_cache(maxsize=None)
def duffing_runs(seed=0, noise=0.05, n_samples=500):
    """Three runs, 5 % noise (of each state's standard deviation), seeded."""
    rng = np.random.default_rng(seed)
    t = np.arange(n_samples) * 0.05
    runs = []
    for k, x0 in enumerate([(1.0, 0.0), (-0.5, 1.0), (0.3, -1.5)]):
        x = truth(duffing, x0, t)
        y = x + noise * x.std(axis=0) * rng.standard_normal(x.shape)
        runs.append(MeasuredRun(t, y, duffing_input(t)[:, None], f"duffing_{k}"))
    return tuple(runs)


@lru_cache(maxsize=None)
def rlc_runs(seed=0, noise=0.01, n_samples=500):
    """Two runs with only v_C measured, 1 % noise, seeded; the second starts with i = -0.1 A."""
    rng = np.random.default_rng(seed)
    t = np.arange(n_samples) * 1e-3
    runs = []
    for k, x0 in enumerate([(0.0, 0.0), (2.0, -0.1)]):
        v = truth(rlc, x0, t)[:, 0]
        y = v + noise * v.std() * rng.standard_normal(v.shape)
        runs.append(MeasuredRun(t, y[:, None], rlc_input(t)[:, None], f"rlc_{k}"))
    return tuple(runs)


def derivative_fit(runs):
    """dv/dt on the known support from Savitzky–Golay derivatives and the project's STLSQ."""
    theta, target = [], []
    for run in runs:
        smooth, slope = savitzky_golay(run.t, run.y, window=11, order=3)
        x, v = smooth[:, 0], smooth[:, 1]
        theta.append(np.column_stack([x, v, x**3, run.u[:, 0]])[5:-5])
        target.append(slope[5:-5, 1])
    coef = stlsq(np.vstack(theta), np.concatenate(target), threshold=0.0)[:, 0]
    return dict(zip(DUFFING_TERMS, coef))


def rlc_structure(start, **options):
    return Structure(("v_C", "i"), ("u",), {"v_C": {"i": start[0]}, "i": dict(zip(("v_C", "i", "u"), start[1:]))},
                     hidden=("i",), **options)


# Starting coefficients 20 % off: 1/C, -1/L, -R/L, 1/L.
RLC_START = (800.0, -12.0, -40.0, 11.0)


@lru_cache(maxsize=None)
def duffing_result():
    runs = duffing_runs()
    start = derivative_fit(runs)
    # dx/dt = v is kinematics, a known term kept at its value.
    structure = Structure(("x", "v"), ("u",), {"x": {"v": 1.0}, "v": start}, fixed={("x", "v")})
    return start, refine(structure, runs)


# --------------------------------------------------------------------------- refinement


def test_refinement_removes_the_bias_of_the_derivative_fit():
    start, result = duffing_result()
    derivative_error = max(abs(start[k] / DUFFING_TRUTH[k] - 1) for k in DUFFING_TERMS)
    assert derivative_error > 0.03
    assert result.converged, result.message
    for term, value in DUFFING_TRUTH.items():
        assert_allclose(result.coefficients["v"][term], value, rtol=0.01)
    assert result.coefficients["x"]["v"] == 1.0  # fixed
    assert result.not_identifiable == ()
    # The standard errors are in line with the actual errors (|z| < 4).
    for term, value in DUFFING_TRUTH.items():
        se = result.standard_errors["v"][term]
        assert 0 < se < 0.01 * abs(value)
        assert abs(result.coefficients["v"][term] - value) < 4 * se
    # Output noise estimated from the data: σ² of the noise-scaled residuals is near 1.
    assert 0.8 < result.residual_variance < 1.25
    # White residuals: the Newey–West errors agree with the ordinary ones.
    for term in DUFFING_TERMS:
        assert_allclose(result.standard_errors_hac["v"][term], result.standard_errors["v"][term], rtol=0.3)


def test_free_run_matches_solve_ivp_on_the_refined_model():
    # Reference: scipy solve_ivp (DOP853, rtol = 1e-10) on the refined model with the
    # input interpolated linearly between samples, as the refinement does.
    _, result = duffing_result()
    run = duffing_runs()[0]
    coef = result.coefficients["v"]

    def refined(t, state):
        x, v = state
        u = np.interp(t, run.t, run.u[:, 0])
        return [v, coef["x"] * x + coef["v"] * v + coef["x**3"] * x**3 + coef["u"] * u]

    reference = truth(refined, result.initial_states[0], run.t[:200])
    spread = np.ptp(reference, axis=0)
    assert np.max(np.abs(result.simulated_states[0][:200] - reference) / spread) < 1e-3
    assert_allclose(result.simulated_outputs[0], result.simulated_states[0])


def test_segments_join_continuously_at_the_optimum():
    _, result = duffing_result()
    assert result.segment_length < len(duffing_runs()[0].t) // 4  # several segments per run
    assert result.continuity_gap < 0.02  # in noise levels
    # Each segment's refined start lies on the free run of the refined model.
    run, starts = duffing_runs()[0], result.segment_starts[0]
    first = np.round(np.linspace(0, len(run.t) - 1, len(starts) + 1)).astype(int)[:-1]
    noise = result.output_scale
    assert np.max(np.abs(starts - result.simulated_states[0][first]) / noise) < 0.05


# --------------------------------------------------------------------------- hidden states


@lru_cache(maxsize=None)
def rlc_result(**options):
    return refine(rlc_structure(RLC_START), rlc_runs(), **options)


def test_hidden_current_identifiable_combinations():
    result = rlc_result()
    c = result.coefficients
    assert result.converged, result.message
    # 1/(LC) = -(1/C)(-1/L) = (1/C)(1/L) and R/L are what the voltage determines.
    w2 = 1.0 / (L_HENRY * C_FARAD)
    assert_allclose(-c["v_C"]["i"] * c["i"]["v_C"], w2, rtol=0.01)
    assert_allclose(c["v_C"]["i"] * c["i"]["u"], w2, rtol=0.01)
    assert_allclose(-c["i"]["i"], R_OHM / L_HENRY, rtol=0.01)
    # L and C apart (the scale of i) are not determined, and the report says so.
    assert len(result.not_identifiable) == 1
    text = result.not_identifiable[0]
    for name in ("d(v_C)/dt:i", "d(i)/dt:v_C", "d(i)/dt:u"):
        assert name in text
    assert "d(i)/dt:i" not in text
    assert any("'i'" in note and "scale is not determined" in note for note in result.scale_notes)
    assert np.isnan(result.standard_errors["v_C"]["i"])
    assert np.isfinite(result.standard_errors["i"]["i"])
    assert result.singular_values[-1] < 1e-8 * result.singular_values[0]


def test_scale_rule_on_a_coefficient_makes_the_rest_identifiable():
    start = (1.0 / C_FARAD,) + RLC_START[1:]
    structure = rlc_structure(start, fixed={("v_C", "i")})
    result = refine(structure, rlc_runs())
    assert result.converged, result.message
    assert result.coefficients["v_C"]["i"] == 1.0 / C_FARAD
    expected = {"v_C": -1.0 / L_HENRY, "i": -R_OHM / L_HENRY, "u": 1.0 / L_HENRY}
    for term, value in expected.items():
        assert_allclose(result.coefficients["i"][term], value, rtol=0.01)
        assert 0 < result.standard_errors["i"][term] < 0.01 * abs(value)
    assert result.not_identifiable == ()
    assert any("scale set by the fixed coefficient d(v_C)/dt:i" in note for note in result.scale_notes)


def test_scale_rule_on_an_initial_value():
    # The second run starts at i = -0.1 A: fixing it sets the scale; a zero fixes none.
    result = refine(rlc_structure(RLC_START), rlc_runs(), fixed_initial={"i": [0.0, -0.1]})
    assert result.not_identifiable == ()
    assert any("initial value fixed at -0.1" in note for note in result.scale_notes)
    assert any("fixed at 0 in run 'rlc_0'" in note for note in result.scale_notes)
    assert result.initial_states[1][1] == -0.1
    # The initial current shows only in the transient (time constant 2L/R = 40 ms), so 1/C
    # is determined loosely; it agrees with the truth within its standard error.
    se = result.standard_errors["v_C"]["i"]
    assert 0 < se < 0.1 / C_FARAD
    assert abs(result.coefficients["v_C"]["i"] - 1.0 / C_FARAD) < 3 * se


def test_finite_difference_jacobian_gives_the_same_fit():
    analytic = rlc_result()
    numeric = rlc_result(jacobian="2-point")
    for state in analytic.coefficients:
        for term, value in analytic.coefficients[state].items():
            assert_allclose(numeric.coefficients[state][term], value, rtol=1e-4)


def test_sparse_jacobian_path_gives_the_same_fit(monkeypatch):
    import discover.refine as refine_module

    dense = rlc_result()
    monkeypatch.setattr(refine_module, "DENSE_LIMIT", 0)
    sparse = refine(rlc_structure(RLC_START), rlc_runs())
    for state in dense.coefficients:
        for term, value in dense.coefficients[state].items():
            assert_allclose(sparse.coefficients[state][term], value, rtol=1e-4)


# --------------------------------------------------------------------------- kernels


def test_sensitivities_match_finite_differences():
    # Reference: scipy.optimize.approx_fprime (central differences) of the RK4 map.
    structure = Structure(("x", "v"), ("u",), {"x": {"v": 1.0}, "v": {"x": -4.0, "v": -0.2, "sin(x)*v": 0.3,
                                                                    "x**3": -1.0, "u": 1.0}})
    dynamics = _Dynamics(structure)
    run = duffing_runs()[0]
    layout = _layout([run], [np.array([0, 20, 40])], 2, "linear")
    x0 = np.array([[1.0, 0.2], [-0.4, 1.1]])
    coef = np.array([1.0, -4.0, -0.2, 0.3, -1.0, 1.0])
    limits = (np.zeros(2), np.full(2, 1e6))
    _, sens, _ = _integrate(dynamics, layout, x0, coef, sensitivities=True, limits=limits)
    n_states = 2

    def end_states(p):
        xs, _, _ = _integrate(dynamics, layout, p[:4].reshape(2, 2), p[4:], sensitivities=False, limits=limits)
        return xs[-1].ravel()

    numeric = approx_fprime(np.concatenate([x0.ravel(), coef]), end_states, 1e-6)  # (4, 10)
    for g in range(2):
        rows = slice(g * n_states, (g + 1) * n_states)
        assert_allclose(sens[-1, g, :, :n_states], numeric[rows, g * 2:(g + 1) * 2], rtol=1e-5, atol=1e-6)
        assert_allclose(sens[-1, g, :, n_states:], numeric[rows, 4:], rtol=1e-5, atol=1e-6)


def test_covariance_matches_statsmodels_ols():
    # Reference: statsmodels OLS standard errors for a full-rank linear problem.
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(1)
    X = rng.normal(size=(200, 3)) * [1.0, 100.0, 0.01]
    y = X @ [1.0, 0.02, 50.0] + 0.3 * rng.normal(size=200)
    fit = sm.OLS(y, X).fit()
    covariance, sigma2, rank = covariance_from_jacobian(X, fit.resid)
    assert rank == 3
    assert_allclose(sigma2, fit.scale, rtol=1e-10)
    assert_allclose(np.sqrt(np.diag(covariance)), fit.bse, rtol=1e-8)


def test_newey_west_matches_statsmodels_hac():
    # Reference: statsmodels OLS with cov_type="HAC" (Bartlett kernel, no small-sample correction).
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(4)
    n = 300
    noise = np.zeros(n)
    for k in range(1, n):  # AR(1) errors, rho = 0.8
        noise[k] = 0.8 * noise[k - 1] + rng.normal()
    X = np.column_stack([rng.normal(size=n), 0.1 * np.cumsum(rng.normal(size=n))])
    y = X @ [1.0, 2.0] + noise
    for lags in (0, 7):
        fit = sm.OLS(y, X).fit(cov_type="HAC", cov_kwds={"maxlags": lags, "use_correction": False})
        covariance = newey_west_covariance(X[:, None, :], fit.resid[:, None], np.zeros(n), lags=lags)
        assert_allclose(np.sqrt(np.diag(covariance)), fit.bse, rtol=1e-10)
    # Autocorrelated residuals get lags; white ones none.
    assert andrews_lags(fit.resid[:, None], np.zeros(n)) > 5
    assert andrews_lags(rng.normal(size=(n, 1)), np.zeros(n)) <= 2


def test_noise_level_from_third_differences():
    # E[(Δ³e)²] = 20 σ² for white noise (binomial coefficients; common practice).
    rng = np.random.default_rng(2)
    t = np.linspace(0, 10, 4000)
    y = np.column_stack([np.sin(t), 100 * np.cos(0.5 * t)])
    sigma = np.array([0.01, 3.0])
    estimate = noise_level([y + sigma * rng.standard_normal(y.shape)])
    assert_allclose(estimate, sigma, rtol=0.05)


def test_model_round_trip():
    _, result = duffing_result()
    model = result.model()
    assert isinstance(model, Model)
    again = structure_from_model(model, fixed={("x", "v")})
    assert again.equations["v"] == pytest.approx(result.coefficients["v"])
    x = np.array([0.5, -0.3])
    coef = result.coefficients["v"]
    expected = coef["x"] * 0.5 + coef["v"] * -0.3 + coef["x**3"] * 0.125 + coef["u"] * 2.0
    assert_allclose(model.rhs(x, [2.0]), [-0.3, expected])


# --------------------------------------------------------------------------- robustness and bad input


def test_diverging_start_is_reported_not_raised():
    runs = duffing_runs()
    # x**3 with the wrong sign: the forcing drives x over the hump, and it escapes in finite time.
    start = {"x": -4.0, "v": -0.2, "x**3": 1.0, "u": 1.0}
    structure = Structure(("x", "v"), ("u",), {"x": {"v": 1.0}, "v": start}, fixed={("x", "v")})
    result = refine(structure, runs, segment_length=500, max_nfev=3)
    assert not result.converged
    assert "diverged" in result.message or "max_nfev" in result.message
    assert np.isfinite(result.cost)


def test_time_limit_returns_the_best_point():
    result = refine(rlc_structure(RLC_START), rlc_runs(), time_limit=1e-9)
    assert not result.converged
    assert "time limit" in result.message


def test_unknown_name_in_an_expression():
    with pytest.raises(ExpressionError, match="'q'"):
        Structure(("x", "v"), ("u",), {"x": {"v": 1.0}, "v": {"q*x": 1.0}})
    with pytest.raises(ExpressionError, match="'w'"):
        Structure(("x", "v"), ("u",), {"x": {"v": 1.0}, "v": {"x": 1.0}}, outputs={"y": "w"})


def test_hidden_state_in_no_equation():
    with pytest.raises(ConfigError, match="'h'") as info:
        Structure(("x", "h"), ("u",), {"x": {"x": -1.0, "u": 1.0}, "h": {"h": -1.0}}, hidden=("h",))
    assert "no output" in str(info.value)
    assert issubclass(info.type, DiscoverError)


@pytest.mark.parametrize(
    "options, match",
    [
        ({"hidden": ("z",)}, "'z' is not a state"),
        ({"fixed": {("v", "x**2")}}, "not a \\(state, term\\) pair"),
        ({"equations": {"x": {"v": 1.0}}}, "no entry for state 'v'"),
        ({"equations": {"x": {"v": 1.0}, "v": {"x": float("nan")}}}, "finite number"),
        ({"equations": {"x": {"v": 1.0}, "v": {"x*v": 1.0, "v*x": 2.0}}}, "same term as 'x\\*v'"),
    ],
)
def test_bad_structure(options, match):
    arguments = {"equations": {"x": {"v": 1.0}, "v": {"x": -1.0}}, **options}
    with pytest.raises(ConfigError, match=match):
        Structure(("x", "v"), ("u",), **arguments)


def test_bad_runs():
    structure = Structure(("x", "v"), ("u",), {"x": {"v": 1.0}, "v": {"x": -1.0, "u": 1.0}})
    run = duffing_runs()[0]
    with pytest.raises(DataError, match="y must have shape"):
        refine(structure, [MeasuredRun(run.t, run.y[:, :1], run.u, "short")])
    y = run.y.copy()
    y[7, 1] = np.nan
    with pytest.raises(DataError, match="column 'v' has 1 non-finite"):
        refine(structure, [MeasuredRun(run.t, y, run.u, "gappy")])
    with pytest.raises(ConfigError, match="segment_length"):
        refine(structure, [run], segment_length=1)
    with pytest.raises(ConfigError, match="jacobian"):
        refine(structure, [run], jacobian="exact")
    with pytest.raises(ConfigError, match="'q' is not a state"):
        refine(structure, [run], fixed_initial={"q": 1.0})
