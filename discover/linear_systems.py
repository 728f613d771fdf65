"""Linear systems for the state estimator (:mod:`discover.estimation`).

The linearisation of a model, ∂f/∂x by central differences (:func:`_jacobian`); the
exact discretisation of ``dx = (a x + b u) dt + dβ`` over one step, with the process
noise of continuous white noise by Van Loan's method (:func:`discretize_linear`,
:func:`_van_loan_noise`); and the steady-state Kalman gain of the sampled system
(:func:`steady_state_gain`), which the filter's gain settles at on a linear model.

References
----------
Van Loan, C. F. (1978). Computing integrals involving the matrix exponential.
IEEE Trans. Autom. Control 23(3), 395–404.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy.linalg import LinAlgError, expm, solve_discrete_are

from .estimation_checks import _as_float, _is_real, _square
from .exceptions import DataError

__all__ = ["discretize_linear", "steady_state_gain"]


# Central-difference step for the Jacobian, relative to the state's scale:
# eps^(1/3) balances truncation against rounding (Press et al., Numerical
# Recipes, 3rd ed., §5.7).
JACOBIAN_STEP = np.finfo(float).eps ** (1.0 / 3.0)


def _van_loan_noise(a, q, dt):
    """``∫_0^dt expm(a s) q expm(a s)ᵀ ds``, the noise of one step (Van Loan 1978).

    ``expm([[-a, q], [0, aᵀ]] dt) = [[·, G12], [0, G22]]`` with ``G22 = Φᵀ``,
    ``Φ = expm(a dt)``, and the integral is ``Φ G12``.
    """
    n = len(a)
    block = np.zeros((2 * n, 2 * n))
    block[:n, :n] = -a
    block[:n, n:] = q
    block[n:, n:] = a.T
    exponential = expm(block * dt)
    phi = exponential[n:, n:].T
    qd = phi @ exponential[:n, n:]
    return 0.5 * (qd + qd.T)  # symmetric up to rounding; make it exactly so


def discretize_linear(a: ArrayLike, b: ArrayLike, q: ArrayLike,
                      dt: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact discretisation of ``dx = (a x + b u) dt + dβ`` over one step with u held.

    Parameters
    ----------
    a : ndarray of shape (n_states, n_states)
    b : ndarray of shape (n_states, n_inputs)
    q : ndarray of shape (n_states, n_states)
        Diffusion of the continuous white process noise (covariance added per unit time).
    dt : float > 0

    Returns
    -------
    ad : ndarray of shape (n_states, n_states)
        ``expm(a dt)``.
    bd : ndarray of shape (n_states, n_inputs)
        ``∫_0^dt expm(a s) ds · b``, the input matrix for a zero-order-held input,
        from ``expm([[a, b], [0, 0]] dt)`` (common practice).
    qd : ndarray of shape (n_states, n_states)
        Process noise covariance of one step (Van Loan 1978).
    """
    a = _square("a", a)
    n = len(a)
    b = _as_float("b", b)
    if b.size == 0:
        b = np.zeros((n, 0))
    if b.ndim != 2 or b.shape[0] != n:
        raise DataError(f"`b` must have shape ({n}, n_inputs). Got shape {b.shape}.")
    q = _square("q", q, n)
    if not (_is_real(dt) and dt > 0):
        raise DataError(f"`dt` must be a positive number. Got {dt!r}.")
    m = b.shape[1]
    block = np.zeros((n + m, n + m))
    block[:n, :n] = a
    block[:n, n:] = b
    exponential = expm(block * dt)
    return exponential[:n, :n], exponential[:n, n:], _van_loan_noise(a, q, dt)


def steady_state_gain(a: ArrayLike, c: ArrayLike, q: ArrayLike, r: ArrayLike, dt: float) -> np.ndarray:
    """Steady-state Kalman gain of the sampled linear system ``dx = a x dt + dβ``, ``y = c x + v``.

    The input matrix does not enter the gain, so it is not asked for. The system is
    discretised exactly (:func:`discretize_linear`) and the prior covariance solves
    the discrete algebraic Riccati equation (``scipy.linalg.solve_discrete_are``
    with the dual pair ``(adᵀ, cᵀ)``).

    Parameters
    ----------
    a : ndarray of shape (n_states, n_states)
    c : ndarray of shape (n_outputs, n_states)
    q : ndarray of shape (n_states, n_states)
        Diffusion of the continuous process noise (per unit time).
    r : ndarray of shape (n_outputs, n_outputs)
        Covariance of one sample's measurement noise.
    dt : float > 0
        Sample interval.

    Returns
    -------
    gain : ndarray of shape (n_states, n_outputs)
        ``P cᵀ (c P cᵀ + r)⁻¹`` with P the steady prior covariance, in the form
        ``x_post = x_prior + gain (y - c x_prior)``.
    """
    a = _square("a", a)
    c = np.atleast_2d(_as_float("c", c))
    if c.shape[1] != len(a):
        raise DataError(f"`c` must have {len(a)} columns (one per state). Got shape {c.shape}.")
    r = _square("r", r, c.shape[0])
    ad, _, qd = discretize_linear(a, np.zeros((len(a), 0)), q, dt)
    try:
        prior = solve_discrete_are(ad.T, c.T, qd, r)
    except (LinAlgError, ValueError) as err:
        raise DataError(
            f"the Riccati equation has no stabilising solution ({err}); the states must be "
            "detectable from `c` and `r` positive definite."
        ) from None
    return np.linalg.solve(c @ prior @ c.T + r, c @ prior).T



def _jacobian(f, x, u, scale):
    """∂f/∂x at x (shape (n_states,)) by central differences, one call of f on 2·n_states rows."""
    n = len(x)
    step = JACOBIAN_STEP * np.maximum(np.maximum(np.abs(x), scale), np.finfo(float).tiny)
    shifted = np.vstack([x + np.diag(step), x - np.diag(step)])
    values = np.asarray(f(shifted, np.broadcast_to(u, (2 * n, len(u)))), dtype=float)
    # Row j of the difference is column j of the Jacobian.
    return ((values[:n] - values[n:]) / (2.0 * step)[:, None]).T
