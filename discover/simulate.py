"""Forward simulation of dx/dt = f(x, u) with a recorded input, and held-out metrics.

Inputs are interpolated between their samples (linear or zero-order hold). A run
that leaves the region ``center ± divergence_factor · half-range`` of the training
states, or turns non-finite, is stopped and reported as diverged, never raised.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

DIVERGED = "left the bounded region at t={t:.6g} (state {state!r})"
NOT_FINITE = "its right-hand side is not finite (or crosses the bounded region in a vanishing time) at t={t:.6g}"
#: A rate that would cross the whole bounded region in this fraction of the shortest sample
#: step is no dynamics a solver can follow: the member is stopped at once (a coefficient
#: such as 1e308 would otherwise make the solver shrink its step for hundreds of thousands
#: of evaluations). Stiff physical systems stay many orders of magnitude below it.
MIN_CROSSING_FRACTION = 1e-12
TIME_LIMIT = "stopped at t={t:.6g}: the simulation took longer than the time limit of {limit:g} s"
TOO_MANY_STEPS = ("stopped at t={t:.6g}: the solver evaluated the model {count} times without finishing "
                  "(a diverging or extremely stiff model)")
#: Right-hand-side evaluations allowed per call: a fixed allowance plus this many per sample;
#: a well-posed model needs a few per sample, one whose steps shrink to nothing needs millions.
EVALUATIONS_PER_SAMPLE = 200
EVALUATIONS_BASE = 20000
#: Default wall-clock limit of one solver call, seconds ([compute].simulation_time_limit).
DEFAULT_TIME_LIMIT = 60.0


class _Stopped(Exception):
    def __init__(self, message):
        self.message = message


@dataclass(frozen=True)
class Simulation:
    """A simulated trajectory on the requested times.

    x holds NaN after the time a diverged simulation was stopped.
    """

    t: np.ndarray
    x: np.ndarray
    diverged: bool
    message: str


@dataclass(frozen=True)
class SimulationSettings:
    """How every simulation of a run is done, resolved once per run.

    Validation, prediction bands, ranking, reports and ``discover simulate`` all take
    this one object, so they integrate the same way.

    Attributes
    ----------
    method : str
        The ``solve_ivp`` method.
    rtol : float
    atol : ndarray of shape (n_states,)
        Absolute tolerance in each state's units.
    center, half_width : ndarray of shape (n_states,)
        The bounded region: a trajectory that leaves it is stopped as diverged.
    interpolation : str
        ``"linear"``, ``"zoh"`` or ``"auto"`` (decided per run from its input).
    time_limit : float
        Wall-clock seconds for one solver call.
    """

    method: str
    rtol: float
    atol: np.ndarray
    center: np.ndarray
    half_width: np.ndarray
    interpolation: str = "auto"
    time_limit: float = 60.0

    @property
    def limits(self):
        return self.center, self.half_width

    def interpolation_for(self, u):
        """The interpolation rule for a run with recorded input u."""
        return guess_interpolation(u) if self.interpolation == "auto" else self.interpolation

    def to_dict(self):
        return {"method": self.method, "rtol": self.rtol, "atol": [float(a) for a in self.atol],
                "center": [float(c) for c in self.center], "half_width": [float(h) for h in self.half_width],
                "interpolation": self.interpolation, "time_limit": self.time_limit}

    @classmethod
    def from_dict(cls, document, n_states):
        """From a model file's ``simulation`` entry; None if it is missing or malformed."""
        try:
            arrays = [np.asarray(document[k], dtype=float) for k in ("atol", "center", "half_width")]
            method, rtol = str(document["method"]), float(document["rtol"])
            interpolation, limit = str(document["interpolation"]), float(document["time_limit"])
        except (KeyError, TypeError, ValueError):
            return None
        ok = (all(a.shape == (n_states,) and np.isfinite(a).all() for a in arrays)
              and (arrays[2] > 0).all() and method in SOLVERS and interpolation in ("auto", "linear", "zoh")
              and 0 < rtol < 1 and limit > 0)
        return cls(method, rtol, *arrays, interpolation=interpolation, time_limit=limit) if ok else None


