"""Validation diagnostics against statsmodels, scipy and the theory of Ljung (1999).

Ljung, System Identification: Theory for the User, 2nd ed. 1999: ch. 16 (residual
analysis), sec. 13.2 (persistent excitation). Söderström & Stoica, System
Identification, 1989, sec. 5.4 (the same definition of persistent excitation). Section
numbers other than Ljung's ch. 16 and sec. 13.2 are from memory.
"""

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.signal import lfilter, max_len_seq
from scipy.stats import kstest
from statsmodels.regression.linear_model import OLS
from statsmodels.stats.diagnostic import acorr_ljungbox
from statsmodels.tsa.stattools import acf, ccf

from discover.diagnostics import (
    CONSTANT_INPUT,
    PASSES,
    check_extrapolation,
    default_max_lag,
    diagnostic_warnings,
    excitation_order,
    excitation_shortfall,
    input_excitation,
    lag_ranges,
    ljung_box,
    residual_analysis,
    training_range,
)
from discover.exceptions import ConfigError, DataError

# --- residual analysis against statsmodels ---------------------------------------------------


@pytest.mark.parametrize("seed, n, lags", [(0, 200, 10), (1, 1000, 25), (2, 57, 14), (3, 5000, 40)])
def test_ljung_box_equals_statsmodels(seed, n, lags):
    # Reference: statsmodels.stats.diagnostic.acorr_ljungbox (Ljung & Box 1978, Biometrika 65).
    rng = np.random.default_rng(seed)
    e = rng.standard_normal((n, 2)) + np.array([3.0, -1.0])
    e[:, 1] = lfilter([1.0], [1.0, -0.3], e[:, 1])  # one white, one coloured column
    q, p = ljung_box([e], lags)
    result = residual_analysis(e, state_names=("a", "b"), max_lag=lags)
    for j in range(2):
        reference = acorr_ljungbox(e[:, j], lags=lags)
        assert abs(q[j] - reference["lb_stat"].iloc[-1]) <= 1e-10 * reference["lb_stat"].iloc[-1]
        assert abs(p[j] - reference["lb_pvalue"].iloc[-1]) <= 1e-10
        assert abs(result.ljung_box_p[j] - reference["lb_pvalue"].iloc[-1]) <= 1e-10


def test_pooled_autocorrelation_never_crosses_runs():
    # Reference: statsmodels acf with missing="conservative" skips every product that
    # touches a NaN, so runs joined by NaN gaps (each run demeaned) give the pooled correlation.
    rng = np.random.default_rng(4)
    runs = [lfilter([1.0], [1.0, -0.6], rng.standard_normal(n))[:, None] + offset
            for n, offset in ((300, 5.0), (451, -7.0), (120, 0.0))]
    max_lag = 12
    joined = np.concatenate([np.concatenate([r[:, 0] - r[:, 0].mean(), np.full(max_lag, np.nan)]) for r in runs])
    reference = acf(joined, nlags=max_lag, fft=False, missing="conservative")
    result = residual_analysis(runs, state_names=("x",), max_lag=max_lag)
    np.testing.assert_allclose(result.autocorrelation[:, 0], reference[1:], rtol=0, atol=1e-12)
    # AR(1) with coefficient 0.6 is far from white (its lag-1 correlation is 0.6; Box & Jenkins).
    assert result.verdicts[0].startswith("residuals of x are not white (Ljung–Box p < 1e-12 at 12 lags)")
    # The offsets between runs create no correlation: white runs at different levels pass.
    white = [rng.standard_normal((400, 1)) + level for level in (-50.0, 50.0)]
    assert residual_analysis(white, state_names=("x",)).verdicts == ("residuals of x pass: white",)


