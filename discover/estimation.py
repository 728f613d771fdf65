"""State estimation on a continuous-time model: unscented Kalman filter and RTS smoother.

Given a model ``dx/dt = f(x, u)`` with outputs ``y = h(x, u)`` and one run's
samples ``(t, y, u)``, :func:`estimate_states` returns the filtered and the
smoothed state trajectory with its standard deviation, including states that
are not measured. The engine is ``filterpy``'s
:class:`~filterpy.kalman.UnscentedKalmanFilter` with
:class:`~filterpy.kalman.MerweScaledSigmaPoints` (Julier 2002; Wan & van der
Merwe 2000) and its unscented Rauch–Tung–Striebel smoother (Rauch, Tung &
Striebel 1965; Särkkä 2008). This module supplies what turns the library's
discrete-time filter into one for a continuous-time model sampled at arbitrary
times:

- the transition over each sample interval, a fixed-step RK4 integration of
  ``f`` with the recorded input interpolated by the simulation rule
  (:func:`discover.simulate.input_function`: ``"linear"`` or ``"zoh"``);
- the process noise of each interval, the discretisation of continuous white
  noise (Van Loan 1978) through the model's Jacobian (:mod:`discover.linear_systems`);
- one transition and one process-noise matrix per interval, also in the
  smoother (filterpy's ``rts_smoother`` uses one ``fx`` and one ``Q`` for all
  steps, so it is called on one interval at a time).

For a linear model the unscented transform is exact, so the filter is the
Kalman filter (Kalman 1960) of the exactly discretised system and its gain
settles at :func:`steady_state_gain`.

Noise model
-----------
``dx = f(x, u) dt + dβ`` with β a Brownian motion of diffusion
``diag(process_std**2)`` (variance added per unit time), and
``y_k = h(x(t_k), u(t_k)) + v_k`` with ``v_k ~ N(0, diag(measurement_std**2))``.
Over an interval of length dt the process noise covariance is, to first order,
``diag(process_std**2) * dt``; Van Loan's integral adds the higher orders, which
makes it exact for a linear model.

References
----------
Kalman, R. E. (1960). A new approach to linear filtering and prediction
problems. J. Basic Eng. 82(1), 35–45.
Rauch, H. E., Tung, F. & Striebel, C. T. (1965). Maximum likelihood estimates of
linear dynamic systems. AIAA J. 3(8), 1445–1450.
Van Loan, C. F. (1978). Computing integrals involving the matrix exponential.
IEEE Trans. Autom. Control 23(3), 395–404.
Wan, E. A. & van der Merwe, R. (2000). The unscented Kalman filter for
nonlinear estimation. Proc. IEEE AS-SPCC, 153–158.
Särkkä, S. (2008). Unscented Rauch–Tung–Striebel smoother. IEEE Trans. Autom.
Control 53(3), 845–849.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from filterpy.kalman import MerweScaledSigmaPoints, UnscentedKalmanFilter
from scipy.linalg import LinAlgError
from threadpoolctl import threadpool_limits

from .estimation_checks import _check_times, _evaluate, _is_real, _samples, _square, _vector
from .exceptions import ConfigError, DataError, OutputError
from .linear_systems import _jacobian, _van_loan_noise, discretize_linear, steady_state_gain
from .simulate import input_function
# A constant that moved with its code, still reachable as discover.estimation.JACOBIAN_STEP:
from .linear_systems import JACOBIAN_STEP  # noqa: F401

__all__ = [
    "StateEstimate",
    "estimate_states",
    "discretize_linear",
    "steady_state_gain",
    "write_estimate_csv",
]

# The band written and plotted around an estimate: mean ± BAND_SIGMAS · std.
BAND_SIGMAS = 2.0

# RK4 steps per median sample interval when ``max_step`` is not given. RK4's
# local error is O(h^5): a quarter interval keeps the integration error far
# below any process noise worth modelling (common practice).
DEFAULT_SUBSTEPS = 4

NOT_POSITIVE_DEFINITE = (
    "the state covariance stopped being positive definite at t={t:.6g} (sample {k}). "
    "The model may leave its valid region between samples; try a larger `process_std`, "
    "a smaller `x0_cov`, or a larger `measurement_std`."
)
NOT_FINITE_ESTIMATE = (
    "the filter's estimate became non-finite (first at t={t:.6g}); check that `h(x, u)` "
    "is finite near the estimate and that `x0`, `x0_cov` and the noise levels fit the data."
)
NOT_FINITE = (
    "the model's state became non-finite while integrating from t={start:.6g} to "
    "t={stop:.6g} (state {state!r}). The model diverges from the current estimate; "
    "check `x0`, `x0_cov` and `process_std`."
)

Dynamics = Callable[[np.ndarray, np.ndarray], np.ndarray]


@dataclass(frozen=True)
class StateEstimate:
    """Filtered and smoothed states of one run.

    Attributes
    ----------
    t : ndarray of shape (n_samples,)
    state_names : tuple of str
    smoothed : ndarray of shape (n_samples, n_states)
        RTS-smoothed mean: the estimate given the whole run.
    smoothed_std : ndarray of shape (n_samples, n_states)
        Standard deviation of the smoothed estimate.
    smoothed_covariance : ndarray of shape (n_samples, n_states, n_states)
    filtered : ndarray of shape (n_samples, n_states)
        Filtered mean: the estimate given the samples up to each time.
    filtered_std : ndarray of shape (n_samples, n_states)
    filtered_covariance : ndarray of shape (n_samples, n_states, n_states)
    gain : ndarray of shape (n_samples, n_states, n_outputs)
        Kalman gain of each update, in the form ``x_post = x_prior + gain @ (y - y_prior)``.
    """

    t: np.ndarray
    state_names: tuple
    smoothed: np.ndarray
    smoothed_std: np.ndarray
    smoothed_covariance: np.ndarray
    filtered: np.ndarray
    filtered_std: np.ndarray
    filtered_covariance: np.ndarray
    gain: np.ndarray

    @property
    def low(self) -> np.ndarray:
        """Lower edge of the band, ``smoothed - BAND_SIGMAS * smoothed_std``, shape (n_samples, n_states)."""
        return self.smoothed - BAND_SIGMAS * self.smoothed_std

    @property
    def high(self) -> np.ndarray:
        """Upper edge of the band, ``smoothed + BAND_SIGMAS * smoothed_std``, shape (n_samples, n_states)."""
        return self.smoothed + BAND_SIGMAS * self.smoothed_std



# --- one run -----------------------------------------------------------------


def _stage_inputs(t, u_of, steps, n_inputs):
    """Input at every RK4 stage time of each interval, shape (2 m + 1, 1, n_inputs) per interval.

    Stage times are ``t_k + j h / 2``. The interval's right end is evaluated as its
    left limit, so a held (``"zoh"``) input keeps the interval's own value up to
    the next sample; a linear input is continuous there anyway.
    """
    inputs = []
    for k, m in enumerate(steps):
        stage_t = np.linspace(t[k], t[k + 1], 2 * m + 1)
        stage_t[-1] = np.nextafter(t[k + 1], t[k])
        inputs.append(np.array([u_of(s) for s in stage_t]).reshape(len(stage_t), 1, n_inputs))
    return inputs


def _rk4(f, x, dt, stage_u):
    """Classical RK4 over one interval in ``len(stage_u) // 2`` equal steps.

    x of shape (1, n_states); stage_u of shape (2 m + 1, 1, n_inputs), so that each
    stage's input is already the one-row array ``f`` expects.
    """
    m = len(stage_u) // 2
    h = dt / m
    for j in range(m):
        u0, u_half, u1 = stage_u[2 * j], stage_u[2 * j + 1], stage_u[2 * j + 2]
        k1 = f(x, u0)
        k2 = f(x + 0.5 * h * k1, u_half)
        k3 = f(x + 0.5 * h * k2, u_half)
        k4 = f(x + h * k3, u1)
        x = x + (h / 6.0) * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
    return x



def estimate_states(
    f: Dynamics,
    h: Dynamics,
    t: ArrayLike,
    y: ArrayLike,
    u: ArrayLike | None = None,
    *,
    state_names: Sequence[str],
    x0: ArrayLike,
    measurement_std: ArrayLike,
    process_std: ArrayLike,
    x0_cov: ArrayLike | None = None,
    interpolation: str = "linear",
    max_step: float | None = None,
    alpha: float = 0.5,
    beta: float = 2.0,
    kappa: float = 0.0,
) -> StateEstimate:
    """Filter and smooth the states of one run through a continuous-time model.

    Parameters
    ----------
    f : callable
        ``f(x, u) -> dx/dt``, x of shape (n, n_states), u of shape (n, n_inputs),
        returning shape (n, n_states).
    h : callable
        ``h(x, u) -> y``, returning shape (n, n_outputs).
    t : ndarray of shape (n_samples,)
        Strictly increasing sample times; the steps may vary.
    y : ndarray of shape (n_samples, n_outputs)
        Measured outputs, finite.
    u : ndarray of shape (n_samples, n_inputs), optional
        Recorded input; None for a model without inputs.
    state_names : sequence of str, length n_states
    x0 : ndarray of shape (n_states,)
        Mean of the state at ``t[0]``, before the first sample is used (e.g. from
        an output-error fit of the model).
    measurement_std : float or ndarray of shape (n_outputs,)
        Standard deviation of each output's noise, > 0; R = diag(measurement_std²).
        The pipeline takes it from the smoothing residuals (raw minus smoothed).
    process_std : float or ndarray of shape (n_states,)
        Process noise per state, >= 0, as a standard deviation per square-root unit
        of time: an interval of length dt adds about ``process_std**2 * dt`` of
        variance (the one-step residual variance per unit time). The exact
        discretisation through the model's Jacobian at the interval start is used
        (Van Loan 1978), so a linear model is filtered without approximation.
    x0_cov : ndarray of shape (n_states, n_states), optional
        Covariance of x0, symmetric positive definite. Default: a 10 % standard
        deviation on each state, ``diag((0.1 |x0|)**2)``, where a state at zero
        gets 0.1 × the largest ``|x0|`` (0.1 if x0 is all zeros). Pass your own when
        x0 is a guess: an unscented filter spreads its sigma points over x0_cov,
        and a cloud far wider than the model's valid region can make it diverge.
    interpolation : {"linear", "zoh"}, default="linear"
        How the input is interpolated between samples, as in simulation.
    max_step : float > 0, optional
        Longest RK4 step; each interval is cut into ``ceil(dt / max_step)`` equal
        steps. Default: a quarter of the median sample interval.
    alpha, beta, kappa : float
        Sigma-point parameters of van der Merwe's scaled unscented transform.
        Defaults alpha=0.5, beta=2 (optimal for Gaussian priors), kappa=0: a spread
        of ``alpha·sqrt(n_states)`` standard deviations, wide enough to feel the
        model's curvature and narrow enough to stay near the estimate (Wan & van
        der Merwe 2000 suggest 1e-4 <= alpha <= 1).

    Returns
    -------
    StateEstimate

    Raises
    ------
    DataError
        Shapes that do not agree, non-finite data, non-increasing time, noise
        levels out of range, or a filter that diverges (non-finite states or a
        covariance that is no longer positive definite).
    ConfigError
        An unknown ``interpolation`` or a bad ``max_step`` or sigma-point option.

    Notes
    -----
    The transition is a fixed-step RK4, not an adaptive solver. The filter and the
    smoother integrate every sigma point over every interval (2·(2 n_states + 1)
    integrations per sample), so the per-call set-up of ``solve_ivp`` dominates:
    on a 300-sample predator–prey run the whole estimate took 2.4× longer with
    ``solve_ivp`` (RK45, rtol 1e-10) in place of RK4, for a smoothed difference of
    1e-8 against a band of 2e-2. A fixed step is also a smooth function of the
    state, whereas adaptive step control adds tolerance-sized jumps between
    neighbouring sigma points that the unscented transform reads as spread.
    """
    if interpolation not in ("linear", "zoh"):
        raise ConfigError(f"`interpolation` must be 'linear' or 'zoh'. Got {interpolation!r}.")
    for name, value in (("alpha", alpha), ("beta", beta), ("kappa", kappa)):
        if not _is_real(value):
            raise ConfigError(f"`{name}` must be a finite number. Got {value!r}.")
    if not 0 < alpha <= 1:
        raise ConfigError(f"`alpha` must be in (0, 1]. Got {alpha!r}.")

    t = _check_times(t)
    n_samples = len(t)
    y = _samples("y", y, n_samples, "outputs")
    u = np.zeros((n_samples, 0)) if u is None else _samples("u", u, n_samples, "inputs")
    n_outputs, n_inputs = y.shape[1], u.shape[1]
    state_names = tuple(state_names) if not isinstance(state_names, str) else (state_names,)
    if not state_names or not all(isinstance(s, str) for s in state_names):
        raise DataError(
            f"`state_names` must be a non-empty list of strings, one per state. Got {state_names!r}."
        )
    if len(set(state_names)) != len(state_names):
        raise DataError(f"`state_names` must be distinct. Got {list(state_names)!r}.")
    n_states = len(state_names)
    x0 = _vector("x0", x0, n_states)
    measurement_std = _vector("measurement_std", measurement_std, n_outputs, what="output", positive=True)
    process_std = _vector("process_std", process_std, n_states, nonnegative=True)
    if x0_cov is None:
        spread = np.abs(x0)
        spread = np.where(spread > 0, spread, spread.max() if spread.max() > 0 else 1.0)
        x0_cov = np.diag((0.1 * spread) ** 2)
    x0_cov = _square("x0_cov", x0_cov, n_states)
    try:
        if not np.allclose(x0_cov, x0_cov.T, rtol=1e-10, atol=0.0):
            raise np.linalg.LinAlgError
        np.linalg.cholesky(x0_cov)
    except np.linalg.LinAlgError:
        raise DataError("`x0_cov` must be symmetric positive definite.") from None
    dts = np.diff(t)
    if max_step is None:
        max_step = float(np.median(dts)) / DEFAULT_SUBSTEPS if len(dts) else 1.0
    if not (_is_real(max_step) and max_step > 0):
        raise ConfigError(f"`max_step` must be a positive number. Got {max_step!r}.")
    _evaluate("f", f, x0[None, :], u[:1], n_states, "state")
    _evaluate("h", h, x0[None, :], u[:1], n_outputs, "output")

    steps = np.maximum(1, np.ceil(dts / max_step - 1e-9).astype(int))
    stage_u = _stage_inputs(t, input_function(t, u, interpolation), steps, n_inputs)
    diffusion = np.diag(process_std**2)

    def transition(k):
        """filterpy's ``fx(x, dt)`` for interval k: x of shape (n_states,)."""

        def fx(x, dt):
            with np.errstate(over="ignore", invalid="ignore"):  # checked just below
                end = _rk4(f, x[None, :], dts[k], stage_u[k])[0]
            if not np.all(np.isfinite(end)):
                bad = state_names[int(np.argmax(~np.isfinite(end)))]
                raise DataError(NOT_FINITE.format(start=t[k], stop=t[k + 1], state=bad))
            return end

        return fx

    def output(k):
        return lambda x: np.asarray(h(x[None, :], u[k : k + 1]), dtype=float)[0]

    def process_noise(k, x, cov):
        if not process_std.any():
            return np.zeros((n_states, n_states))
        a = _jacobian(f, x, u[k], np.sqrt(np.clip(np.diag(cov), 0.0, None)))
        rows = np.isfinite(a).all(axis=1)
        if not rows.all():
            bad = state_names[int(np.argmin(rows))]
            raise DataError(NOT_FINITE.format(start=t[k], stop=t[k + 1], state=bad))
        return _van_loan_noise(a, diffusion, dts[k])

    points = MerweScaledSigmaPoints(n_states, alpha=alpha, beta=beta, kappa=kappa)
    ukf = UnscentedKalmanFilter(dim_x=n_states, dim_z=n_outputs, dt=None, hx=output(0), fx=transition(0),
                                points=points)
    ukf.x = x0.copy()
    ukf.P = 0.5 * (x0_cov + x0_cov.T)
    ukf.R = np.diag(measurement_std**2)

    filtered = np.empty((n_samples, n_states))
    filtered_cov = np.empty((n_samples, n_states, n_states))
    gain = np.empty((n_samples, n_states, n_outputs))
    noises = np.empty((max(n_samples - 1, 0), n_states, n_states))
    transitions = [transition(k) for k in range(n_samples - 1)]
    k = 0
    # One BLAS thread: the matrices are tiny, and waking a thread pool for each
    # product (expm, Cholesky) costs milliseconds on a busy machine.
    with threadpool_limits(limits=1, user_api="blas"):
        try:
            for k in range(n_samples):
                if k == 0:
                    # (x0, x0_cov) is the prior at t[0]: a zero-length prediction keeps it
                    # and places the sigma points the first update needs.
                    ukf.Q = np.zeros((n_states, n_states))
                    ukf.predict(dt=0.0, fx=lambda x, dt: x)
                else:
                    noises[k - 1] = ukf.Q = process_noise(k - 1, ukf.x, ukf.P)
                    ukf.predict(dt=dts[k - 1], fx=transitions[k - 1])
                ukf.update(y[k], hx=output(k))
                if not (np.all(np.isfinite(ukf.x)) and np.all(np.isfinite(ukf.P))):
                    raise DataError(NOT_FINITE_ESTIMATE.format(t=t[k]))
                filtered[k], filtered_cov[k], gain[k] = ukf.x, ukf.P, ukf.K
            smoothed, smoothed_cov = filtered.copy(), filtered_cov.copy()
            # filterpy's rts_smoother runs every step with the filter's one fx and one Q
            # (it takes Qs but uses self.Q; filterpy 2.0.0 UKF.py); here each interval
            # has its own, so it is called on one interval at a time:
            # rows (filtered at k, smoothed at k + 1) give the smoothed estimate at k.
            for k in reversed(range(n_samples - 1)):
                ukf.fx, ukf.Q = transitions[k], noises[k]
                pair_x, pair_cov, _ = ukf.rts_smoother(
                    np.stack([filtered[k], smoothed[k + 1]]),
                    np.stack([filtered_cov[k], smoothed_cov[k + 1]]),
                    dts=[dts[k], dts[k]],
                )
                smoothed[k], smoothed_cov[k] = pair_x[0], pair_cov[0]
        except (LinAlgError, np.linalg.LinAlgError):
            raise DataError(NOT_POSITIVE_DEFINITE.format(t=t[k], k=k)) from None
    finite = np.isfinite(smoothed).all(axis=1) & np.isfinite(smoothed_cov).all(axis=(1, 2))
    if not finite.all():
        raise DataError(NOT_FINITE_ESTIMATE.format(t=t[int(np.argmin(finite))]))

    def std(cov):
        return np.sqrt(np.clip(np.diagonal(cov, axis1=1, axis2=2), 0.0, None))

    return StateEstimate(
        t=t,
        state_names=state_names,
        smoothed=smoothed,
        smoothed_std=std(smoothed_cov),
        smoothed_covariance=smoothed_cov,
        filtered=filtered,
        filtered_std=std(filtered_cov),
        filtered_covariance=filtered_cov,
        gain=gain,
    )


def write_estimate_csv(estimate: StateEstimate, path: str | Path) -> Path:
    """Write one run's smoothed states with their ±2σ band as CSV.

    Columns: ``time``, then for each state ``<state>``, ``<state>_low``,
    ``<state>_high`` (mean ∓ ``BAND_SIGMAS`` standard deviations).

    Parameters
    ----------
    estimate : StateEstimate
    path : str or Path
        File to write; an existing file is replaced.

    Returns
    -------
    Path
    """
    columns = {"time": estimate.t}
    names = ["time"]
    for i, state in enumerate(estimate.state_names):
        for name, values in ((state, estimate.smoothed), (f"{state}_low", estimate.low),
                             (f"{state}_high", estimate.high)):
            names.append(name)
            columns[name] = values[:, i]
    if len(set(names)) != len(names):
        clash = sorted({n for n in names if names.count(n) > 1})
        raise DataError(f"state names give duplicate CSV columns {clash}; rename the states.")
    path = Path(path)
    try:
        pd.DataFrame(columns, columns=names).to_csv(path, index=False)
    except OSError as err:
        raise OutputError(f"{path}: cannot write the estimate ({err.strerror or err}).") from None
    return path
