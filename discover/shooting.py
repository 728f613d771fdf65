"""The multiple-shooting problem of output-error refinement (:mod:`discover.refine`), and its solution.

:class:`_Shooting` gives the residuals and the Jacobian over one parameter vector
(the free coefficients, then every segment's free start values), from one
integration with sensitivities (:mod:`discover.integrator`); :func:`_solve` runs
:func:`scipy.optimize.least_squares` on it within the evaluation and time budget
(:class:`_Budget`); :func:`_segment_starts` starts every segment from the measured
state (a local quadratic fit, :func:`_local_fit`) or a starting trajectory.

With the analytic Jacobian the steps are Levenberg–Marquardt steps on the normal
equations (:func:`_levenberg_marquardt`; Levenberg 1944, Marquardt 1963, with the
damping update of Nielsen 1999 as given in Madsen, Nielsen & Tingleff 2004, "Methods
for non-linear least squares problems", IMM, DTU, §3.2, and the column scaling of
Moré 1978). Why not ``least_squares(method="trf")`` there: it takes a thin SVD of the
whole Jacobian at every iteration. On the end-to-end benchmark's refinement
(40,080 residuals × 98 parameters, BLAS on one thread, 2-core machine) that SVD took
0.51 s against 0.016 s for JᵀJ, more than the integration with sensitivities (0.19 s).
The multiple-shooting problem is well scaled by its continuity weights and the step is
solved on the column-scaled JᵀJ + λI by Cholesky, so squaring the condition number
costs nothing the damping does not already bound. Finite-difference Jacobians
(``jacobian="2-point"``, a check) still go through ``least_squares``.
"""

from __future__ import annotations

import time

import numpy as np
from scipy import sparse
from scipy.linalg import LinAlgError, cho_factor, cho_solve
from scipy.optimize import least_squares

from .integrator import _integrate

#: Samples of the local quadratic fit that starts a measured state at a segment start.
START_WINDOW = 9
#: least_squares-like status of a fit stopped at the time limit.
TIMED_OUT = -3
#: Most parameters for which the normal equations (a dense n × n matrix) are formed;
#: larger problems go to least_squares with its sparse iterative solver.
MAX_NORMAL_PARAMS = 3000
#: Convergence tolerances (those least_squares was given before: ftol, xtol, gtol).
TOLERANCE = 1e-10
#: Corrections of each Levenberg–Marquardt step from the residual of its normal equations.
REFINEMENT_STEPS = 2
#: Starting damping relative to the largest scaled curvature: Nielsen's choice for a start
#: believed close to the optimum (Madsen, Nielsen & Tingleff 2004, §3.2: 1e-6 then,
#: 1e-3 otherwise); the derivative fit is such a start.
INITIAL_DAMPING = 1e-6


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

    def fun_and_jac(self, p):
        """Residuals and Jacobian from one integration with sensitivities."""
        self._check()
        self.n_fun += 1
        self.n_jac += 1
        r, jac, _ = self.problem.residuals_and_jacobian(p)
        cost = 0.5 * float(r @ r)
        if cost < self.best_cost:
            self.best_cost, self.best_p = cost, p.copy()
        return r, cost, jac


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
        if jacobian == "analytic" and problem.n_params <= MAX_NORMAL_PARAMS:
            result = _levenberg_marquardt(budget.fun_and_jac, p0, max_nfev)
        else:
            result = least_squares(budget.fun, p0, jac=jac, method="trf", x_scale="jac", max_nfev=max_nfev,
                                   tr_solver=tr_solver, ftol=TOLERANCE, xtol=TOLERANCE, gtol=TOLERANCE,
                                   **options)
    except _OutOfTime:
        best = budget.best_p if budget.best_p is not None else p0
        return {"x": best, "status": TIMED_OUT, "nfev": budget.n_fun, "njev": budget.n_jac,
                "message": f"stopped at the time limit of {time_limit:g} s (best point so far returned)"}
    message = "" if result.status > 0 else (
        f"stopped after max_nfev = {max_nfev} evaluations" if result.status == 0 else result.message)
    return {"x": result.x, "status": result.status, "nfev": result.nfev, "njev": result.njev or 0,
            "message": message}


class _Fit:
    """What :func:`_solve` reads of a least-squares result."""

    def __init__(self, x, status, nfev, njev, message=""):
        self.x, self.status, self.nfev, self.njev, self.message = x, status, nfev, njev, message


def _levenberg_marquardt(fun_and_jac, p0, max_nfev, tol=TOLERANCE):
    """Minimise ½‖r(p)‖² from ``p0``; ``fun_and_jac(p)`` returns (r, ½‖r‖², J), J dense or sparse.

    Status as least_squares: 1 gradient small (gtol), 2 cost settled (ftol), 3 step
    small (xtol), 0 ``max_nfev`` evaluations used. Every trial point is evaluated with
    its Jacobian: on this problem most trial steps are taken, and one integration with
    sensitivities costs less than a plain one followed by another with them.
    """
    p = np.array(p0, dtype=float)
    r, cost, jac = fun_and_jac(p)
    nfev, scale, damping, growth = 1, None, None, 2.0
    while True:
        normal = jac.T @ jac
        normal = normal.toarray() if sparse.issparse(normal) else np.asarray(normal)
        gradient = np.asarray(jac.T @ r).ravel()
        # Columns scaled by their norms, the largest seen so far (least_squares' x_scale="jac").
        norms = np.sqrt(np.diag(normal))
        scale = norms if scale is None else np.maximum(scale, norms)
        s = np.where(scale > 0, scale, 1.0)
        a = normal / s[:, None] / s[None, :]
        g = gradient / s
        if not np.isfinite(cost) or np.max(np.abs(g), initial=0.0) < tol:
            return _Fit(p, 1, nfev, nfev)
        if damping is None:
            damping = INITIAL_DAMPING * max(float(np.max(np.diag(a), initial=0.0)), 1.0)
        while True:
            if nfev >= max_nfev:
                return _Fit(p, 0, nfev, nfev)
            try:
                factor = cho_factor(a + damping * np.eye(len(g)), check_finite=False)
            except (LinAlgError, ValueError):
                damping, growth = damping * growth, growth * 2
                continue
            step = -cho_solve(factor, g, check_finite=False)
            for _ in range(REFINEMENT_STEPS):
                # Corrected semi-normal equations (Björck 1996, §2.2.3): the residual of the
                # normal equations from J itself restores the accuracy JᵀJ loses.
                misfit = -g - np.asarray(jac.T @ (jac @ (step / s))).ravel() / s - damping * step
                step = step + cho_solve(factor, misfit, check_finite=False)
            dp = step / s
            predicted = 0.5 * float(step @ (damping * step - g))  # model decrease, ≥ 0
            p_new = p + dp
            r_new, cost_new, jac_new = fun_and_jac(p_new)
            nfev += 1
            gain = (cost - cost_new) / predicted if predicted > 0 and np.isfinite(cost_new) else -1.0
            small_step = np.linalg.norm(dp) < tol * (tol + np.linalg.norm(p))
            if gain > 0:
                settled = cost - cost_new < tol * cost
                p, r, cost, jac = p_new, r_new, cost_new, jac_new
                damping *= max(1 / 3, 1 - (2 * gain - 1) ** 3)
                growth = 2.0
                if settled:
                    return _Fit(p, 2, nfev, nfev)
                if small_step:
                    return _Fit(p, 3, nfev, nfev)
                break
            if small_step:
                return _Fit(p, 3, nfev, nfev)
            damping, growth = damping * growth, growth * 2


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