def test_cross_correlation_and_bound_equal_statsmodels_ccf():
    # Reference: statsmodels.tsa.stattools.ccf (adjusted=False): ccf(e, u)[k] correlates e(t + k)
    # with u(t), our lag +k; ccf(u, e)[k] is our lag -k. Its alpha bound is z/sqrt(N).
    rng = np.random.default_rng(5)
    n, max_lag = 800, 20
    u = lfilter([1.0], [1.0, -0.8], rng.standard_normal((n, 2)), axis=0) + 2.0
    e = rng.standard_normal((n, 1))
    e[3:, 0] += 0.3 * u[:-3, 1]
    result = residual_analysis(e, u, state_names=("x",), input_names=("u1", "u2"), max_lag=max_lag, level=0.99)
    for j in range(2):
        forward = ccf(e[:, 0], u[:, j], adjusted=False, fft=False, nlags=max_lag + 1)
        backward = ccf(u[:, j], e[:, 0], adjusted=False, fft=False, nlags=max_lag + 1)
        np.testing.assert_allclose(result.cross_correlation[max_lag:, 0, j], forward, atol=1e-12)
        np.testing.assert_allclose(result.cross_correlation[max_lag::-1, 0, j], backward, atol=1e-12)
    confint = ccf(e[:, 0], u[:, 0], adjusted=False, nlags=2, alpha=0.01).confint
    assert abs(result.bound - (confint[0, 1] - confint[0, 0]) / 2) <= 1e-12
    assert "correlated with u2 at lags 0–" in result.verdicts[0]  # u2 is coloured: many lags
    assert "u1" not in result.verdicts[0]


def test_joint_cross_test_is_n_r_squared_of_lagged_regression():
    # Reference: statsmodels OLS of the residual on u(t), ..., u(t - M) without a constant (its
    # rsquared is then uncentered); N R^2 is the Lagrange-multiplier form of Ljung's joint test.
    rng = np.random.default_rng(6)
    n, max_lag = 600, 8
    u = lfilter([1.0], [1.0, -0.7], rng.standard_normal(n))
    e = rng.standard_normal(n)
    e[2:] += 0.1 * u[:-2]
    result = residual_analysis(e, u, state_names=("x",), input_names=("u",), max_lag=max_lag)
    e0, u0 = e - e.mean(), u - u.mean()
    lagged = np.column_stack([u0[max_lag - tau:n - tau] for tau in range(max_lag + 1)])
    fit = OLS(e0[max_lag:], lagged).fit()
    assert abs(result.cross_statistic[0, 0] - (n - max_lag) * fit.rsquared) <= 1e-9 * result.cross_statistic[0, 0]
    assert result.cross_dof[0] == max_lag + 1


def test_white_noise_passes_at_the_nominal_rate():
    # Under the null the p-values are uniform, so at level 0.99 about 1 % of series fail
    # (Ljung 1999, sec. 16.6). Fixed seeds 0..99; under Binomial(100, 0.01), P(X >= 5) is about 0.003.
    lb_p, cross_p = [], []
    for seed in range(100):
        rng = np.random.default_rng(seed)
        e = rng.standard_normal((400, 1))
        u = lfilter([1.0], [1.0, -0.9], rng.standard_normal((400, 1)), axis=0)  # a coloured input
        result = residual_analysis(e, u, state_names=("x",), input_names=("u",))
        lb_p.append(result.ljung_box_p[0])
        cross_p.append(result.cross_p[0, 0])
    assert np.sum(np.array(lb_p) < 0.01) <= 4
    assert np.sum(np.array(cross_p) < 0.01) <= 4
    # The p-values are uniform (scipy.stats.kstest against U(0, 1)).
    assert kstest(lb_p, "uniform").pvalue > 0.01
    assert kstest(cross_p, "uniform").pvalue > 0.01


# --- a system with a missing input term --------------------------------------------------------

# A damped oscillator driven by a force f and a disturbance w (our own system; Newton's second
# law, common practice): dp/dt = v, dv/dt = -K p - C v + B f + D w.
K, C, B, D = 4.0, 0.8, 1.0, 0.5


