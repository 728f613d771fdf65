"""Sparse regression on Gram matrices: STLSQ with ridge, thresholds by cross-validation.

Everything here works on the augmented Gram ``[Θ Ẋ]ᵀ[Θ Ẋ]`` of blocks of rows
(DESIGN.md, "Scale"): a fold's training Gram is the total minus the fold's blocks,
and the validation error of a coefficient vector follows from the fold's own Gram,
``‖ẏ − Θξ‖² = ẏᵀẏ − 2ξᵀΘᵀẏ + ξᵀΘᵀΘξ``. No fit after the first pass touches the rows.

Two layers, as in scikit-learn's ``orthogonal_mp`` under its estimator:

* kernels on plain arrays with an *absolute* threshold: :func:`stlsq`,
  :func:`stlsq_gram`, :func:`least_squares_gram`;
* :func:`select`, which puts the problem on a dimensionless scale (each column
  divided by its root-mean-square, each target by its root-mean-square), so that a
  threshold of 0.05 means "a term that contributes less than 5 % of the RMS of the
  derivative is dropped", whatever the units of the columns.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

NOT_CONVERGED = "Thresholding stopped at max_iter={max_iter} before the support settled."
ILL_CONDITIONED = (
    "The scaled Gram matrix of the terms kept for {state!r} has condition number {cond:.2g}; "
    "the coefficients of nearly collinear terms are poorly determined."
)
#: Above this condition number of the scaled Gram of an equation's kept terms, the run
#: warns that their coefficients are poorly determined (an exactly singular system is
#: solved by minimum-norm least squares instead, see :func:`_solve_spd`).
COND_LIMIT = 1e10


# --------------------------------------------------------------------------- kernels


def _solve_spd(matrix, rhs):
    """Solve ``matrix @ c = rhs`` for a symmetric positive (semi)definite ``matrix``.

    numpy's LU solve (a k x k system costs microseconds, and scipy's wrappers cost more
    than the solve at this size); a minimum-norm least-squares solve when the matrix is
    singular, so that collinear terms never crash a fit.
    """
    try:
        return np.linalg.solve(matrix, rhs)
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(matrix, rhs, rcond=None)[0]


def least_squares_gram(gram, cross, support):
    """Ordinary least squares restricted to ``support``, from Grams.

    Parameters
    ----------
    gram : ndarray of shape (n_terms, n_terms)
        ΘᵀΘ.
    cross : ndarray of shape (n_terms, n_targets)
        ΘᵀẊ.
    support : bool ndarray of shape (n_terms, n_targets)

    Returns
    -------
    coef : ndarray of shape (n_terms, n_targets)
        Zero outside the support.
    """
    coef = np.zeros(cross.shape)
    for i in range(cross.shape[1]):
        active = np.flatnonzero(support[:, i])
        if active.size:
            coef[active, i] = _solve_spd(gram[np.ix_(active, active)], cross[active, i])
    return coef


def stlsq_gram(gram, cross, *, threshold, ridge=0.0, max_iter=20, exclude=None, first=None):
    """Sequentially thresholded least squares (Brunton, Proctor & Kutz 2016) from Grams.

    Each iteration solves the ridge problem ``(G_AA + ridge·I) c = b_A`` on the
    active set A and drops the terms with ``|c| < threshold``; iterations stop when
    the support no longer changes. The result is refitted by ordinary least squares
    on the final support ("unbiased"), as the reference implementation does.

    Parameters
    ----------
    gram : ndarray of shape (n_terms, n_terms)
    cross : ndarray of shape (n_terms, n_targets)
    threshold : float or ndarray of shape (n_targets,)
        Absolute threshold on the coefficients, one per target if an array.
    ridge : float, default=0.0
        Ridge weight added to the diagonal of the Gram during thresholding.
    max_iter : int, default=20
    exclude : bool ndarray of shape (n_terms,) or None
        Terms never allowed in (for example identically zero columns).
    first : ndarray or None
        The ridge solution on the starting active set, if already known (it does not
        depend on the threshold, so a threshold sweep computes it once).

    Returns
    -------
    coef : ndarray of shape (n_terms, n_targets)
    converged : bool
    """
    n_terms, n_targets = cross.shape
    thresholds = np.broadcast_to(np.asarray(threshold, dtype=float), (n_targets,))
    support = np.ones((n_terms, n_targets), dtype=bool)
    if exclude is not None:
        support[exclude] = False
    converged = True
    # Every target starts from the same active set: one solve with all right-hand sides.
    start = np.flatnonzero(support[:, 0])
    if first is None and start.size:
        first = first_solution(gram, cross, start, ridge)
    for i in range(n_targets):
        active = support[:, i]
        for iteration in range(max_iter):
            index = np.flatnonzero(active)
            if index.size == 0:
                break
            if iteration == 0:
                solution = first[:, i]
            else:
                solution = _solve_spd(gram[np.ix_(index, index)] + ridge * np.eye(index.size), cross[index, i])
            keep = np.abs(solution) >= thresholds[i]
            if keep.all():
                break
            active[index[~keep]] = False
        else:
            converged = False
    return least_squares_gram(gram, cross, support), converged


def first_solution(gram, cross, start, ridge):
    """Ridge solution of every target on the starting active set ``start``."""
    return _solve_spd(gram[np.ix_(start, start)] + ridge * np.eye(start.size), cross[start])


def stlsq(theta, x_dot, *, threshold, ridge=0.0, max_iter=20):
    """STLSQ on a library matrix: Θ of shape (n_samples, n_terms), Ẋ of shape (n_samples, n_targets).

    A thin wrapper of :func:`stlsq_gram` for tests against the reference
    implementation and for small problems. Returns coef of shape (n_terms, n_targets).
    """
    theta = np.asarray(theta, dtype=float)
    x_dot = np.asarray(x_dot, dtype=float).reshape(len(theta), -1)
    coef, converged = stlsq_gram(
        theta.T @ theta, theta.T @ x_dot, threshold=threshold, ridge=ridge, max_iter=max_iter
    )
    if not converged:
        warnings.warn(NOT_CONVERGED.format(max_iter=max_iter), stacklevel=2)
    return coef


# --------------------------------------------------------------------------- block Grams


@dataclass(frozen=True)
class BlockGrams:
    """Augmented Grams of contiguous blocks of rows.

    Attributes
    ----------
    grams : ndarray of shape (n_blocks, n_terms + n_targets, n_terms + n_targets)
        ``[Θ_b Ẋ_b]ᵀ [Θ_b Ẋ_b]`` for each block b.
    counts : ndarray of shape (n_blocks,)
        Rows in each block.
    runs : ndarray of shape (n_blocks,)
        Index of the run each block comes from.
    n_terms : int
    """

    grams: np.ndarray
    counts: np.ndarray
    runs: np.ndarray
    n_terms: int
    positions: np.ndarray | None = None  # index of each block within its run
    # Samples of its run each block stands for, where rows are not samples (weak windows);
    # None: counts. Ranking maps CV folds back onto the runs with it.
    samples: np.ndarray | None = None

    def total(self, weights=None):
        """Weighted sum of block Grams, summed in block order (deterministic)."""
        if weights is None:
            return self.grams.sum(axis=0), int(self.counts.sum())
        weights = np.asarray(weights, dtype=float)
        return np.tensordot(weights, self.grams, axes=1), float(weights @ self.counts)


def sub_block_sizes(n_rows, sub_length, n_folds):
    """Rows of each contiguous sub-block of a run: about ``sub_length`` rows, at least
    ``n_folds`` sub-blocks (every path, in memory or in chunks, cuts runs this way)."""
    n_sub = min(n_rows, max(n_folds, n_rows // sub_length))
    base, extra = divmod(n_rows, n_sub)
    return [base + 1] * extra + [base] * (n_sub - extra)


def block_grams(blocks, n_terms=None):
    """Block Grams from an iterable of ``(run_index, theta, x_dot)`` blocks.

    One product ``[Θ Ẋ]ᵀ[Θ Ẋ]`` per block: it costs about as much as ΘᵀΘ alone. A block
    may also come as ``(run_index, z, None)`` with z = [Θ Ẋ] already side by side
    (no copy); then ``n_terms`` says where Θ ends.
    """
    grams, counts, runs, positions = [], [], [], []
    for run_index, theta, x_dot in blocks:
        z = theta if x_dot is None else np.hstack([theta, x_dot])
        if x_dot is not None:
            n_terms = theta.shape[1]
        grams.append(z.T @ z)
        counts.append(len(z))
        positions.append(positions[-1] + 1 if runs and runs[-1] == run_index else 0)
        runs.append(run_index)
    return BlockGrams(np.array(grams), np.array(counts), np.array(runs), n_terms, np.array(positions))


def split_gram(augmented, n_terms):
    """``(ΘᵀΘ, ΘᵀẊ, ẊᵀẊ)`` from an augmented Gram."""
    return (
        augmented[:n_terms, :n_terms],
        augmented[:n_terms, n_terms:],
        augmented[n_terms:, n_terms:],
    )


# --------------------------------------------------------------------------- dimensionless layer


@dataclass(frozen=True)
class Scale:
    """Root-mean-square of every term column and every target, from a Gram."""

    terms: np.ndarray
    targets: np.ndarray
    zero: np.ndarray  # terms that are identically zero on these rows

    @classmethod
    def from_gram(cls, augmented, count, n_terms):
        gram, _, target_gram = split_gram(augmented, n_terms)
        terms = np.sqrt(np.clip(np.diag(gram), 0.0, None) / count)
        targets = np.sqrt(np.clip(np.diag(target_gram), 0.0, None) / count)
        zero = terms <= 1e-300
        return cls(np.where(zero, 1.0, terms), np.where(targets > 0, targets, 1.0), zero)

    def to_units(self, scaled_coef):
        """ξ_ij = ξ̃_ij · rms(ẋ_i) / rms(θ_j)."""
        return scaled_coef * self.targets[None, :] / self.terms[:, None]


def scaled_problem(augmented, count, n_terms, scale):
    """Gram and cross products of the scaled columns, divided by the row count."""
    gram, cross, _ = split_gram(augmented, n_terms)
    inv = 1.0 / scale.terms
    g = gram * inv[:, None] * inv[None, :] / count
    b = cross * inv[:, None] / scale.targets[None, :] / count
    return g, b


def fit_scaled(augmented, count, n_terms, *, threshold, ridge, max_iter, scale=None):
    """STLSQ with a dimensionless threshold; returns coef in data units and the converged flag."""
    scale = scale or Scale.from_gram(augmented, count, n_terms)
    g, b = scaled_problem(augmented, count, n_terms, scale)
    scaled, converged = stlsq_gram(
        g, b, threshold=threshold, ridge=ridge, max_iter=max_iter, exclude=scale.zero
    )
    return scale.to_units(scaled), converged


def fit_path(augmented, count, n_terms, thresholds, *, ridge, max_iter, scale=None):
    """:func:`fit_scaled` at each threshold, sharing the scaled problem and the first solve."""
    scale = scale or Scale.from_gram(augmented, count, n_terms)
    g, b = scaled_problem(augmented, count, n_terms, scale)
    start = np.flatnonzero(~scale.zero)
    first = first_solution(g, b, start, ridge) if start.size else None
    return [scale.to_units(stlsq_gram(g, b, threshold=t, ridge=ridge, max_iter=max_iter, exclude=scale.zero,
                                      first=first)[0]) for t in thresholds]


def relative_error(augmented, coef, n_terms):
    """‖ẋ_i − Θξ_i‖² / ‖ẋ_i‖² for each target, from a Gram (clipped at 0 for round-off)."""
    gram, cross, target_gram = split_gram(augmented, n_terms)
    sse = np.diag(target_gram) - 2 * np.einsum("ki,ki->i", coef, cross) + np.einsum(
        "ki,kl,li->i", coef, gram, coef
    )
    return np.clip(sse, 0.0, None) / np.where(np.diag(target_gram) > 0, np.diag(target_gram), 1.0)


def condition_numbers(augmented, count, n_terms, support):
    """Condition number of the scaled Gram of each target's selected terms."""
    scale = Scale.from_gram(augmented, count, n_terms)
    g, _ = scaled_problem(augmented, count, n_terms, scale)
    result = np.ones(support.shape[1])
    for i in range(support.shape[1]):
        index = np.flatnonzero(support[:, i])
        if index.size:
            result[i] = np.linalg.cond(g[np.ix_(index, index)])
    return result


