"""The multiple-shooting problem of output-error refinement (:mod:`discover.refine`), and its solution.

:class:`_Shooting` gives the residuals and the Jacobian over one parameter vector
(the free coefficients, then every segment's free start values), from one
integration with sensitivities (:mod:`discover.integrator`); :func:`_solve` runs
:func:`scipy.optimize.least_squares` on it within the evaluation and time budget
(:class:`_Budget`); :func:`_segment_starts` starts every segment from the measured
state (a local quadratic fit, :func:`_local_fit`) or a starting trajectory.
"""

from __future__ import annotations

import time

import numpy as np
from scipy import sparse
from scipy.optimize import least_squares

from .integrator import _integrate

#: Samples of the local quadratic fit that starts a measured state at a segment start.
START_WINDOW = 9
#: least_squares-like status of a fit stopped at the time limit.
TIMED_OUT = -3


# --------------------------------------------------------------------------- the multiple-shooting problem


class _OutOfTime(Exception):
    pass


class _Shooting:
    """Residuals and Jacobian of the multiple-shooting problem over a parameter vector.

    Parameters: the free coefficients, then every segment's free start values
    (segment by segment, state by state). A Jacobian with more than ``dense_limit``
    entries is built sparse (``discover.refine.DENSE_LIMIT``).
    """

    def __init__(self, dynamics, layout, runs, y_scale, state_scale, coef0, free_coef, starts0,
                 free_start, continuity_weight, limits, dense_limit):
        self.dynamics, self.layout, self.limits = dynamics, layout, limits
        self.dense_limit = dense_limit
        self.coef0, self.starts0 = coef0, starts0
        self.free_coef = np.flatnonzero(free_coef)
        self.free_start = free_start  # bool (n_seg, n_states)
        n_free = len(self.free_coef)
        self.start_column = np.full(free_start.shape, -1)
        self.start_column[free_start] = n_free + np.arange(free_start.sum())
        self.coef_column = np.full(dynamics.n_coef, -1)
        self.coef_column[self.free_coef] = np.arange(n_free)
        self.n_params = n_free + int(free_start.sum())
        self.y = np.concatenate([run.y for run in runs])
        self.u = np.concatenate([run.u for run in runs])
        self.y_scale = y_scale
        self.weight = continuity_weight
        self.continuity_scale = state_scale / continuity_weight
        self.has_next = np.flatnonzero(layout.following >= 0)
        n_out = len(self.y) * dynamics.n_outputs
        self.n_residuals = n_out + len(self.has_next) * dynamics.n_states

    def unpack(self, p):
        coef = self.coef0.copy()
        coef[self.free_coef] = p[: len(self.free_coef)]
        starts = self.starts0.copy()
        starts[self.free_start] = p[len(self.free_coef):]
        return coef, starts

    def pack(self, coef, starts):
        return np.concatenate([coef[self.free_coef], starts[self.free_start]])

    def simulate(self, p, sensitivities):
        coef, starts = self.unpack(p)
        return _integrate(self.dynamics, self.layout, starts, coef, sensitivities=sensitivities,
                          limits=self.limits) + (starts,)

    def residuals(self, p, sensitivities=False):
        xs, ss, stopped, starts = self.simulate(p, sensitivities)
        diverged = stopped <= self.layout.steps
        lay = self.layout
        x = xs[lay.sample_local, lay.sample_segment]
        y, gx = self.dynamics.outputs(x, self.u)
        r_out = ((y - self.y) / self.y_scale).ravel()
        ends = xs[lay.steps[self.has_next], self.has_next]
        gaps = (ends - starts[lay.following[self.has_next]]) / self.continuity_scale
        r = np.concatenate([r_out, gaps.ravel()])
        r = np.where(np.isfinite(r), r, 0.0)
        return r, (xs, ss, diverged, starts, gx, stopped)

    def fun(self, p):
        return self.residuals(p)[0]

    def jac(self, p):
        return self.residuals_and_jacobian(p)[1]

    def residuals_and_jacobian(self, p):
        """Residuals, Jacobian and the simulation details, from one integration with sensitivities."""
        r, details = self.residuals(p, sensitivities=True)
        xs, ss, _, _, gx, _ = details
        lay, n_states = self.layout, self.dynamics.n_states
        n_samples, n_out = len(self.y), self.dynamics.n_outputs
        # Output rows: ∂y/∂x · S at each sample, columns mapped from local to global.
        s = ss[lay.sample_local, lay.sample_segment]              # (n_samples, n_states, n_local)
        local = np.einsum("nok,nkp->nop", gx, s) / self.y_scale[None, :, None]
        rows_out = np.arange(n_samples * n_out).reshape(n_samples, n_out)
        columns = self._local_columns(lay.sample_segment)         # (n_samples, n_local)
        blocks = [(rows_out[:, :, None], columns[:, None, :], local)]
        # Continuity rows: S at the segment end, minus the identity on the next start.
        g = self.has_next
        end = ss[lay.steps[g], g] / self.continuity_scale[None, :, None]
        rows_gap = n_samples * n_out + np.arange(len(g) * n_states).reshape(len(g), n_states)
        blocks.append((rows_gap[:, :, None], self._local_columns(g)[:, None, :], end))
        nxt = self.start_column[lay.following[g]]                 # (n_gap, n_states)
        blocks.append((rows_gap[:, :, None], nxt[:, :, None],
                       np.broadcast_to(-1.0 / self.continuity_scale[:, None], (len(g), n_states, 1))))
        return r, self._assemble(blocks), details

    def _local_columns(self, segments):
        """Global column of each local parameter (segment start, then every coefficient); -1 if fixed."""
        return np.concatenate([self.start_column[segments],
                               np.broadcast_to(self.coef_column, (len(segments), self.dynamics.n_coef))], axis=1)

    def _assemble(self, blocks, dense=None):
        rows, cols, vals = [], [], []
        for r, c, v in blocks:
            r, c, v = np.broadcast_arrays(r, c, v)
            keep = c >= 0
            rows.append(r[keep])
            cols.append(c[keep])
            vals.append(np.where(np.isfinite(v[keep]), v[keep], 0.0))
        rows, cols, vals = np.concatenate(rows), np.concatenate(cols), np.concatenate(vals)
        shape = (self.n_residuals, self.n_params)
        if self.dense if dense is None else dense:
            out = np.zeros(shape)
            out[rows, cols] = vals  # every (row, column) pair occurs once
            return out
        return sparse.csr_matrix((vals, (rows, cols)), shape=shape)

    @property
    def dense(self):
        return self.n_residuals * self.n_params <= self.dense_limit

    def sparsity(self):
        """Pattern of the Jacobian (where an entry can be non-zero), for finite differences."""
        lay, n_states = self.layout, self.dynamics.n_states
        n_samples, n_out = len(self.y), self.dynamics.n_outputs
        rows_out = np.arange(n_samples * n_out).reshape(n_samples, n_out)
        g = self.has_next
        rows_gap = n_samples * n_out + np.arange(len(g) * n_states).reshape(len(g), n_states)
        blocks = [(rows_out[:, :, None], self._local_columns(lay.sample_segment)[:, None, :], 1.0),
                  (rows_gap[:, :, None], self._local_columns(g)[:, None, :], 1.0),
                  (rows_gap[:, :, None], self.start_column[lay.following[g]][:, :, None], 1.0)]
        return sparse.csr_matrix(self._assemble(blocks, dense=False) != 0)


