"""SR3, sparse relaxed regularized regression, from Gram matrices.

SR3 (Zheng, Askham, Brunton, Kutz & Aravkin 2019, IEEE Access 7) relaxes the sparse
regression problem by splitting the coefficients in two: ``w``, which fits the data,
and ``v``, which carries the penalty, tied by a quadratic coupling of weight 1/ν:

    min over w, v of  ½‖Ẋ − Θw‖² + λ·R(v) + (1/2ν)‖w − v‖².

With R the l0 count, the iterations alternate (Champion, Zheng, Aravkin, Brunton &
Kutz 2020, IEEE Access 8, Appendix S1)

    w ← (ΘᵀΘ + I/ν)⁻¹ (ΘᵀẊ + v/ν)          (a linear solve)
    v ← H(w)                                (hard thresholding at sqrt(2·λ·ν))

so Θ enters only through the Gram ΘᵀΘ and the cross product ΘᵀẊ: one Cholesky
factorisation of ΘᵀΘ + I/ν per call, then k×k work per iteration for all targets
at once. Our ``threshold`` is the hard-threshold level itself, so that λ = threshold²/(2ν),
which is how pysindy's ``SR3.calculate_l0_weight`` converts a threshold.

The iterations follow pysindy 2.1's ``SR3`` with the l0 regulariser (the reference
implementation our tests compare against): the start is the minimum-norm least-squares
solution, iterations stop once ‖v_k − v_{k−1}‖_F / ν < tol over all targets together
(v_0 being the start), and no final least-squares refit unless asked for (pysindy's
``unbias`` is off by default for SR3).

:func:`sr3_candidates_gram` gives the ranking's SR3 candidates from block Grams,
on the project's dimensionless scale.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import cho_factor, cho_solve

from .selection import Scale, least_squares_gram, scaled_problem

#: Iterations of the ranking's SR3 candidates (as ranking.sr3_candidates uses).
CANDIDATE_MAX_ITER = 200


def least_squares_start(gram, cross):
    """Minimum-norm least-squares solution from Grams.

    ``lstsq(Θ, Ẋ)`` is ``pinv(Θ) Ẋ = pinv(ΘᵀΘ) ΘᵀẊ``, the minimum-norm solution of
    ``ΘᵀΘ c = ΘᵀẊ``; a singular Gram (identically zero or collinear columns) is fine. The
    Gram squares the condition number of Θ, so on nearly collinear columns (condition of
    the Gram near 1/eps) this start can differ from ``lstsq`` on the rows.
    """
    return np.linalg.lstsq(gram, cross, rcond=None)[0]


def sr3_gram(gram, cross, *, threshold, nu=1.0, max_iter=30, tol=1e-5, initial=None, unbias=False):
    """SR3 with the l0 penalty (hard thresholding) from Grams, all targets at once.

    Parameters
    ----------
    gram : ndarray of shape (n_terms, n_terms)
        ΘᵀΘ.
    cross : ndarray of shape (n_terms, n_targets)
        ΘᵀẊ.
    threshold : float or ndarray of shape (n_targets,)
        Hard-threshold level on the relaxed coefficients v: entries with
        ``|w| <= threshold`` are set to zero (the prox of λ·l0 with
        λ = threshold² / (2·nu)). One per target if an array.
    nu : float, default=1.0
        Relaxation ν: larger values let w and v drift further apart.
    max_iter : int, default=30
    tol : float, default=1e-5
        Iterations stop once ‖v_k − v_{k−1}‖_F / ν < tol.
    initial : ndarray of shape (n_terms, n_targets) or None
        Starting v; None starts from the minimum-norm least-squares solution.
    unbias : bool, default=False
        Refit the final support by ordinary least squares.

    Returns
    -------
    coef : ndarray of shape (n_terms, n_targets)
        The sparse coefficients v (or their least-squares refit with ``unbias``).
    converged : bool
        False when ``max_iter`` iterations ran without meeting ``tol``.
    """
    gram = np.asarray(gram, dtype=float)
    cross = np.asarray(cross, dtype=float)
    n_terms, n_targets = cross.shape
    level = np.broadcast_to(np.asarray(threshold, dtype=float), (n_targets,))[None, :]
    sparse = least_squares_start(gram, cross) if initial is None else np.array(initial, dtype=float)
    # ΘᵀΘ + I/ν is positive definite for any ν > 0: factorised once, then two triangular solves per step.
    factor = cho_factor(gram + np.eye(n_terms) / nu, check_finite=False)
    converged = False
    for _ in range(max_iter):
        full = cho_solve(factor, cross + sparse / nu, check_finite=False)
        previous, sparse = sparse, full * (np.abs(full) > level)
        if np.sqrt(np.sum((sparse - previous) ** 2)) / nu < tol:
            converged = True
            break
    if unbias:
        sparse = least_squares_gram(gram, cross, sparse != 0)
    return sparse, converged


def sr3_candidates_gram(blocks, library, thresholds):
    """The ranking's SR3 candidates from block Grams, one per threshold with a non-empty support.

    The same candidates as :func:`discover.ranking.sr3_candidates` gives from the rows:
    SR3 (l0, ν = 1, at most 200 iterations) on the dimensionless problem (columns and
    targets divided by their RMS, Grams divided by the row count), each dimensionless
    threshold used as the hard-threshold level, and each support refitted by least
    squares in data units. Identically zero columns are never selected.

    Parameters
    ----------
    blocks : selection.BlockGrams
        Training block Grams; only their total is used.
    library : terms.Library
    thresholds : sequence of float
        Dimensionless thresholds.

    Returns
    -------
    list of ranking.Candidate
        Named "SR3 threshold <t>", source "sr3".
    """
    from .ranking import Candidate  # here, so that ranking may import this module

    total, count = blocks.total()
    k = len(library)
    scale = Scale.from_gram(total, count, k)
    g, b = scaled_problem(total, count, k, scale)
    start = least_squares_start(g, b)  # the same for every threshold
    out = []
    for threshold in thresholds:
        relaxed, _ = sr3_gram(g, b, threshold=threshold, nu=1.0, max_iter=CANDIDATE_MAX_ITER, initial=start)
        support = (relaxed != 0) & ~scale.zero[:, None]
        if support.any():
            coef = scale.to_units(least_squares_gram(g, b, support))
            out.append(Candidate(f"SR3 threshold {threshold:.3g}", "sr3", tuple(library.names), coef))
    return out