# --------------------------------------------------------------------------- cross-validation


@dataclass(frozen=True)
class CVCurve:
    """Cross-validation of the dimensionless threshold.

    Attributes
    ----------
    thresholds : ndarray of shape (n_thresholds,)
    error : ndarray of shape (n_thresholds, n_targets)
        Mean over folds of the relative squared validation error of the derivative.
    error_se : ndarray of shape (n_thresholds, n_targets)
        Standard error of that mean over folds.
    n_terms : ndarray of shape (n_thresholds, n_targets)
        Terms kept by the fit on all training rows at each threshold.
    selected : ndarray of shape (n_targets,)
        The threshold chosen for each target.
    rule : str
    """

    thresholds: np.ndarray
    error: np.ndarray
    error_se: np.ndarray
    n_terms: np.ndarray
    selected: np.ndarray
    rule: str




def choose_threshold(thresholds, error, error_se, rule):
    """Pick one threshold per target from a CV curve.

    ``"min"`` takes the smallest mean error. ``"one_se"`` takes the largest
    threshold whose mean error is within one standard error of the minimum
    (Hastie, Tibshirani & Friedman, *The Elements of Statistical Learning*, 2nd ed.,
    §7.10): the sparsest model the folds cannot tell apart from the best.
    """
    best = np.argmin(error, axis=0)
    if rule == "min":
        return thresholds[best]
    chosen = np.empty(error.shape[1])
    for i, b in enumerate(best):
        limit = error[b, i] + error_se[b, i]
        chosen[i] = thresholds[np.flatnonzero(error[:, i] <= limit).max()]
    return chosen