SOLVERS = ("LSODA", "RK45", "DOP853", "Radau", "BDF", "RK23")


def simulation_settings(x_low, x_high, *, method, rtol, atol, divergence_factor, interpolation, time_limit):
    """Settings from the training states' extremes.

    The absolute tolerance is ``atol`` if given, else 1e-6 times each state's range;
    the bounded region is the training range widened ``divergence_factor`` times
    about its centre.
    """
    spread = x_high - x_low
    if atol is None:
        atol = 1e-6 * np.where(spread > 0, spread, 1.0)
    center = (x_low + x_high) / 2
    half = np.maximum(spread / 2, 1e-12 + 1e-9 * np.abs(center))
    return SimulationSettings(method, rtol, np.broadcast_to(np.asarray(atol, dtype=float), x_low.shape).copy(),
                              center, divergence_factor * half, interpolation, time_limit)


def run_model(model, t, x0, u, settings):
    """Simulate a :class:`discover.model.Model` on one run with the run's settings."""
    return model.simulate(t, x0, u, interpolation=settings.interpolation_for(u), method=settings.method,
                          rtol=settings.rtol, atol=settings.atol, limits=settings.limits,
                          time_limit=settings.time_limit)


def guess_interpolation(u):
    """Zero-order hold when the recorded input mostly holds exact values, else linear.

    A logger that records a held command shows runs of identical samples; a
    measured, noisy input does not.
    """
    if u.shape[1] == 0 or len(u) < 3:
        return "linear"
    held = np.mean(np.diff(u, axis=0) == 0)
    return "zoh" if held > 0.5 else "linear"


def input_function(t, u, interpolation):
    """``u(s)`` of shape (n_inputs,) from samples u of shape (n_samples, n_inputs) at times t."""
    if callable(u):
        return lambda s: np.atleast_1d(np.asarray(u(s), dtype=float))
    u = np.asarray(u, dtype=float).reshape(len(t), -1)
    if u.shape[1] == 0:
        empty = np.empty(0)
        return lambda s: empty
    if interpolation == "zoh":
        def hold(s):
            i = np.clip(np.searchsorted(t, s, side="right") - 1, 0, len(t) - 1)
            return u[i]
        return hold
    columns = [np.ascontiguousarray(u[:, j]) for j in range(u.shape[1])]
    return lambda s: np.array([np.interp(s, t, c) for c in columns])


