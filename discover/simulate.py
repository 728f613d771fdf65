"""Forward simulation of dx/dt = f(x, u) with a recorded input, and held-out metrics.

Inputs are interpolated between their samples (linear or zero-order hold). A run
that leaves the region ``center ± divergence_factor · half-range`` of the training
states, or turns non-finite, is stopped and reported as diverged, never raised.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

DIVERGED = "left the bounded region at t={t:.6g} (state {state!r})"


@dataclass(frozen=True)
class Simulation:
    """A simulated trajectory on the requested times.

    x holds NaN after the time a diverged simulation was stopped.
    """

    t: np.ndarray
    x: np.ndarray
    diverged: bool
    message: str


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
                   limits=None):
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
            return rhs(flat.reshape(len(members), n_states), u_of(s), members).ravel()

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
        with np.errstate(all="ignore"):
            sol = solve_ivp(fun, (start, t[-1]), y, method=method, t_eval=pending, rtol=rtol,
                            atol=np.tile(atol_state, len(members)), events=events)
        # solve_ivp returns (n_states * n_active, n_points); ours is (member, time, state).
        done = sol.y.T.reshape(-1, len(members), n_states).transpose(1, 0, 2)
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
    bad = ~np.isfinite(x).all(axis=2).all(axis=1) & np.isnan(stopped_at)
    stopped_at[bad] = t[-1]
    return x, stopped_at, message


def simulate(rhs, t, x0, u, *, interpolation="linear", method="LSODA", rtol=1e-6, atol=1e-9,
             limits=None, state_names=None):
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
    )
    x = x[0]
    if message:
        return Simulation(np.asarray(t, dtype=float), x, True, message)
    if np.isfinite(stopped_at[0]):
        last = x[np.isfinite(x).all(axis=1)][-1] if np.isfinite(x).all(axis=1).any() else x0
        center, half_width = limits if limits is not None else (np.zeros_like(x0), np.ones_like(x0))
        state = names[int(np.argmax(np.abs(last - center) / half_width))]
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