def cross_validate(block_set, folds, thresholds, *, ridge, max_iter, rule="one_se"):
    """Cross-validate dimensionless thresholds over folds of blocks.

    Parameters
    ----------
    block_set : BlockGrams
    folds : ndarray of shape (n_blocks,)
        Fold label of each block; a fold's blocks are held out together.
    thresholds : ndarray of shape (n_thresholds,), ascending
    ridge, max_iter : as for :func:`stlsq_gram` on the scaled problem
    rule : {"one_se", "min"}

    Returns
    -------
    CVCurve
    """
    k = block_set.n_terms
    total, total_count = block_set.total()
    labels = np.unique(folds)
    fold_grams = [block_set.grams[folds == f].sum(axis=0) for f in labels]
    fold_counts = [int(block_set.counts[folds == f].sum()) for f in labels]
    n_targets = total.shape[0] - k
    errors = np.empty((len(thresholds), len(labels), n_targets))
    n_terms = np.empty((len(thresholds), n_targets), dtype=int)
    for f, (held, held_count) in enumerate(zip(fold_grams, fold_counts)):
        train, train_count = total - held, total_count - held_count
        path = fit_path(train, train_count, k, thresholds, ridge=ridge, max_iter=max_iter)
        for t, coef in enumerate(path):
            errors[t, f] = relative_error(held, coef, k)
    for t, coef in enumerate(fit_path(total, total_count, k, thresholds, ridge=ridge, max_iter=max_iter)):
        n_terms[t] = np.count_nonzero(coef, axis=0)
    error = errors.mean(axis=1)
    error_se = errors.std(axis=1, ddof=1) / np.sqrt(len(labels)) if len(labels) > 1 else np.zeros_like(error)
    selected = choose_threshold(thresholds, error, error_se, rule)
    return CVCurve(np.asarray(thresholds), error, error_se, n_terms, selected, rule)