def _multisine(freqs, rng):
    phases = rng.uniform(0.0, 2.0 * np.pi, len(freqs))
    return lambda t: np.sum(np.sin(2.0 * np.pi * np.multiply.outer(t, freqs) + phases), axis=-1) / len(freqs) ** 0.5


def _oscillator_run(seed):
    """Free-run residuals (measured - simulated) of the true model and of the model without D w."""
    rng = np.random.default_rng(seed)
    f = _multisine([0.05, 0.13, 0.31, 0.52, 0.87], rng)
    w = _multisine([0.07, 0.19, 0.41, 0.66, 1.1], rng)
    t = np.arange(0.0, 60.0, 0.05)

    def both(s, x):  # the system (= the true model) and the model missing D w, in one solve
        return [x[1], -K * x[0] - C * x[1] + B * f(s) + D * w(s), x[3], -K * x[2] - C * x[3] + B * f(s)]

    # Reference integrator: scipy solve_ivp; rows = time. Both start from the true initial state,
    # so the true model's residual is the measurement noise alone.
    x = solve_ivp(both, (0.0, t[-1]), [0.2, 0.0, 0.2, 0.0], t_eval=t, method="DOP853", rtol=1e-9,
                  atol=1e-11).y.T
    measured = x[:, :2] + 0.01 * rng.standard_normal((len(t), 2))
    return measured - x[:, :2], measured - x[:, 2:], np.column_stack([f(t), w(t)])


def test_missing_input_term_is_flagged_and_true_model_passes():
    names = dict(state_names=("p", "v"), input_names=("f", "w"), run_names=("run_a", "run_b"))
    runs = [_oscillator_run(seed) for seed in (0, 1)]
    inputs = [u for _, _, u in runs]
    true = residual_analysis([e for e, _, _ in runs], inputs, **names)
    wrong = residual_analysis([e for _, e, _ in runs], inputs, **names)
    assert true.verdicts == tuple(PASSES.format(state=s) for s in ("p", "v"))
    assert diagnostic_warnings(residuals=true) == ()
    assert np.all(wrong.cross_p[:, 1] < 0.01) and np.all(wrong.cross_p[:, 0] >= 0.01)
    for verdict, state in zip(wrong.verdicts, ("p", "v")):
        assert verdict.startswith(f"residuals of {state} are correlated with w at lags 0–")
        assert "a term in w may be missing" in verdict and "with f" not in verdict
    assert any("correlated with w" in line for line in diagnostic_warnings(residuals=wrong))


# --- persistent excitation (Ljung 1999, sec. 13.2; Söderström & Stoica 1989, sec. 5.4) ---------


