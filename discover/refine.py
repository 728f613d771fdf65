"""Output-error refinement of a model structure by multiple shooting.

Given a structure (per state the terms of its equation, with starting coefficients;
which states are hidden; outputs y = g(x, u)) and training runs (t, measured y,
recorded u), :func:`refine` fits the free coefficients by minimising the simulation
(output) error with :func:`scipy.optimize.least_squares`. The same routine serves

* refining a derivative-based fit of fully measured states: output error is free of
  the bias that smoothing and differentiation leave in the regression pair;
* fitting models with hidden states, whose initial values are unknown.

Method: multiple shooting (Bock & Plitt 1984, Proc. 9th IFAC World Congress; for ODE
parameter estimation Peifer & Timmer 2007, IET Syst. Biol. 1(2)). Each run is cut
into segments; every segment's initial state is a parameter, started from the
measured state (a local quadratic fit around the segment start) or, for a hidden
state, from a simulation of the starting model. The residuals are

* (simulated − measured output) at every sample, divided by the output's noise level
  (estimated from the data unless given), so units do not matter;
* continuity (end of segment k − start of segment k + 1), divided by the state's
  noise-level scale and multiplied by ``continuity_weight``, a penalty that makes
  the trajectory continuous at the optimum. Measured on the Duffing test case: the
  largest gap was 0.087, 0.0042 and 6e-5 noise levels at weights 10, 100 and 1000,
  and at 1000 the coefficients equal single shooting's to 5 digits (at 100 they were
  0.07 % off), with the same number of iterations; hence the default 1000. The fit
  runs first at a tenth of the weight and then at the full weight from there
  (continuation), since a heavy penalty from the start makes weakly determined
  directions converge slowly.

Integration: a fixed-step RK4 with exact sensitivities, all segments stepped together,
a diverging segment frozen, never an exception (:mod:`discover.integrator`). The
least-squares problem: :mod:`discover.shooting`; ``max_nfev`` and ``time_limit`` bound
the work. Identifiability and standard errors (σ²·(JᵀJ)⁺, Newey–West):
:mod:`discover.identifiability`. Types in and out: :mod:`discover.refine_types`.

A hidden state's scale: if every term that contains hidden state h is a monomial in
it and no output uses it, x_h → a·x_h with matching changes of the coefficients
leaves the outputs unchanged. A scale rule set by the caller removes it: fix one of
those coefficients (``Structure.fixed``) or a non-zero initial value
(``fixed_initial``); :attr:`Refinement.scale_notes` says which holds. Without a rule
the fit holds one such coefficient at its starting value (along a flat direction
the optimiser would otherwise drift, and the continuity penalty pulls the hidden
state toward zero), and the report names the direction as not determined.

Caution: a refined model is fitted to the training runs only. Before a model is used
to control real equipment, validate it on held-out runs and under the operating
conditions it will see.
"""

from __future__ import annotations

import math
import time
from typing import Mapping, Sequence

import numpy as np
from scipy import sparse
from threadpoolctl import threadpool_limits

from .bootstrap import correlation_length
from .exceptions import ConfigError
from .identifiability import (NULL_COMPONENT, _direction_text, _scale_change, _scale_notes, _scale_rules,
                              andrews_lags, covariance_from_jacobian, newey_west_covariance, noise_level, scaled_svd)
from .integrator import _cut, _Dynamics, _integrate, _layout, _limits, _needed_substeps
from .refine_types import (MeasuredRun, Refinement, Structure, _check_runs, _state_values, coefficient_name,
                           structure_from_model)
from .shooting import TIMED_OUT, _local_fit, _segment_starts, _Shooting, _solve
from .simulate import guess_interpolation
# Constants that moved with their code, still reachable as discover.refine.<NAME>:
from .identifiability import NOT_DETERMINED, SCALE_FREE, SCALE_SET, SCALE_ZERO_INITIAL, SHOWN_COMPONENT  # noqa: F401
from .integrator import RK4_STEP_LIMIT  # noqa: F401
from .shooting import START_WINDOW  # noqa: F401

