"""SR3 from Grams, against pysindy's SR3 (reference implementation) on the same library matrix."""

import warnings

import numpy as np
import pytest
from numpy.testing import assert_allclose
from systems import lorenz_input, lorenz_with_input, simulate_true

from discover import ranking
from discover.selection import block_grams
from discover.sr3 import sr3_candidates_gram, sr3_gram
from discover.terms import build_library

pysindy = pytest.importorskip("pysindy")
from pysindy.optimizers import SR3  # noqa: E402
from sklearn.exceptions import ConvergenceWarning  # noqa: E402


def reference_sr3(theta, x_dot, *, threshold, nu, max_iter, unbias=False):
    """pysindy SR3 with the l0 regulariser; λ from the threshold as pysindy converts it."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        opt = SR3(reg_weight_lam=SR3.calculate_l0_weight(threshold, nu), relax_coeff_nu=nu, regularizer="L0",
                  max_iter=max_iter, unbias=unbias).fit(theta, x_dot)
    converged = not any(issubclass(w.category, ConvergenceWarning) for w in caught)
    return opt.coef_.T, converged


def ours(theta, x_dot, **options):
    return sr3_gram(theta.T @ theta, theta.T @ x_dot, **options)


def forced_lorenz_problem():
    """Degree-2 library in (x, y, z, u) on the forced Lorenz system (tests/systems.py), noisy derivatives."""
    t = np.arange(0.0, 5.0, 0.005)
    x = simulate_true(lorenz_with_input, [-8.0, 7.0, 27.0], t)
    z = np.column_stack([x, lorenz_input(t)])
    rng = np.random.default_rng(0)
    x_dot = np.array([lorenz_with_input(ti, xi) for ti, xi in zip(t, x)]) + rng.normal(scale=2.0, size=x.shape)
    columns = [np.ones(len(t))] + [z[:, i] for i in range(4)]
    columns += [z[:, i] * z[:, j] for i in range(4) for j in range(i, 4)]
    return np.column_stack(columns), x_dot


def random_problem(seed=1, n_samples=400, n_terms=12):
    """Well-conditioned random columns and a sparse truth plus noise."""
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=(n_samples, n_terms)) * rng.uniform(0.5, 2.0, n_terms)
    xi = np.zeros((n_terms, 3))
    xi[[0, 4, 9], 0] = [1.2, -0.6, 0.25]
    xi[[2, 3], 1] = [-2.0, 0.4]
    xi[[1, 6, 7, 11], 2] = [0.8, 0.15, -1.1, 0.5]
    return theta, theta @ xi + 0.1 * rng.normal(size=(n_samples, 3))


@pytest.mark.parametrize("threshold, nu, max_iter", [
    (0.05, 1.0, 30), (0.3, 1.0, 30), (0.5, 0.1, 100), (2.0, 10.0, 50), (0.5, 1e-3, 100),
])
def test_sr3_matches_pysindy_on_forced_lorenz(threshold, nu, max_iter):
    # Reference: pysindy SR3 (regularizer "L0", reg_weight_lam = threshold²/(2ν) by its
    # calculate_l0_weight) on the same raw library matrix; the last case stops at max_iter.
    theta, x_dot = forced_lorenz_problem()
    coef, converged = ours(theta, x_dot, threshold=threshold, nu=nu, max_iter=max_iter)
    ref, ref_converged = reference_sr3(theta, x_dot, threshold=threshold, nu=nu, max_iter=max_iter)
    np.testing.assert_array_equal(coef != 0, ref != 0)
    assert_allclose(coef, ref, rtol=0, atol=1e-6)
    assert converged == ref_converged


def test_sr3_recovers_forced_lorenz_structure():
    # Lorenz (1963) with σ=10, ρ=28, β=8/3 and our input on dx/dt (tests/systems.py): SR3
    # keeps the true terms (indices in forced_lorenz_problem's column order); the derivatives
    # are noisy, so the coefficients are compared after the least-squares refit.
    theta, x_dot = forced_lorenz_problem()
    coef, _ = ours(theta, x_dot, threshold=0.5, nu=0.1, max_iter=100, unbias=True)
    assert set(np.flatnonzero(coef[:, 0])) >= {1, 2, 4}
    assert set(np.flatnonzero(coef[:, 1])) == {1, 2, 7}
    assert set(np.flatnonzero(coef[:, 2])) == {3, 6}
    assert_allclose(coef[[1, 2, 4], 0], [-10.0, 10.0, 1.0], atol=0.05)
    assert_allclose(coef[[1, 2, 7], 1], [28.0, -1.0, -1.0], atol=0.05)
    assert_allclose(coef[[3, 6], 2], [-8.0 / 3.0, 1.0], atol=0.05)


@pytest.mark.parametrize("threshold", [0.1, 0.3, 0.7])
@pytest.mark.parametrize("nu", [0.3, 1.0, 5.0])
def test_sr3_matches_pysindy_on_random_problem(threshold, nu):
    # Reference: pysindy SR3, l0, default max_iter=30 and tol=1e-5.
    theta, x_dot = random_problem()
    coef, converged = ours(theta, x_dot, threshold=threshold, nu=nu, max_iter=30)
    ref, ref_converged = reference_sr3(theta, x_dot, threshold=threshold, nu=nu, max_iter=30)
    np.testing.assert_array_equal(coef != 0, ref != 0)
    assert_allclose(coef, ref, rtol=0, atol=1e-6)
    assert converged == ref_converged


def test_sr3_unbias_matches_pysindy():
    # Reference: pysindy SR3 with unbias=True (least-squares refit of the final support).
    theta, x_dot = random_problem(seed=4)
    coef, _ = ours(theta, x_dot, threshold=0.3, nu=1.0, max_iter=30, unbias=True)
    ref, _ = reference_sr3(theta, x_dot, threshold=0.3, nu=1.0, max_iter=30, unbias=True)
    assert_allclose(coef, ref, rtol=0, atol=1e-6)


def test_sr3_per_target_threshold_matches_separate_fits():
    # One threshold per target equals fitting each target alone: the iterations are
    # column-wise except for the joint stopping test, so run both to full convergence.
    theta, x_dot = random_problem(seed=2)
    levels = np.array([0.1, 0.5, 0.3])
    coef, _ = ours(theta, x_dot, threshold=levels, nu=1.0, max_iter=500, tol=1e-13)
    for i, level in enumerate(levels):
        ref, _ = reference_sr3(theta, x_dot[:, [i]], threshold=level, nu=1.0, max_iter=500)
        np.testing.assert_array_equal(coef[:, i] != 0, ref[:, 0] != 0)
        assert_allclose(coef[:, i], ref[:, 0], rtol=0, atol=1e-6)


def small_pieces(seed=3, n_runs=2, n_blocks=4, n_rows=300):
    """Blocks (run, Θ, Ẋ) of a 2-state, 1-input polynomial problem with correlated rows."""
    rng = np.random.default_rng(seed)
    library = build_library(["x1", "x2"], ["u"], degree=2)
    column = {name: j for j, name in enumerate(library.names)}
    xi = np.zeros((len(library), 2))
    xi[[column["x1"], column["x2"]], 0] = [-1.0, 2.0]
    xi[[column["x2"], column["x1*u"]], 1] = [-0.4, 0.7]
    pieces = []
    for r in range(n_runs):
        z = np.cumsum(rng.normal(size=(n_rows, 3)), axis=0) / np.sqrt(n_rows)
        theta = library.evaluate(z[:, :2], z[:, 2:])
        x_dot = theta @ xi + 0.5 * rng.normal(size=(n_rows, 2))
        for rows in np.array_split(np.arange(n_rows), n_blocks):
            pieces.append((r, theta[rows], x_dot[rows]))
    return library, pieces


def test_sr3_candidates_gram_equals_rows_version():
    # Reference: rows_sr3_candidates below, which fits pysindy's SR3 on the scaled rows.
    library, pieces = small_pieces()
    thresholds = np.geomspace(0.01, 2.0, 12)
    expected = rows_sr3_candidates(pieces, library, thresholds)
    got = sr3_candidates_gram(block_grams(pieces), library, thresholds)
    assert [c.name for c in got] == [c.name for c in expected]
    assert {c.source for c in got} == {"sr3"}
    assert len(got) > 3
    for g, e in zip(got, expected):
        assert g.terms == e.terms
        np.testing.assert_array_equal(g.coef != 0, e.coef != 0)
        assert_allclose(g.coef, e.coef, rtol=0, atol=1e-6)
    # The sweep runs from nearly every term down to a sparse model.
    assert got[0].n_terms > got[-1].n_terms


def test_sr3_candidates_gram_never_selects_a_zero_column():
    # An identically zero term (a constant input) keeps a zero coefficient, as in the rows version.
    library, pieces = small_pieces(seed=5)
    u_index = list(library.names).index("u")
    pieces = [(r, theta.copy(), x_dot) for r, theta, x_dot in pieces]
    for _, theta, _ in pieces:
        theta[:, u_index] = 0.0
    thresholds = [0.01, 0.1]
    got = sr3_candidates_gram(block_grams(pieces), library, thresholds)
    expected = rows_sr3_candidates(pieces, library, thresholds)
    for g, e in zip(got, expected):
        assert not g.coef[u_index].any()
        assert_allclose(g.coef, e.coef, rtol=0, atol=1e-6)


def rows_sr3_candidates(pieces, library, thresholds):
    """The reference path: candidates from SR3 (Zheng, Askham, Brunton, Kutz & Aravkin 2019), pysindy's
    implementation, on our scaled library matrix; each support is refitted by least squares.

    With the L0 regulariser the relaxed coefficients are hard-thresholded at
    sqrt(2·λ·ν); λ is set so that this equals each dimensionless threshold.
    """
    import warnings

    from pysindy.optimizers import SR3

    from discover.selection import Scale, block_grams, least_squares_gram, scaled_problem

    theta = np.vstack([p[1] for p in pieces])
    x_dot = np.vstack([p[2] for p in pieces])
    blocks = block_grams([(0, theta, x_dot)])
    total, count = blocks.total()
    k = len(library)
    scale = Scale.from_gram(total, count, k)
    theta_s = theta / scale.terms
    x_dot_s = x_dot / scale.targets
    g, b = scaled_problem(total, count, k, scale)
    out = []
    for threshold in thresholds:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            opt = SR3(reg_weight_lam=threshold**2 / 2.0, relax_coeff_nu=1.0, regularizer="L0", max_iter=200)
            opt.fit(theta_s / np.sqrt(count), x_dot_s / np.sqrt(count))
        support = (opt.coef_.T != 0) & ~scale.zero[:, None]
        if support.any():
            coef = scale.to_units(least_squares_gram(g, b, support))
            out.append(ranking.Candidate(f"SR3 threshold {threshold:.3g}", "sr3", tuple(library.names), coef))
    return out