# --------------------------------------------------------------------------- the selection stage


@dataclass(frozen=True)
class Selection:
    """The single sparse model of the selection stage.

    Attributes
    ----------
    coef : ndarray of shape (n_terms, n_states)
        In the data's units.
    thresholds : ndarray of shape (n_states,)
        The dimensionless threshold of each equation (cross-validated or fixed).
    cv : CVCurve or None
        None for a fixed threshold.
    split : str or None
        How the CV folds were cut ("runs" or "blocks").
    converged : bool
    warnings : tuple of str
    """

    coef: np.ndarray
    thresholds: np.ndarray
    cv: CVCurve | None
    split: str | None
    converged: bool
    warnings: tuple


def threshold_grid(selection):
    """The thresholds to cross-validate, ascending, from the ``[selection]`` settings."""
    if selection.thresholds is not None:
        return np.unique(np.asarray(selection.thresholds, dtype=float))
    return np.geomspace(selection.threshold_min, selection.threshold_max, selection.threshold_count)


def select_terms(selection, blocks, folds, state_names, *, split=None):
    """Cross-validate the threshold per state (or take the fixed one) and fit the model.

    Parameters
    ----------
    selection : the ``[selection]`` settings
    blocks : BlockGrams
    folds : ndarray of shape (n_blocks,)
        CV fold of each block.
    """
    k = blocks.n_terms
    total, count = blocks.total()
    cv = None
    if selection.threshold == "cv":
        cv = cross_validate(blocks, folds, threshold_grid(selection), ridge=selection.ridge,
                            max_iter=selection.max_iter, rule=selection.cv_rule)
        thresholds = cv.selected
    else:
        thresholds = np.full(len(state_names), selection.threshold)
    coef, converged = fit_scaled(total, count, k, threshold=thresholds, ridge=selection.ridge,
                                 max_iter=selection.max_iter)
    notes = []
    if not converged:
        notes.append(NOT_CONVERGED.format(max_iter=selection.max_iter))
    for state, cond in zip(state_names, condition_numbers(total, count, k, coef != 0)):
        if cond > COND_LIMIT:
            notes.append(ILL_CONDITIONED.format(state=state, cond=cond))
    for i, state in enumerate(state_names):
        if not np.any(coef[:, i]):
            notes.append(f"Every term of d({state})/dt fell below the threshold {thresholds[i]:.3g}; "
                         "its equation is empty (dx/dt = 0).")
    return Selection(coef, np.asarray(thresholds, dtype=float), cv, split if cv is not None else None,
                     bool(converged), tuple(notes))
