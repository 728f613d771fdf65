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


def simulate(rhs, t, x0, u, *, interpolation="linear", method="LSODA", rtol=1e-6, atol=1e-9,
             limits=None, state_names=None):
    """Integrate ``dx/dt = rhs(x, u)`` from x0 and sample at the times ``t``.

    Parameters
    ----------
    rhs : callable
        ``rhs(x, u)`` with x of shape (n_states,), u of shape (n_inputs,).
    t : ndarray of shape (n_samples,)
    x0 : ndarray of shape (n_states,)
    u : ndarray of shape (n_samples, n_inputs), or callable of time
    limits : tuple (center, half_width) of ndarrays of shape (n_states,), optional
        The bounded region; leaving it stops the simulation as diverged.

    Returns
    -------
    Simulation
    """
    t = np.asarray(t, dtype=float)
    x0 = np.asarray(x0, dtype=float)
    names = state_names or [f"x{i}" for i in range(len(x0))]
    u_of = input_function(t, u, interpolation)

    def fun(s, x):
        return rhs(x, u_of(s))

    events = []
    if limits is not None:
        center, half_width = limits

        def escape(s, x):
            excess = np.abs(x - center) / half_width
            return 1.0 - excess.max() if np.all(np.isfinite(x)) else -1.0

        escape.terminal = True
        events.append(escape)
    with np.errstate(all="ignore"):
        sol = solve_ivp(fun, (t[0], t[-1]), x0, method=method, t_eval=t, rtol=rtol, atol=atol,
                        events=events or None)
    # solve_ivp returns (n_states, n_points); our convention is rows = time.
    x = np.full((len(t), len(x0)), np.nan)
    x[: sol.y.shape[1]] = sol.y.T
    if sol.status == 1:
        t_stop = sol.t_events[0][0] if len(sol.t_events[0]) else sol.t[-1]
        last = x[: sol.y.shape[1]][-1] if sol.y.shape[1] else x0
        state = names[int(np.nanargmax(np.abs(last - center) / half_width))] if limits else names[0]
        return Simulation(t, x, True, DIVERGED.format(t=t_stop, state=state))
    if sol.status < 0 or not np.isfinite(x).all():
        return Simulation(t, x, True, f"the solver stopped: {sol.message}")
    return Simulation(t, x, False, "")


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