def test_excitation_order_of_textbook_signals():
    n = 5000
    k = np.arange(n)
    # A non-zero constant: order 1 with the mean kept, as the definition has it; zero: order 0.
    assert excitation_order([np.full((n, 1), 0.1)]).tolist() == [1]
    assert excitation_order([np.zeros((n, 1))]).tolist() == [0]
    # A single step: order 1 (its finite-record transition adds only O(1/N)).
    step = (k >= n // 3).astype(float)[:, None]
    assert excitation_order([step]).tolist() == [1]
    # White noise: every order (capped at max_order).
    white = np.random.default_rng(7).standard_normal((n, 1))
    assert excitation_order([white], max_order=20).tolist() == [20]


@pytest.mark.parametrize("nbits", [3, 4, 5, 6])
def test_excitation_order_of_prbs_is_its_period(nbits):
    # A maximum-length PRBS (scipy.signal.max_len_seq) of period P = 2^nbits - 1 is persistently
    # exciting of order P (Ljung 1999, sec. 13.3; Söderström & Stoica 1989, sec. 5.4), with levels
    # 0/1 or -1/+1 alike (section numbers from memory).
    sequence = max_len_seq(nbits)[0].astype(float)
    period = len(sequence)
    u = np.tile(sequence, 4000 // period + 2)[:, None]
    assert excitation_order([u, 2.0 * u - 1.0], max_order=period + 8).tolist() == [period]
    assert excitation_order([2.0 * u - 1.0], max_order=period + 8).tolist() == [period]


@pytest.mark.parametrize("n_sines", [1, 2, 3])
def test_excitation_order_of_sinusoids(n_sines):
    # A sum of k sinusoids at distinct frequencies in (0, pi) rad/sample has order 2k; a non-zero
    # mean adds one (a spectral line at zero frequency), whatever its size (Ljung 1999, sec. 13.2).
    k = np.arange(4000)
    u = sum(np.sin(w * k + 0.7 * i) for i, w in enumerate([0.5, 1.3, 2.2][:n_sines]))[:, None]
    assert excitation_order([u]).tolist() == [2 * n_sines]
    for offset in (2.0, 1e4):
        assert excitation_order([u + offset]).tolist() == [2 * n_sines + 1]


def test_excitation_order_pools_runs_without_crossing_them():
    # Two runs, each constant at its own level: the lagged products never span the boundary, so
    # the pooled input is still only exciting of order 1 (Söderström & Stoica 1989, sec. 5.4).
    runs = [np.full((1000, 1), 1.0), np.full((1000, 1), 3.0)]
    assert excitation_order(runs).tolist() == [1]


def test_shortfall_against_library_term_counts():
    # One sinusoid has order 2 and white noise every order (Ljung 1999, sec. 13.2).
    t = np.arange(0.0, 100.0, 0.1)
    u = np.column_stack([np.sin(2.0 * t), np.random.default_rng(8).standard_normal(len(t))])
    excitation = input_excitation([t], [u], input_names=("rudder", "noise"))
    assert excitation.order.tolist() == [2, excitation.max_order]  # one sinusoid: order 2
    assert excitation_shortfall(excitation, {"rudder": 4, "noise": 10}) == {"rudder": (2, 4)}
    assert excitation_shortfall(excitation, {"rudder": 2}) == {}
    (line,) = diagnostic_warnings(excitation=excitation, term_counts={"rudder": 4})
    assert line.startswith("input rudder is persistently exciting of order 2 only, but 4 library terms")
    with pytest.raises(DataError, match=r"`term_counts` names \['thrust'\], which are not inputs"):
        excitation_shortfall(excitation, {"thrust": 1})


# --- band ------------------------------------------------------------------------------------


def test_band_of_a_sinusoid_contains_its_frequency():
    # A sinusoid's Welch periodogram (scipy.signal.welch) peaks at its frequency f0.
    f0, fs = 1.3, 20.0
    t = np.arange(0.0, 200.0, 1.0 / fs)
    excitation = input_excitation([t], [np.sin(2.0 * np.pi * f0 * t)[:, None]], input_names=("u",))
    assert excitation.band_low[0] <= f0 <= excitation.band_high[0]
    assert excitation.band_high[0] - excitation.band_low[0] < 0.5
    assert excitation.resampled == ()
    # Two tones in two runs: the pooled band spans both.
    other = input_excitation([t, t], [np.sin(2 * np.pi * 0.4 * t)[:, None], np.sin(2 * np.pi * 3.0 * t)[:, None]],
                             input_names=("u",))
    assert other.band_low[0] <= 0.4 and other.band_high[0] >= 3.0


def test_band_on_non_uniform_time_and_of_a_constant_input():
    f0 = 1.3
    rng = np.random.default_rng(9)
    t = np.cumsum(rng.uniform(0.04, 0.06, 4000))
    u = np.column_stack([np.sin(2.0 * np.pi * f0 * t), np.full(len(t), 2.0)])
    excitation = input_excitation([t], [u], input_names=("u", "feed"), run_names=("jittered",))
    assert excitation.resampled == ("jittered",)
    assert excitation.band_low[0] <= f0 <= excitation.band_high[0]
    assert np.isnan(excitation.band_low[1]) and excitation.constant == ("feed",)
    assert diagnostic_warnings(excitation=excitation) == (CONSTANT_INPUT.format(input="feed"),)


# --- coverage --------------------------------------------------------------------------------


def test_extrapolation_flags_a_run_outside_the_training_range_only():
    # Shares by hand (arithmetic): the training input spans [0, 1]; a held-out input at
    # -0.195, -0.185, ..., 0.495 (70 samples) has 15 below -0.05 (the 5 % margin) and reaches
    # 19.5 % of the width beyond the range.
    s = np.linspace(0.0, 1.0, 101)
    training = training_range([np.column_stack([np.sin(6 * s), s])], [s[:, None]], state_names=("x", "y"),
                              input_names=("u",))
    inside = check_extrapolation(training, np.column_stack([0.5 * np.sin(6 * s), s]), 0.9 * s[:, None],
                                 run_name="calm")
    assert inside.leaving == () and inside.messages == ()
    u = (-0.2 + 0.01 * (np.arange(70) + 0.5))[:, None]
    outside = check_extrapolation(training, np.column_stack([0.5 * np.sin(6 * u[:, 0]), u[:, 0] + 0.2]), u,
                                  run_name="gusty")
    assert outside.leaving == ("u",)
    np.testing.assert_allclose(outside.excess[2], 0.195)
    np.testing.assert_allclose(outside.share[2], 15 / 70)
    (line,) = diagnostic_warnings(extrapolations=[inside, outside])
    assert line == ("held-out run gusty: input u leaves the training range [0, 1] by up to 20% of its width, "
                    "for 21.4% of samples: the model is extrapolating there")


def test_extrapolation_of_a_channel_constant_in_training():
    # Arithmetic: one of four samples differs from the constant training value.
    training = training_range([np.zeros((10, 1))], [np.ones((10, 1))], state_names=("x",), input_names=("u",))
    check = check_extrapolation(training, np.zeros((4, 1)), np.array([[1.0], [1.0], [1.5], [1.0]]), run_name="r")
    assert check.leaving == ("u",) and np.isinf(check.excess[1]) and check.share[1] == 0.25
    assert check.messages[0].startswith("held-out run r: input u was constant (1) in training")


# --- messages and bad input ------------------------------------------------------------------


def test_lag_ranges_and_default_lag():
    # Our own message format (lag ranges with an en dash, common practice in print); the default
    # lag min(25, N/4) follows Box & Jenkins (1976; from memory) and the usual 25-lag plot.
    assert lag_ranges([3, 4, 5, 6, 7, 8, 9]) == "3–9"
    assert lag_ranges([0, 2, 3, 7]) == "0, 2–3, 7"
    assert lag_ranges([]) == ""
    assert default_max_lag([1000, 5000]) == 25 and default_max_lag([40, 400]) == 10 and default_max_lag([3]) == 1


def test_bad_input_names_the_run_and_column():
    # Project rule (RULES.md): bad input gets a DiscoverError naming run, column and what is accepted.
    e = np.zeros((50, 2))
    with pytest.raises(DataError, match=r"residuals of run 'r1' must have shape \(n_samples, 3\)"):
        residual_analysis([e], state_names=("a", "b", "c"), run_names=("r1",))
    e[7, 1] = np.nan
    with pytest.raises(DataError, match=r"run 'r1', column 'b' has 1 non-finite values \(first at row 7\)"):
        residual_analysis([e], state_names=("a", "b"), run_names=("r1",))
    with pytest.raises(DataError, match=r"run 'short' has 5 samples; .* max_lag = 10 needs at least 12"):
        residual_analysis([np.ones((5, 1))], state_names=("a",), run_names=("short",), max_lag=10)
    with pytest.raises(DataError, match=r"run '#0' has 50 residual rows but 49 input rows"):
        residual_analysis([np.ones((50, 1))], [np.ones((49, 1))], state_names=("a",), input_names=("u",))
    with pytest.raises(ConfigError, match=r"`level` must be a number strictly between 0 and 1. Got 99"):
        residual_analysis([np.ones((50, 1))], state_names=("a",), level=99)