def simulate_batch(rhs, t, x0, u, *, interpolation="linear", method="LSODA", rtol=1e-6, atol=1e-9,
                   limits=None, time_limit=DEFAULT_TIME_LIMIT):
    """Integrate several members ``dX/dt = rhs(X, u, members)`` together in one solver.

    Parameters
    ----------
    rhs : callable
        ``rhs(X, u, members)`` with X of shape (n_active, n_states), u of shape
        (n_inputs,) and ``members`` the indices of the active members; returns dX.
    t : ndarray of shape (n_samples,)
    x0 : ndarray of shape (n_members, n_states)
    u : ndarray of shape (n_samples, n_inputs), or callable of time
    atol : float or ndarray of shape (n_states,)
        Absolute tolerance, per state if an array.
    limits : tuple (center, half_width) of ndarrays of shape (n_states,), optional
        The bounded region. A member that leaves it is stopped there (a terminal
        event), marked diverged, and the others go on from that time without it.
    time_limit : float
        Wall-clock seconds for the whole call; the members still running then are
        stopped and the message says so.

    A member whose right-hand side turns non-finite is frozen from then on and
    counted as stopped at the first such time; the others are not affected.

    Returns
    -------
    x : ndarray of shape (n_members, n_samples, n_states)
        NaN after a member's stop.
    stopped_at : ndarray of shape (n_members,)
        Time each member was stopped; NaN for members that ran to the end.
    message : str
        The solver's message if it failed (all remaining members then count as stopped).
    """
    t = np.asarray(t, dtype=float)
    x0 = np.atleast_2d(np.asarray(x0, dtype=float))
    n_members, n_states = x0.shape
    u_of = input_function(t, u, interpolation)
    x = np.full((n_members, len(t), n_states), np.nan)
    stopped_at = np.full(n_members, np.nan)
    atol_state = np.broadcast_to(np.asarray(atol, dtype=float), (n_states,))
    active, start, message = np.arange(n_members), t[0], ""
    deadline = time.monotonic() + time_limit
    budget = EVALUATIONS_BASE + EVALUATIONS_PER_SAMPLE * len(t)
    evaluations = [0]
    first_bad = np.full(n_members, np.inf)  # first time each member's rhs was not finite
    max_rate = None
    if limits is not None and len(t) > 1:
        max_rate = 2 * limits[1] / (MIN_CROSSING_FRACTION * float(np.min(np.diff(t))))
    if limits is not None:
        # A member that starts outside the region can never cross into it: stop it at once.
        center, half_width = limits
        outside = ~np.all(np.isfinite(x0) & (np.abs(x0 - center) <= half_width), axis=1)
        x[outside, 0] = x0[outside]
        stopped_at[outside] = t[0]
        active = active[~outside]
    y = x0[active].ravel()
    while active.size:
        members = active.copy()

        def fun(s, flat):
            evaluations[0] += 1
            if evaluations[0] > budget:
                raise _Stopped(TOO_MANY_STEPS.format(t=s, count=budget))
            if evaluations[0] % 64 == 0 and time.monotonic() > deadline:
                raise _Stopped(TIME_LIMIT.format(t=s, limit=time_limit))
            dx = rhs(flat.reshape(len(members), n_states), u_of(s), members)
            bad = ~np.isfinite(dx).all(axis=1)
            if max_rate is not None:
                bad |= (np.abs(dx) > max_rate).any(axis=1)
            if bad.any():
                first_bad[members[bad]] = np.minimum(first_bad[members[bad]], s)
                dx = np.where(bad[:, None], 0.0, dx)
            return dx.ravel()

        events = None
        if limits is not None:
            center, half_width = limits

            def escape(s, flat):
                state = flat.reshape(len(members), n_states)
                if not np.all(np.isfinite(state)):
                    return -1.0
                return 1.0 - np.max(np.abs(state - center) / half_width)

            escape.terminal = True
            events = [escape]
        pending = t[t >= start]
        try:
            with np.errstate(all="ignore"):
                sol = solve_ivp(fun, (start, t[-1]), y, method=method, t_eval=pending, rtol=rtol,
                                atol=np.tile(atol_state, len(members)), events=events)
        except _Stopped as stop:
            # The samples reached before the stop are lost with the aborted call.
            message = stop.message
            stopped_at[members] = start
            x[np.ix_(members, np.flatnonzero(t >= start))] = np.nan
            break
        # solve_ivp returns (n_states * n_active, n_points), a list when it reached no
        # requested time; ours is (member, time, state).
        values = np.asarray(sol.y, dtype=float).reshape(len(members) * n_states, -1)
        done = values.T.reshape(-1, len(members), n_states).transpose(1, 0, 2)
        first = len(t) - len(pending)
        x[np.ix_(members, np.arange(first, first + done.shape[1]))] = done
        if sol.status == 1 and len(sol.t_events[0]):
            start = sol.t_events[0][0]
            at_event = sol.y_events[0][0].reshape(len(members), n_states)
            excess = np.abs(at_event - center) / half_width
            out = ~np.isfinite(at_event).all(axis=1) | (excess.max(axis=1) >= 1.0 - 1e-9)
            if not out.any():
                out = excess.max(axis=1) == excess.max()
            stopped_at[members[out]] = start
            active = members[~out]
            y = at_event[~out].ravel()
            # Samples at or after the stop are not part of the escaped trajectories.
            x[np.ix_(members[out], np.flatnonzero(t >= start))] = np.nan
            continue
        if sol.status < 0:
            message = f"the solver stopped: {sol.message}"
            stopped_at[members] = sol.t[-1] if len(sol.t) else start
        break
    # Members frozen for a non-finite right-hand side: stopped at the first such time.
    for m in np.flatnonzero(np.isfinite(first_bad)):
        stopped_at[m] = first_bad[m] if np.isnan(stopped_at[m]) else min(stopped_at[m], first_bad[m])
        x[m, t >= stopped_at[m]] = np.nan
    # Anything else non-finite: stopped at the first sample where it shows.
    bad = ~np.isfinite(x).all(axis=2).all(axis=1) & np.isnan(stopped_at)
    for m in np.flatnonzero(bad):
        stopped_at[m] = t[np.argmin(np.isfinite(x[m]).all(axis=1))]
    return x, stopped_at, message


