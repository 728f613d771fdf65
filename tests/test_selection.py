"""Sparse regression on Grams, against pysindy's STLSQ (reference implementation)."""

import warnings

import numpy as np
import pytest
from numpy.testing import assert_allclose

from discover.selection import (
    Scale,
    block_grams,
    choose_threshold,
    cross_validate,
    fit_scaled,
    relative_error,
    stlsq,
)

pysindy = pytest.importorskip("pysindy")
from pysindy.optimizers import STLSQ  # noqa: E402


def sparse_problem(seed=0, n_samples=600, n_terms=12, noise=0.05):
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=(n_samples, n_terms)) * rng.uniform(0.5, 3.0, n_terms)
    xi = np.zeros((n_terms, 3))
    xi[[0, 3, 7], 0] = [1.0, -2.0, 0.5]
    xi[[1, 2], 1] = [0.3, 1.5]
    xi[[4, 5, 9], 2] = [2.0, 0.2, -0.8]
    return theta, theta @ xi + noise * rng.normal(size=(n_samples, 3)), xi


def reference_stlsq(theta, x_dot, threshold, ridge):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = STLSQ(threshold=threshold, alpha=ridge, max_iter=20).fit(theta, x_dot)
    return opt.coef_.T


@pytest.mark.parametrize("threshold", [0.01, 0.1, 0.25, 0.4, 0.6])
@pytest.mark.parametrize("ridge", [0.0, 0.05, 10.0])
def test_stlsq_matches_pysindy(threshold, ridge):
    # Reference: pysindy STLSQ on the same library matrix, threshold and ridge.
    theta, x_dot, _ = sparse_problem()
    ours = stlsq(theta, x_dot, threshold=threshold, ridge=ridge)
    ref = reference_stlsq(theta, x_dot, threshold, ridge)
    np.testing.assert_array_equal(ours != 0, ref != 0)
    assert_allclose(ours, ref, rtol=1e-8, atol=0)


def test_stlsq_matches_pysindy_on_polynomial_library():
    # Reference: pysindy STLSQ; a degree-3 polynomial library of correlated columns.
    rng = np.random.default_rng(3)
    z = rng.uniform(-1.5, 1.5, size=(800, 2))
    columns = [np.ones(800)] + [z[:, 0] ** a * z[:, 1] ** b for a in range(4) for b in range(4 - a) if a + b > 0]
    theta = np.column_stack(columns)
    x_dot = np.column_stack([theta[:, 1] - 0.5 * theta[:, 4], 2 * theta[:, 2] + 0.1 * theta[:, 7]])
    x_dot += 0.01 * rng.normal(size=x_dot.shape)
    for threshold in (0.05, 0.2):
        ours = stlsq(theta, x_dot, threshold=threshold, ridge=1e-3)
        ref = reference_stlsq(theta, x_dot, threshold, 1e-3)
        np.testing.assert_array_equal(ours != 0, ref != 0)
        assert_allclose(ours, ref, rtol=1e-8)


def test_fit_scaled_equals_pysindy_on_scaled_columns():
    # The dimensionless layer is STLSQ on columns divided by their RMS, the target by
    # its RMS, with the ridge scaled by the row count (our Gram is a mean, not a sum).
    theta, x_dot, _ = sparse_problem(seed=5)
    n = len(theta)
    blocks = block_grams([(0, theta, x_dot)])
    total, count = blocks.total()
    ours, _ = fit_scaled(total, count, theta.shape[1], threshold=0.1, ridge=1e-3, max_iter=20)
    s_theta = np.sqrt(np.mean(theta**2, axis=0))
    s_y = np.sqrt(np.mean(x_dot**2, axis=0))
    ref_scaled = reference_stlsq(theta / s_theta, x_dot / s_y, 0.1, 1e-3 * n)
    assert_allclose(ours, ref_scaled * s_y / s_theta[:, None], rtol=1e-8)


def test_threshold_is_unit_invariant():
    # Rescaling a column (a change of units) leaves the support unchanged and scales its
    # coefficient inversely: the point of the dimensionless threshold (DESIGN.md).
    theta, x_dot, _ = sparse_problem(seed=2)
    theta2 = theta.copy()
    theta2[:, 3] *= 1000.0
    fits = []
    for th in (theta, theta2):
        total, count = block_grams([(0, th, x_dot)]).total()
        fits.append(fit_scaled(total, count, th.shape[1], threshold=0.05, ridge=1e-6, max_iter=20)[0])
    np.testing.assert_array_equal(fits[0] != 0, fits[1] != 0)
    assert_allclose(fits[1][3], fits[0][3] / 1000.0, rtol=1e-6)


def test_fold_error_from_grams_equals_direct_computation():
    # ‖y − Θξ‖² from the fold's Gram equals the sum over its rows (algebra; common practice).
    theta, x_dot, xi = sparse_problem(seed=1)
    grams = block_grams([(0, theta[:300], x_dot[:300]), (0, theta[300:], x_dot[300:])])
    held = grams.grams[1]
    direct = np.sum((x_dot[300:] - theta[300:] @ xi) ** 2, axis=0) / np.sum(x_dot[300:] ** 2, axis=0)
    assert_allclose(relative_error(held, xi, theta.shape[1]), direct, rtol=1e-10)


def test_cross_validation_recovers_support_and_prefers_sparse_thresholds():
    theta, x_dot, xi = sparse_problem(seed=4, n_samples=1000)
    pieces = [(0, theta[rows], x_dot[rows]) for rows in np.array_split(np.arange(1000), 5)]
    blocks = block_grams(pieces)
    thresholds = np.geomspace(1e-3, 1.0, 20)
    cv = cross_validate(blocks, np.arange(5), thresholds, ridge=1e-6, max_iter=20)
    total, count = blocks.total()
    coef, _ = fit_scaled(total, count, theta.shape[1], threshold=cv.selected, ridge=1e-6, max_iter=20)
    np.testing.assert_array_equal(coef != 0, xi != 0)
    # The term count along the path never rises as the threshold grows (STLSQ path; common practice).
    assert np.all(np.diff(cv.n_terms, axis=0) <= 0)


def test_one_se_rule_takes_the_largest_threshold_within_one_standard_error():
    # Hastie, Tibshirani & Friedman (2009), ESL 2nd ed., §7.10: the one-standard-error rule.
    thresholds = np.array([0.01, 0.1, 1.0])
    error = np.array([[0.10], [0.105], [0.5]])
    se = np.array([[0.01], [0.01], [0.01]])
    assert choose_threshold(thresholds, error, se, "one_se")[0] == 0.1
    assert choose_threshold(thresholds, error, se, "min")[0] == 0.01


def test_zero_column_is_excluded_not_fatal():
    theta, x_dot, _ = sparse_problem(seed=6)
    theta[:, 11] = 0.0
    total, count = block_grams([(0, theta, x_dot)]).total()
    scale = Scale.from_gram(total, count, theta.shape[1])
    assert scale.zero[11] and not scale.zero[:11].any()
    coef, _ = fit_scaled(total, count, theta.shape[1], threshold=0.05, ridge=0.0, max_iter=20)
    assert np.all(coef[11] == 0) and np.isfinite(coef).all()