__all__ = [
    "MeasuredRun",
    "Structure",
    "Refinement",
    "refine",
    "structure_from_model",
    "coefficient_name",
    "noise_level",
    "scaled_svd",
    "covariance_from_jacobian",
    "newey_west_covariance",
    "andrews_lags",
]

#: Shortest default segment, in samples.
MIN_SEGMENT = 8
#: Largest continuity gap, in units of the state's noise scale, of a converged result.
CONTINUITY_TOL = 0.1
#: The first pass uses continuity_weight / CONTINUATION, the second continuity_weight.
CONTINUATION = 10.0
#: Jacobians with more entries than this are built sparse (trust-region solver lsmr).
DENSE_LIMIT = 4_000_000

INTERPOLATIONS = ("linear", "zoh")
JACOBIANS = ("analytic", "2-point", "3-point")


def refine(
    structure: Structure,
    runs: Sequence[MeasuredRun],
    *,
    segment_length: int | None = None,
    initial_guess: Mapping[str, float | Sequence[float]] | None = None,
    fixed_initial: Mapping[str, float | Sequence[float]] | None = None,
    state_guess: Sequence[np.ndarray] | None = None,
    output_noise: Sequence[float] | None = None,
    continuity_weight: float = 1000.0,
    interpolation: str | None = None,
    substeps: int | None = None,
    jacobian: str = "analytic",
    max_nfev: int = 200,
    time_limit: float = 120.0,
    identifiability_rtol: float = 1e-6,
    divergence_factor: float = 100.0,
    hac_lags: int | None = None,
) -> Refinement:
    """Fit the free coefficients of ``structure`` to ``runs`` by output error (multiple shooting).

    Parameters
    ----------
    structure : Structure
    runs : sequence of MeasuredRun
    segment_length : int or None, default=None
        Samples per segment (a segment of L samples spans L − 1 intervals). None: twice
        the correlation length of the measured outputs (the lag where their
        autocorrelation first drops below 1/e, median over runs: a segment then
        spans the memory of the signal), at most a tenth of the shortest run, at
        least MIN_SEGMENT. A run's whole length means single shooting.
    initial_guess : mapping of str to float or sequence, optional
        Starting value at each run's first sample of states not measured as their own
        output (default 0); their other segment starts come from a simulation of the
        starting model.
    fixed_initial : mapping of str to float or sequence, optional
        Initial values (at each run's first sample) held fixed: known initial states,
        or a scale rule for a hidden state (a non-zero value).
    state_guess : sequence of ndarray of shape (n_samples, n_states), optional
        Starting trajectories per run (e.g. smoothed states or a filter's estimate);
        segment starts are read from them where finite, else by the rules above.
    output_noise : sequence of float of shape (n_outputs,), optional
        Noise standard deviation of each output; None estimates it (:func:`noise_level`).
    continuity_weight : float, default=1000
        Weight of the continuity residuals relative to noise-scaled output residuals.
    interpolation : {"linear", "zoh"}, a sequence of them (one per run), or None, default=None
        Input between samples; None guesses it for each run
        (:func:`discover.simulate.guess_interpolation`): step runs and smooth runs of one
        fit each keep their own rule.
    substeps : int or None, default=None
        RK4 substeps per sample interval. None: the smallest with h·ρ ≤ RK4_STEP_LIMIT
        along the data for the starting model, raised and refitted once if the
        refined model needs more.
    jacobian : {"analytic", "2-point", "3-point"}, default="analytic"
        Exact sensitivities, or finite differences by ``least_squares``.
    max_nfev : int, default=200
        Most residual evaluations of ``least_squares``.
    time_limit : float, default=120
        Seconds; at the limit the best point so far is returned, not converged.
    identifiability_rtol : float, default=1e-6
        Directions whose scaled singular value is below this times the largest are
        reported as not determined.
    divergence_factor : float, default=100
        A segment is stopped as diverged outside centre ± this × half-range of the
        starting trajectories.
    hac_lags : int or None, default=None
        Lags of the Newey–West standard errors; None: :func:`andrews_lags` of the
        free-run residuals.

    Returns
    -------
    Refinement

    Raises
    ------
    DataError
        Runs of the wrong shape, non-finite values, time not increasing.
    ConfigError
        Options out of range, unknown states in the mappings.

    Notes
    -----
    BLAS runs on one thread during the call: the dense problems here are small, and on
    a shared 2-core machine a 1800 × 105 SVD took 16 ms on one OpenBLAS thread and
    360 ms on two (measured, OpenBLAS 0.3.31).
    """
    with threadpool_limits(limits=1):
        return _refine(structure, runs, segment_length=segment_length, initial_guess=initial_guess,
                       fixed_initial=fixed_initial, state_guess=state_guess, output_noise=output_noise,
                       continuity_weight=continuity_weight, interpolation=interpolation, substeps=substeps,
                       jacobian=jacobian, max_nfev=max_nfev, time_limit=time_limit,
                       identifiability_rtol=identifiability_rtol, divergence_factor=divergence_factor,
                       hac_lags=hac_lags)