def simulate(rhs, t, x0, u, *, interpolation="linear", method="LSODA", rtol=1e-6, atol=1e-9,
             limits=None, state_names=None, time_limit=DEFAULT_TIME_LIMIT):
    """Integrate ``dx/dt = rhs(x, u)`` from x0 and sample at the times ``t``.

    Parameters
    ----------
    rhs : callable
        ``rhs(x, u)`` with x of shape (n_states,) or (n, n_states), u of shape (n_inputs,).
    t : ndarray of shape (n_samples,)
    x0 : ndarray of shape (n_states,)
    u : ndarray of shape (n_samples, n_inputs), or callable of time
    limits : tuple (center, half_width) of ndarrays of shape (n_states,), optional
        The bounded region; leaving it stops the simulation as diverged.

    Returns
    -------
    Simulation
    """
    x0 = np.asarray(x0, dtype=float)
    names = state_names or [f"x{i}" for i in range(len(x0))]
    x, stopped_at, message = simulate_batch(
        lambda X, u_now, members: np.atleast_2d(rhs(X[0], u_now)), t, x0[None, :], u,
        interpolation=interpolation, method=method, rtol=rtol, atol=atol, limits=limits,
        time_limit=time_limit,
    )
    x = x[0]
    if message:
        return Simulation(np.asarray(t, dtype=float), x, True, message)
    finite_rows = np.isfinite(x).all(axis=1)
    if np.isfinite(stopped_at[0]) and not np.isfinite(x0).all():
        return Simulation(np.asarray(t, dtype=float), x, True, "the initial state is not finite")
    if np.isfinite(stopped_at[0]):
        last = x[finite_rows][-1] if finite_rows.any() else x0
        if limits is None:
            return Simulation(np.asarray(t, dtype=float), x, True, NOT_FINITE.format(t=stopped_at[0]))
        center, half_width = limits
        excess = np.abs(last - center) / half_width
        if excess.max() < 1.0 - 1e-6:
            # Stopped inside the region: the right-hand side itself turned non-finite.
            return Simulation(np.asarray(t, dtype=float), x, True, NOT_FINITE.format(t=stopped_at[0]))
        state = names[int(np.argmax(excess))]
        return Simulation(np.asarray(t, dtype=float), x, True, DIVERGED.format(t=stopped_at[0], state=state))
    return Simulation(np.asarray(t, dtype=float), x, False, "")


def fit_metrics(measured, simulated):
    """Per-state RMSE, NRMSE and fit percentage.

    NRMSE = RMSE / std(measured), and fit = 100·(1 − ‖y − ŷ‖ / ‖y − ȳ‖) = 100·(1 − NRMSE)
    (the "fit percentage" of system identification; common practice).
    NaN where the simulation diverged.
    """
    error = measured - simulated
    rmse = np.sqrt(np.mean(error**2, axis=0))
    spread = np.std(measured, axis=0)
    nrmse = rmse / np.where(spread > 0, spread, np.nan)
    return {"rmse": rmse, "nrmse": nrmse, "fit_percent": 100.0 * (1.0 - nrmse)}