class _Budget:
    """Counts evaluations, keeps the best point seen, and stops at the deadline."""

    def __init__(self, problem, deadline):
        self.problem, self.deadline = problem, deadline
        self.best_cost, self.best_p = np.inf, None
        self.n_fun = self.n_jac = 0

    def _check(self):
        if time.monotonic() > self.deadline:
            raise _OutOfTime

    def fun(self, p):
        self._check()
        self.n_fun += 1
        r = self.problem.fun(p)
        cost = 0.5 * float(r @ r)
        if cost < self.best_cost:
            self.best_cost, self.best_p = cost, p.copy()
        return r

    def jac(self, p):
        self._check()
        self.n_jac += 1
        return self.problem.jac(p)


def _solve(problem, jacobian, max_nfev, deadline, time_limit):
    """least_squares within the budget; returns x, status, message, nfev, njev."""
    p0 = problem.pack(problem.coef0, problem.starts0)
    budget = _Budget(problem, deadline)
    tr_solver = "exact" if problem.dense else "lsmr"
    if jacobian == "analytic":
        jac, options = budget.jac, {}
    else:  # scipy takes a sparsity pattern only with lsmr
        jac, options = jacobian, ({} if problem.dense else {"jac_sparsity": problem.sparsity()})
    try:
        result = least_squares(budget.fun, p0, jac=jac, method="trf", x_scale="jac", max_nfev=max_nfev,
                               tr_solver=tr_solver, ftol=1e-10, xtol=1e-10, gtol=1e-10, **options)
    except _OutOfTime:
        best = budget.best_p if budget.best_p is not None else p0
        return {"x": best, "status": TIMED_OUT, "nfev": budget.n_fun, "njev": budget.n_jac,
                "message": f"stopped at the time limit of {time_limit:g} s (best point so far returned)"}
    message = "" if result.status > 0 else (
        f"stopped after max_nfev = {max_nfev} evaluations" if result.status == 0 else result.message)
    return {"x": result.x, "status": result.status, "nfev": result.nfev, "njev": result.njev or 0,
            "message": message}


def _local_fit(t, x, at):
    """Value at sample ``at`` of the least-squares quadratic through the START_WINDOW nearest samples."""
    n = len(t)
    half = START_WINDOW // 2
    lo = int(np.clip(at - half, 0, max(n - START_WINDOW, 0)))
    hi = min(n, lo + START_WINDOW)
    s = t[lo:hi] - t[at]
    degree = min(2, hi - lo - 1)
    scale = np.max(np.abs(s)) or 1.0
    coef = np.polynomial.polynomial.polyfit(s / scale, x[lo:hi], degree)
    return float(coef[0])


def _segment_starts(runs, layout, trajectories, measured, fixed0, previous):
    """Starting values (n_seg, n_states) of every segment and which of them are free."""
    n_states = trajectories[0].shape[1]
    starts = np.empty((layout.n_segments, n_states))
    for g in range(layout.n_segments):
        r, a = layout.run[g], layout.first[g]
        traj = trajectories[r]
        for k in range(n_states):
            if k in measured:
                starts[g, k] = _local_fit(runs[r].t, traj[:, k], a)
            else:
                starts[g, k] = traj[a, k]
    if previous is not None:  # a second pass starts from the first one's segment starts
        old_layout, old_starts = previous
        if np.array_equal(old_layout.first, layout.first) and np.array_equal(old_layout.run, layout.run):
            starts = old_starts.copy()
    free = np.ones_like(starts, dtype=bool)
    for r in range(len(runs)):
        g = np.flatnonzero(layout.run == r)[0]
        given = np.isfinite(fixed0[r])
        starts[g, given] = fixed0[r, given]
        free[g, given] = False
    return starts, free
