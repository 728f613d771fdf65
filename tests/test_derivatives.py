"""Tests of discover.derivatives against scipy, the derivative package and published values."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.interpolate import make_smoothing_spline
from scipy.signal import savgol_coeffs

import derivative
from discover.derivatives import (
    DERIVATIVE_METHODS,
    default_trim,
    finite_difference,
    kalman,
    min_samples,
    savitzky_golay,
    smoothing_spline,
)
from discover.exceptions import ConfigError, DataError


def jittered_grid(n, stop, seed):
    """Strictly increasing times: a uniform grid moved by up to 30 % of a step."""
    rng = np.random.default_rng(seed)
    t = np.linspace(0.0, stop, n)
    step = t[1] - t[0]
    return t + rng.uniform(-0.3 * step, 0.3 * step, n)


def interior(a, trim):
    return a[trim : len(a) - trim]


# --- Savitzky–Golay weights ---------------------------------------------------


@pytest.mark.parametrize("window, order", [(5, 2), (7, 3), (11, 3), (9, 4)])
def test_savitzky_golay_weights_match_scipy_savgol_coeffs(window, order):
    # Reference: scipy.signal.savgol_coeffs (use="dot": weights on x[i-h..i+h]).
    # Feeding unit impulses (the columns of an identity matrix) gives the
    # filter's weight matrix: row i holds the weights applied around sample i.
    n = 3 * window
    step = 0.25
    t = np.arange(n) * step
    smooth_weights, slope_weights = savitzky_golay(t, np.eye(n), window=window, order=order)
    half = window // 2
    expected_smooth = savgol_coeffs(window, order, use="dot")
    expected_slope = savgol_coeffs(window, order, deriv=1, delta=step, use="dot")
    for i in range(half, n - half):
        outside = np.r_[0 : i - half, i + half + 1 : n]
        assert_allclose(smooth_weights[i, i - half : i + half + 1], expected_smooth, atol=1e-12)
        assert_allclose(slope_weights[i, i - half : i + half + 1], expected_slope, atol=1e-12)
        assert_allclose(smooth_weights[i, outside], 0.0, atol=1e-12)
        assert_allclose(slope_weights[i, outside], 0.0, atol=1e-12)


@pytest.mark.parametrize("order", [2, 3])
def test_savitzky_golay_five_point_smoothing_matches_published_table(order):
    # Savitzky & Golay (1964), Anal. Chem. 36(8), 5-point quadratic/cubic
    # smoothing: (-3, 12, 17, 12, -3) / 35, from the published table, as
    # commonly reproduced.
    n = 15
    smooth_weights, _ = savitzky_golay(np.arange(n, dtype=float), np.eye(n), window=5, order=order)
    assert_allclose(smooth_weights[7, 5:10], np.array([-3, 12, 17, 12, -3]) / 35, atol=1e-12)


def test_savitzky_golay_five_point_derivatives_match_published_table():
    # Savitzky & Golay (1964), Anal. Chem. 36(8), 5-point first derivative,
    # quadratic fit: (-2, -1, 0, 1, 2) / 10, from the published table, as
    # commonly reproduced. Cubic fit: (1, -8, 0, 8, -1) / 12 (the classic
    # five-point central difference; from memory).
    n = 15
    t = np.arange(n, dtype=float)
    _, quadratic = savitzky_golay(t, np.eye(n), window=5, order=2)
    _, cubic = savitzky_golay(t, np.eye(n), window=5, order=3)
    assert_allclose(quadratic[7, 5:10], np.array([-2, -1, 0, 1, 2]) / 10, atol=1e-12)
    assert_allclose(cubic[7, 5:10], np.array([1, -8, 0, 8, -1]) / 12, atol=1e-12)


# --- analytic signals -----------------------------------------------------------


@pytest.mark.parametrize("grid", ["uniform", "jittered"])
@pytest.mark.parametrize("method, tolerance", [("finite_difference", 1e-3), ("smoothing_spline", 1e-4)])
def test_derivative_of_sine(grid, method, tolerance):
    # d/dt sin(t) = cos(t). Tolerances: second-order differences err by about
    # h**2 / 6 = 1.6e-4 at h = 2*pi/200 (Taylor remainder); a cubic spline
    # through clean data errs by O(h**3).
    n = 201
    t = np.linspace(0.0, 2 * np.pi, n) if grid == "uniform" else jittered_grid(n, 2 * np.pi, seed=3)
    x = np.column_stack([np.sin(t), 2.0 * np.sin(t)])
    x_smooth, x_dot = DERIVATIVE_METHODS[method](t, x)
    trim = default_trim(method, {})
    expected = np.column_stack([np.cos(t), 2.0 * np.cos(t)])
    assert_allclose(interior(x_dot, trim), interior(expected, trim), atol=tolerance)
    assert_allclose(x_smooth, x, atol=tolerance)


def test_finite_difference_is_exact_for_quadratics_on_a_jittered_grid():
    # numpy.gradient docs: second-order differences with edge_order=2 are exact
    # for quadratics, ends included, on non-uniform grids.
    t = jittered_grid(30, 3.0, seed=5)
    x = np.column_stack([1.0 - 2.0 * t + 0.5 * t**2, 3.0 * t**2])
    x_smooth, x_dot = finite_difference(t, x)
    assert_allclose(x_dot, np.column_stack([-2.0 + t, 6.0 * t]), atol=1e-10)
    assert_allclose(x_smooth, x)


def test_finite_difference_order_four_is_exact_for_quartics():
    # A five-point stencil is exact for polynomials up to degree 4 (Taylor
    # expansion; Fornberg 1988, Math. Comp. 51(184)), ends included here
    # because the ends use the quartic through the first / last 5 samples.
    t = np.linspace(-1.0, 2.0, 25)
    x = (t**4 - t**3 + 2.0 * t)[:, None]
    _, x_dot = finite_difference(t, x, order=4)
    assert_allclose(x_dot[:, 0], 4.0 * t**3 - 3.0 * t**2 + 2.0, atol=1e-9)


def test_savitzky_golay_order_three_is_exact_for_cubics():
    # A least-squares fit of degree 3 reproduces a cubic exactly (common
    # practice); so do its value and slope at the window centre.
    t = np.linspace(0.0, 4.0, 41)
    x = (0.5 * t**3 - t**2 + 3.0)[:, None]
    x_smooth, x_dot = savitzky_golay(t, x, window=9, order=3)
    trim = default_trim("savitzky_golay", {"window": 9})
    assert_allclose(interior(x_smooth, trim), interior(x, trim), atol=1e-10)
    assert_allclose(interior(x_dot[:, 0], trim), interior(1.5 * t**2 - 2.0 * t, trim), atol=1e-10)


# --- time scaling of the smoothing penalties ------------------------------------


def test_smoothing_spline_lam_is_scipys_lam_in_samples():
    # Reference: scipy.interpolate.make_smoothing_spline in data units. With
    # t = step * s, integral f''(t)**2 dt = step**-3 * integral f''(s)**2 ds
    # (chain rule), so our lam equals scipy's lam / step**3.
    rng = np.random.default_rng(11)
    step, lam = 0.1, 4.0
    t = np.arange(60) * step
    y = np.sin(t) + 0.05 * rng.standard_normal(t.size)
    x_smooth, x_dot = smoothing_spline(t, y[:, None], lam=lam)
    reference = make_smoothing_spline(t, y, lam=lam * step**3)
    assert_allclose(x_smooth[:, 0], reference(t), atol=1e-9)
    assert_allclose(x_dot[:, 0], reference.derivative()(t), atol=1e-8)


def test_smoothing_spline_with_gcv_does_not_depend_on_the_time_unit():
    # Chain rule: relabelling seconds as milliseconds divides dx/dt by 1000
    # and leaves the smoothed state alone (common practice).
    rng = np.random.default_rng(12)
    t = jittered_grid(120, 6.0, seed=12)
    x = np.column_stack([np.sin(t), np.cos(2 * t)]) + 0.02 * rng.standard_normal((120, 2))
    smooth_s, dot_s = smoothing_spline(t, x)
    smooth_ms, dot_ms = smoothing_spline(1000.0 * t, x)
    assert_allclose(smooth_ms, smooth_s, atol=1e-9)
    assert_allclose(1000.0 * dot_ms, dot_s, atol=1e-7)


@pytest.mark.parametrize("alpha", [None, 3.0])
def test_kalman_alpha_is_the_packages_alpha_in_samples(alpha):
    # Reference: derivative.Kalman in data units. The random-walk penalty
    # scales as step**-3 like the spline's (see above), so our alpha equals
    # the package's alpha / step**3; None is the package's alpha = 1.
    rng = np.random.default_rng(13)
    step = 0.1
    t = np.arange(50) * step
    y = np.sin(t) + 0.05 * rng.standard_normal(t.size)
    x_smooth, x_dot = kalman(t, y[:, None], noise_ratio=alpha)
    reference = derivative.Kalman(alpha=(1.0 if alpha is None else alpha) * step**3)
    assert_allclose(x_dot[:, 0], reference.d(y, t), atol=1e-8)
    assert_allclose(x_smooth[:, 0], reference.x(y, t), atol=1e-9)


def test_kalman_equals_the_smoothing_spline_with_lam_equal_to_alpha():
    # Wahba (1978), J. R. Stat. Soc. B 40(3): the smoother of an integrated
    # Brownian motion with a flat prior is the cubic smoothing spline.
    rng = np.random.default_rng(14)
    t = jittered_grid(60, 5.0, seed=14)
    x = np.column_stack([np.sin(t), t**2]) + 0.05 * rng.standard_normal((60, 2))
    kalman_smooth, kalman_dot = kalman(t, x, noise_ratio=2.0)
    spline_smooth, spline_dot = smoothing_spline(t, x, lam=2.0)
    assert_allclose(kalman_smooth, spline_smooth, atol=1e-8)
    assert_allclose(kalman_dot, spline_dot, atol=1e-7)


# --- common test over the registry ----------------------------------------------


@pytest.mark.parametrize("method", DERIVATIVE_METHODS)
def test_every_method_returns_a_rough_derivative_of_a_noisy_signal(method):
    # d/dt [sin(t), cos(t)] = [cos(t), -sin(t)]; noise of 1e-3 on a 0.05 step.
    # The tolerance 0.1 is ours: loose enough for a differencing method on
    # noisy data (noise * sqrt(2) / (2 * step) ~ 0.03), tight enough to catch
    # a wrong scale, sign or shift.
    rng = np.random.default_rng(21)
    t = np.arange(200) * 0.05
    truth = np.column_stack([np.sin(t), np.cos(t)])
    x = truth + 1e-3 * rng.standard_normal(truth.shape)
    x_smooth, x_dot = DERIVATIVE_METHODS[method](t, x)
    for a in (x_smooth, x_dot):
        assert a.shape == x.shape
        assert a.dtype == np.float64
        assert np.all(np.isfinite(a))
    trim = default_trim(method, {})
    expected = np.column_stack([np.cos(t), -np.sin(t)])
    assert_allclose(interior(x_dot, trim), interior(expected, trim), atol=0.1)
    assert_allclose(interior(x_smooth, trim), interior(truth, trim), atol=0.02)
    assert min_samples(method, {}) >= 2 * trim + 3


# --- trim and sample counts --------------------------------------------------------


@pytest.mark.parametrize(
    "method, options, trim, needed",
    [
        ("finite_difference", {}, 1, 5),
        ("finite_difference", {"order": 4}, 2, 7),
        ("savitzky_golay", {"window": 11}, 5, 13),
        ("savitzky_golay", {"window": 21, "order": 2}, 10, 23),
        ("smoothing_spline", {"lam": 1.0}, 3, 9),
        ("kalman", {}, 3, 9),
    ],
)
def test_trim_and_min_samples(method, options, trim, needed):
    # Values from the module's documented rule: min_samples is
    # max(method minimum, 2 * trim + 3) (common practice).
    assert default_trim(method, options) == trim
    assert min_samples(method, options) == needed


def test_min_samples_names_unknown_method_and_option():
    with pytest.raises(ConfigError, match=r"\[derivatives\]\.method must be one of .*'kalman'.* Got 'spline'"):
        min_samples("spline", {})
    with pytest.raises(ConfigError, match=r"\['windw'\].*Accepted: \['window', 'order'\]"):
        default_trim("savitzky_golay", {"windw": 7})


# --- error messages --------------------------------------------------------------------


def test_even_window_is_refused():
    t = np.arange(30.0)
    with pytest.raises(ConfigError, match=r"^\[derivatives\]\.window must be an odd int >= 3, or unset \(chosen from the data\)\. Got 10\.$"):
        savitzky_golay(t, np.zeros((30, 1)), window=10)


@pytest.mark.parametrize("window, order", [(5, 5), (5, 7)])
def test_window_not_above_order_is_refused(window, order):
    t = np.arange(30.0)
    message = rf"window must be greater than \[derivatives\]\.order .* Got window = {window}, order = {order}\."
    with pytest.raises(ConfigError, match=message):
        savitzky_golay(t, np.zeros((30, 1)), window=window, order=order)


def test_non_uniform_time_is_refused_by_savitzky_golay():
    t = jittered_grid(40, 4.0, seed=31)
    with pytest.raises(DataError) as caught:
        savitzky_golay(t, np.zeros((40, 1)), window=5, order=2)
    message = str(caught.value)
    assert "non-uniformly sampled" in message
    assert "'smoothing_spline' or 'finite_difference'" in message
    assert "accept non-uniform time" in message


def test_tiny_clock_jitter_is_accepted_by_savitzky_golay():
    # Steps that differ by far less than 1e-6 relative count as uniform.
    t = np.arange(40) * 0.01
    t[1:] += 1e-12 * np.random.default_rng(32).standard_normal(39)
    x_smooth, _ = savitzky_golay(t, np.ones((40, 1)), window=5, order=2)
    assert_allclose(x_smooth, 1.0)


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda t, x: finite_difference(t, x, order=3), r"\[derivatives\]\.order must be 2 or 4 .* Got 3\."),
        (lambda t, x: savitzky_golay(t, x, order=0), r"\[derivatives\]\.order must be an int >= 1 .* Got 0\."),
        (lambda t, x: savitzky_golay(t, x, window=7.0), r"\[derivatives\]\.window must be an odd int >= 3, or unset \(chosen from the data\)\. Got 7\.0\."),
        (lambda t, x: smoothing_spline(t, x, lam=-1.0), r"\[derivatives\]\.lam must be a number >= 0.* Got -1\.0\."),
        (lambda t, x: kalman(t, x, noise_ratio=0.0), r"\[derivatives\]\.noise_ratio must be a number > 0.* Got 0\.0\."),
    ],
)
def test_bad_options_name_the_key_and_the_value(call, match):
    t = np.arange(20.0)
    with pytest.raises(ConfigError, match=match):
        call(t, np.zeros((20, 1)))


def test_too_short_run_is_a_data_error():
    t = np.arange(7.0)
    with pytest.raises(DataError, match=r"savitzky_golay with window = 11 needs at least 11 samples in a run\. Got 7\."):
        savitzky_golay(t, np.zeros((7, 1)), window=11)
    with pytest.raises(DataError, match=r"finite_difference with order = 4 needs uniformly sampled time"):
        finite_difference(jittered_grid(10, 1.0, seed=33), np.zeros((10, 1)), order=4)


# --------------------------------------------------------------------------- the method registry


@pytest.mark.parametrize("name", sorted(__import__("discover.derivatives", fromlist=["METHODS"]).METHODS))
def test_every_method_record_is_complete_and_checks_its_options(name):
    # One common test per registry (the anchors' pattern: scikit-learn's test_common.py).
    from discover.config import validate
    from discover.derivatives import METHODS, default_trim, min_samples

    record = METHODS[name]
    defaults = record.defaults()
    assert default_trim(name, {}) >= 0 and min_samples(name, {}) >= 2 * default_trim(name, {}) + 3
    settings = validate({"data": {"files": ["a.csv"], "states": ["x"]}, "derivatives": {"method": name}})
    assert dict(settings.derivatives.options) == defaults
    for option in record.options:
        bad = -1 if option.minimum is not None else "text"
        with pytest.raises(ConfigError, match=rf"\[derivatives\]\.{option.name} must be"):
            validate({"data": {"files": ["a.csv"], "states": ["x"]},
                      "derivatives": {"method": name, option.name: bad}})
    t = np.linspace(0.0, 2.0, 101)
    x = np.column_stack([1 + 2 * t, 3 - t])  # a line: every method is exact on it (common practice)
    x_smooth, x_dot = record.function(t, x, **defaults)
    trim = default_trim(name, {})
    inner = slice(trim, len(t) - trim)
    np.testing.assert_allclose(x_dot[inner], np.broadcast_to([2.0, -1.0], x_dot[inner].shape), atol=1e-3)


# --- the window chosen from the data (discover.window_choice) -----------------------------

def _hat_matrix(n, window, order):
    """The Savitzky–Golay smoother as an explicit matrix: the filter applied to unit vectors."""
    from scipy.signal import savgol_filter

    return savgol_filter(np.eye(n), window, order, axis=0, mode="interp")


@pytest.mark.parametrize("window, order", [(7, 2), (15, 3), (31, 3)])
def test_gcv_score_uses_the_smoothers_own_diagonal(window, order):
    # Craven & Wahba (1979): GCV = mean(residual^2) / (1 - tr(H)/n)^2 for a linear smoother H.
    # On the interior rows the diagonal of H is the filter's centre weight; checked against
    # the explicit hat matrix built with scipy.signal.savgol_filter.
    H = _hat_matrix(200, window, order)
    interior = np.arange(window // 2, 200 - window // 2)
    assert_allclose(np.diag(H)[interior], savgol_coeffs(window, order)[window // 2], rtol=1e-12)


def test_gcv_window_minimises_the_score_from_the_explicit_hat_matrix():
    from discover.window_choice import gcv_window

    rng = np.random.default_rng(3)
    t = np.linspace(0, 20, 600)
    x = np.sin(t) + 0.3 * np.sin(3.1 * t) + 0.05 * rng.standard_normal(t.size)

    def score(window):  # Craven & Wahba's GCV on the interior rows, from the explicit H
        H = _hat_matrix(t.size, window, 3)
        inner = slice(window // 2, t.size - window // 2)
        residual = (x - H @ x)[inner]
        trace = np.trace(H[inner, inner]) / residual.size
        return np.mean(residual ** 2) / (1 - trace) ** 2

    chosen = gcv_window(x, 3, 61)
    assert chosen == min(range(5, 62, 2), key=score)


@pytest.mark.parametrize("noise", [0.01, 0.05])
def test_window_from_the_data_beats_the_old_fixed_window_on_a_noisy_signal(noise):
    # A two-tone signal with white noise (common practice): the derivative error of the
    # window chosen from the data is below that of the former fixed default (11 samples).
    rng = np.random.default_rng(7)
    t = np.arange(2000) * 0.02
    clean = np.column_stack([np.sin(0.7 * t) + 0.5 * np.cos(1.9 * t), np.cos(0.4 * t)])
    truth = np.column_stack([0.7 * np.cos(0.7 * t) - 0.95 * np.sin(1.9 * t), -0.4 * np.sin(0.4 * t)])
    x = clean + noise * clean.std(axis=0) * rng.standard_normal(clean.shape)
    inner = slice(100, -100)

    def error(**options):
        _, slope = savitzky_golay(t, x, **options)
        return np.sqrt(np.mean((slope[inner] - truth[inner]) ** 2))

    assert error() < 0.5 * error(window=11)


def test_pipeline_chooses_one_window_and_writes_it_into_the_settings(tmp_path):
    import sys
    from pathlib import Path

    import discover

    sys.path.insert(0, str(Path(__file__).parent))
    from systems import oscillator_runs, write_runs

    pattern = write_runs(tmp_path, oscillator_runs(noise=0.02, seed=0, n_runs=2, duration=20.0))
    config = {"data": {"files": [pattern], "states": ["x", "v"], "inputs": ["u"], "held_out": ["run_1"]},
              "terms": {"degree": 3}, "bootstrap": {"members": 0}, "ranking": {"enabled": False},
              "refine": {"enabled": False}, "output": {"figures": False, "report": False}}
    result = discover.run(config)
    window = result.settings.derivatives.options["window"]
    assert isinstance(window, int) and window % 2 == 1 and window > 11
    assert result.smoothed.trim == window // 2
    assert result.model.info["derivatives"]["window"] == window  # replayed by simulate and rank
    from discover.report import summary

    assert f"window {window} chosen from the data" in summary(result)
    # The window fixed in the config is the same run, bit for bit.
    config["derivatives"] = {"window": window}
    np.testing.assert_array_equal(discover.run(config).model.coef, result.model.coef)