def _refine(structure, runs, *, segment_length, initial_guess, fixed_initial, state_guess, output_noise,
            continuity_weight, interpolation, substeps, jacobian, max_nfev, time_limit, identifiability_rtol,
            divergence_factor, hac_lags):
    if not isinstance(structure, Structure):
        raise ConfigError(f"refine: `structure` must be a Structure. Got {type(structure).__name__}.")
    runs = _check_runs(structure, runs)
    n_runs, states = len(runs), structure.state_names
    n_states = len(states)
    if interpolation is None:
        interpolation = tuple(guess_interpolation(run.u) for run in runs)
    elif isinstance(interpolation, str):
        interpolation = (interpolation,) * n_runs
    interpolation = tuple(interpolation)
    if len(interpolation) != n_runs or any(rule not in INTERPOLATIONS for rule in interpolation):
        raise ConfigError(f"refine: `interpolation` must be one of {INTERPOLATIONS}, or one per run. "
                          f"Got {interpolation!r}.")
    if jacobian not in JACOBIANS:
        raise ConfigError(f"refine: `jacobian` must be one of {JACOBIANS}. Got {jacobian!r}.")
    for name, value, low in (("continuity_weight", continuity_weight, 0.0), ("time_limit", time_limit, 0.0),
                             ("divergence_factor", divergence_factor, 1.0)):
        if not isinstance(value, (int, float)) or not value > low or not math.isfinite(value):
            raise ConfigError(f"refine: `{name}` must be a number > {low:g}. Got {value!r}.")
    if not isinstance(max_nfev, int) or max_nfev < 1:
        raise ConfigError(f"refine: `max_nfev` must be an int >= 1. Got {max_nfev!r}.")
    if hac_lags is not None and (not isinstance(hac_lags, int) or hac_lags < 0):
        raise ConfigError(f"refine: `hac_lags` must be an int >= 0 or None. Got {hac_lags!r}.")
    if substeps is not None and (not isinstance(substeps, int) or substeps < 1):
        raise ConfigError(f"refine: `substeps` must be an int >= 1 or None. Got {substeps!r}.")
    if segment_length is None:
        lengths = [correlation_length(run.y) for run in runs]
        shortest = min(len(run.t) for run in runs)
        segment_length = max(MIN_SEGMENT, min(2 * int(np.median(lengths)), shortest // 10))
    elif not isinstance(segment_length, int) or segment_length < 2:
        raise ConfigError(f"refine: `segment_length` must be an int >= 2 or None. Got {segment_length!r}.")
    if output_noise is None:
        y_scale = noise_level([run.y for run in runs])
    else:
        y_scale = np.asarray(output_noise, dtype=float).ravel()
        if y_scale.shape != (len(structure.output_names),) or not np.all(y_scale > 0):
            raise ConfigError(
                f"refine: `output_noise` must hold one positive value per output {list(structure.output_names)}. "
                f"Got {output_noise!r}."
            )
    guess0 = _state_values(initial_guess, structure, n_runs, "refine: initial_guess")
    fixed0 = _state_values(fixed_initial, structure, n_runs, "refine: fixed_initial")
    if state_guess is not None:
        if len(state_guess) != n_runs:
            raise ConfigError(f"refine: `state_guess` must hold one array per run ({n_runs}).")
        state_guess = [np.asarray(g, dtype=float) for g in state_guess]
        for run, g in zip(runs, state_guess):
            if g.shape != (len(run.t), n_states):
                raise ConfigError(
                    f"refine: state_guess for {run.name!r} must have shape ({len(run.t)}, {n_states}). Got {g.shape}."
                )

    dynamics = _Dynamics(structure)
    coef0 = np.array([structure.equations[s][t] for s, t in dynamics.coef_pairs])
    free_coef = np.array([pair not in structure.fixed for pair in dynamics.coef_pairs], dtype=bool)
    measured = dynamics.output_index  # state measured as its own output, per output
    # A hidden state's free scale would let the fit drift along it (the continuity penalty
    # even pulls it toward zero); hold it by one coefficient during the fit and report it.
    changes = {h: _scale_change(structure, dynamics, h) for h in structure.hidden}
    pinned, fit_coef = {}, free_coef.copy()
    for h, change in changes.items():
        if change is None or _scale_rules(dynamics, states.index(h), change, coef0, free_coef, fixed0, runs)[0]:
            continue
        candidates = [j for j in range(dynamics.n_coef) if fit_coef[j] and change[j] != 0 and coef0[j] != 0]
        if candidates:
            pinned[h] = candidates[0]
            fit_coef[candidates[0]] = False

    # Starting trajectories: measured states from the data, the rest from the starting model.
    trajectories = []
    for r, run in enumerate(runs):
        x = np.full((len(run.t), n_states), np.nan)
        for o, k in enumerate(measured):
            if k >= 0:
                x[:, k] = run.y[:, o]
        if state_guess is not None:
            given = np.isfinite(state_guess[r])
            x[given] = state_guess[r][given]
        trajectories.append(x)
    # Initial values for the simulation of the starting model.
    x_first = np.array([[_local_fit(run.t, traj[:, k], 0) if np.isfinite(traj[:, k]).all() else np.nan
                         for k in range(n_states)] for run, traj in zip(runs, trajectories)])
    x_first = np.where(np.isfinite(x_first), x_first, np.where(np.isfinite(guess0), guess0, 0.0))
    x_first = np.where(np.isfinite(fixed0), fixed0, x_first)
    data_limits = _limits(trajectories, x_first, divergence_factor)
    if substeps is None:
        substeps_used = _needed_substeps(dynamics, runs, trajectories, coef0)
    else:
        substeps_used = substeps
    if not all(np.isfinite(traj).all() for traj in trajectories):
        single = _layout(runs, [np.array([0, len(run.t) - 1]) for run in runs], substeps_used, interpolation)
        xs, _, _ = _integrate(dynamics, single, x_first, coef0, sensitivities=False, limits=data_limits)
        for r, run in enumerate(runs):
            sim = xs[: len(run.t), r]
            missing = ~np.isfinite(trajectories[r])
            trajectories[r][missing] = sim[missing]
    limits = _limits(trajectories, x_first, divergence_factor)
    y_spread = np.std(np.vstack([run.y for run in runs]), axis=0)
    ratio = float(np.median(y_scale / np.where(y_spread > 0, y_spread, 1.0)))
    state_scale = np.empty(n_states)
    stacked = np.vstack(trajectories)
    for k in range(n_states):
        outputs_of_k = [o for o, j in enumerate(measured) if j == k]
        if outputs_of_k:
            state_scale[k] = y_scale[outputs_of_k[0]]
        else:
            spread = float(np.std(stacked[:, k]))
            state_scale[k] = ratio * (spread if spread > 0 else 1.0)

    boundaries = [_cut(len(run.t), min(segment_length, len(run.t))) for run in runs]
    # Continuation in the weight: a heavy continuity penalty from the start makes weakly
    # determined directions crawl (measured: an RLC fit with the hidden scale set by one
    # initial value took 214 iterations at weight 1000, 36 at 100); the second pass
    # starts next to its optimum.
    weights = [continuity_weight / CONTINUATION, continuity_weight] if continuity_weight > CONTINUATION \
        else [continuity_weight]
    deadline = time.monotonic() + time_limit
    passes, notes = [], []
    coef_start, previous, stage, raised = coef0.copy(), None, 0, False
    while True:
        layout = _layout(runs, boundaries, substeps_used, interpolation)
        starts0, free_start = _segment_starts(runs, layout, trajectories, measured, fixed0, previous)
        problem = _Shooting(dynamics, layout, runs, y_scale, state_scale, coef_start, fit_coef, starts0,
                            free_start, weights[stage], limits, DENSE_LIMIT)
        fit = _solve(problem, jacobian, max_nfev, deadline, time_limit)
        passes.append(fit)
        coef_fit, starts_fit = problem.unpack(fit["x"])
        settled = fit["status"] > 0 and not problem.residuals(fit["x"])[1][2].any()
        if fit["status"] == TIMED_OUT:
            break
        coef_start, previous = coef_fit, (layout, starts_fit)
        if stage + 1 < len(weights):
            stage += 1
            continue
        needed = _needed_substeps(dynamics, runs, trajectories, coef_fit) if substeps is None else substeps_used
        if substeps is not None or needed <= substeps_used or raised or not settled:
            break
        notes.append(f"substeps raised from {substeps_used} to {needed} for the refined model, and refitted")
        substeps_used, raised = needed, True

    r_final, (_, _, diverged, starts_fit, _, _) = problem.residuals(fit["x"])
    gaps = r_final[len(problem.y) * dynamics.n_outputs:].reshape(-1, n_states) / problem.weight
    continuity_gap = float(np.max(np.abs(gaps))) if gaps.size else 0.0

    # Free run of the refined model and its Jacobian (identifiability, covariance).
    x_init = starts_fit[[np.flatnonzero(layout.run == r)[0] for r in range(n_runs)]]
    free_init = ~np.isfinite(fixed0)
    single = _layout(runs, [np.array([0, len(run.t) - 1]) for run in runs], substeps_used, interpolation)
    free_run = _Shooting(dynamics, single, runs, y_scale, state_scale, coef_fit, free_coef, x_init, free_init,
                         continuity_weight, limits, DENSE_LIMIT)
    p_free = free_run.pack(coef_fit, x_init)
    r_free, jac_free, (xs_free, _, free_diverged, _, _, stopped) = free_run.residuals_and_jacobian(p_free)
    n_out_res = len(free_run.y) * dynamics.n_outputs
    sim_states, sim_outputs = [], []
    for r, run in enumerate(runs):
        x = xs_free[: len(run.t), r].copy()
        y = dynamics.outputs(x, run.u)[0]
        x[stopped[r]:], y[stopped[r]:] = np.nan, np.nan  # NaN after a diverged run's stop
        sim_states.append(x)
        sim_outputs.append(y)
    output_rmse = np.sqrt(np.nanmean((np.vstack(sim_outputs) - free_run.y) ** 2, axis=0))

    coefficient_names = tuple(coefficient_name(s, t) for s, t in dynamics.coef_pairs)
    free_names = tuple(n for n, f in zip(coefficient_names, free_coef) if f)
    initial_names = tuple(f"{states[k]}(t0) of {run.name!r}" for r, run in enumerate(runs)
                          for k in range(n_states) if free_init[r, k])
    parameter_names = free_names + initial_names
    n_free = len(free_names)
    standard_errors = {s: {t: math.nan for t in structure.equations[s]} for s in states}
    standard_errors_hac = {s: dict(errors) for s, errors in standard_errors.items()}
    resolved_lags = -1
    covariance = np.full((n_free, n_free), np.nan)
    not_identifiable, scale_notes = [], []
    sigma2 = math.nan
    singular_values = np.empty(0)
    if free_diverged.any():
        notes.append("identifiability and standard errors not computed: the free run of the refined model diverged")
    else:
        jac_free = jac_free.toarray() if sparse.issparse(jac_free) else jac_free
        j_out = jac_free[:n_out_res]
        values, directions, norms = scaled_svd(j_out)
        singular_values = values
        null = values <= identifiability_rtol * values[0] if values[0] > 0 else np.ones(len(values), bool)
        null_basis = directions[:, null]
        cov, sigma2, _ = covariance_from_jacobian(j_out, r_free[:n_out_res], rtol=identifiability_rtol)
        free_values = np.concatenate([coef_fit[free_coef], x_init[free_init]])
        for v in null_basis.T:
            not_identifiable.append(_direction_text(v, norms, free_values, parameter_names, n_free, runs,
                                                    states, free_init))
        undetermined = np.linalg.norm(null_basis, axis=1) > NULL_COMPONENT
        # Autocorrelated residuals (model error, coloured noise): Newey–West sandwich.
        n_total = len(free_run.y)
        groups = np.repeat(np.arange(n_runs), [len(run.t) for run in runs])
        residual_rows = r_free[:n_out_res].reshape(n_total, dynamics.n_outputs)
        resolved_lags = andrews_lags(residual_rows, groups) if hac_lags is None else hac_lags
        cov_hac = newey_west_covariance(j_out.reshape(n_total, dynamics.n_outputs, -1), residual_rows, groups,
                                        lags=resolved_lags, rtol=identifiability_rtol)
        free_pairs = [pair for pair, f in zip(dynamics.coef_pairs, free_coef) if f]
        for j, (s, t) in enumerate(free_pairs):
            if not undetermined[j]:
                standard_errors[s][t] = float(math.sqrt(max(cov[j, j], 0.0)))
                standard_errors_hac[s][t] = float(math.sqrt(max(cov_hac[j, j], 0.0)))
        covariance = cov[:n_free, :n_free].copy()
        covariance[undetermined[:n_free], :] = np.nan
        covariance[:, undetermined[:n_free]] = np.nan
        scale_notes = _scale_notes(structure, dynamics, changes, pinned, coef_fit, free_coef, x_init, free_init,
                                   fixed0, runs, j_out, norms, values, identifiability_rtol)

    reasons = []
    if fit["message"]:
        reasons.append(fit["message"])
    if diverged.any():
        reasons.append(f"{int(diverged.sum())} of {len(diverged)} segments diverged")
    if continuity_gap > CONTINUITY_TOL:
        reasons.append(f"continuity gap {continuity_gap:.3g} noise scales (> {CONTINUITY_TOL:g})")
    if free_diverged.any():
        reasons.append("the free run of the refined model diverged in run "
                       + ", ".join(repr(runs[r].name) for r in np.flatnonzero(free_diverged)))
    converged = passes[-1]["status"] > 0 and not diverged.any() and continuity_gap <= CONTINUITY_TOL \
        and not free_diverged.any()
    coefficients = {s: {} for s in states}
    for (s, t), value in zip(dynamics.coef_pairs, coef_fit):
        coefficients[s][t] = float(value)
    segment_starts = tuple(starts_fit[layout.run == r] for r in range(n_runs))
    return Refinement(
        state_names=states,
        input_names=structure.input_names,
        output_names=structure.output_names,
        hidden=structure.hidden,
        coefficients=coefficients,
        fixed=structure.fixed,
        initial_states=tuple(x_init),
        segment_starts=segment_starts,
        segment_length=int(segment_length),
        substeps=int(substeps_used),
        cost=float(0.5 * r_final @ r_final),
        iterations=int(sum(f["njev"] for f in passes)),
        n_evaluations=int(sum(f["nfev"] for f in passes)),
        converged=bool(converged),
        message="; ".join(reasons),
        continuity_gap=continuity_gap,
        output_scale=y_scale,
        singular_values=singular_values,
        parameter_names=parameter_names,
        not_identifiable=tuple(not_identifiable),
        scale_notes=tuple(scale_notes),
        standard_errors=standard_errors,
        standard_errors_hac=standard_errors_hac,
        hac_lags=int(resolved_lags),
        covariance=covariance,
        free_names=free_names,
        residual_variance=float(sigma2),
        simulated_states=tuple(sim_states),
        simulated_outputs=tuple(sim_outputs),
        output_rmse=output_rmse,
        interpolation=interpolation[0] if len(set(interpolation)) == 1 else "per run: " + ", ".join(interpolation),
        notes=tuple(notes),
    )
