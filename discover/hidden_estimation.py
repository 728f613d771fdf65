"""Hidden-state reconstruction and held-out validation for a model with outputs y = g(x, u).

Every run, training and held-out, is filtered and smoothed through the identified model
(:func:`discover.estimation.estimate_states`: unscented Kalman filter and RTS smoother).
The noise levels come from the data, not from settings:

* measurement noise of each output: the standard deviation of raw minus smoothed
  samples (the [derivatives] smoothing residuals) over the training runs;
* process noise of each state: the variance per unit time of the one-step residuals
  x̃(t_{k+1}) − Φ_k(x̃(t_k)) along the training runs, where x̃ holds the smoothed measured
  states and the fitted free run of the hidden ones, and Φ_k is one RK4 step of the model
  over the interval (Kalman filter tuning from prediction residuals; common practice);
  a hidden state at least the measured states' level relative to each state's spread.

A training run starts from its fitted initial state, a held-out run from the smoothed
measured states and the hidden states' mean over the training runs (prior spread: their
standard deviation there). Held-out validation simulates the model from the smoothed
estimate at the run's start with the recorded input and scores each output.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .exceptions import DataError
from .simulate import fit_metrics, run_model

#: A floor under each state's process noise, relative to its spread per √(run length):
#: a zero would make the filter trust the model without limit.
PROCESS_FLOOR = 1e-6


@dataclass(frozen=True)
class RunEstimate:
    """One run's estimate and, for a held-out run, its free-run validation.

    Attributes
    ----------
    run, role : str
        The run's name; "training" or "held_out".
    t, y, u : ndarray
        Times, measured outputs (n_samples, n_outputs), inputs.
    estimate : discover.estimation.StateEstimate or None
        None when the filter failed (``message`` says why).
    simulated_outputs : ndarray of shape (n_samples, n_outputs) or None
        Free run of the model from the smoothed start (held-out runs).
    metrics : dict or None
        ``fit_metrics`` of the outputs (rmse, nrmse, fit_percent per output).
    message : str
    """

    run: str
    role: str
    t: np.ndarray
    y: np.ndarray
    u: np.ndarray
    estimate: object
    simulated_outputs: np.ndarray | None
    metrics: dict | None
    diverged: bool = False
    message: str = ""


@dataclass(frozen=True)
class Estimates:
    """Noise levels as resolved and every run's estimate."""

    measurement_std: np.ndarray
    process_std: np.ndarray
    typical_state: np.ndarray
    typical_spread: np.ndarray
    interpolation: str
    runs: tuple
    notes: tuple

    def record(self, model):
        """The model file's ``estimation`` entry: what :meth:`Model.estimate_states` reads back."""
        return {
            "method": "unscented Kalman filter and RTS smoother (filterpy), Van Loan process noise",
            "measurement_std": dict(zip(model.output_expressions, map(float, self.measurement_std))),
            "measurement_std_from": "raw minus smoothed outputs of the training runs",
            "process_std": dict(zip(model.state_names, map(float, self.process_std))),
            "process_std_from": "one-step residuals of the model along the training runs, per unit time",
            "typical_state": dict(zip(model.state_names, map(float, self.typical_state))),
            "typical_spread": dict(zip(model.state_names, map(float, self.typical_spread))),
            "interpolation": self.interpolation,
            "band": "smoothed estimate ± 2 standard deviations",
        }


def _typical(trajectories):
    """Mean and standard deviation (1 where it is 0 or undefined) of each state over the finite rows."""
    stacked = np.vstack(trajectories)
    rows = stacked[np.isfinite(stacked).all(axis=1)]
    if not len(rows):
        return np.zeros(stacked.shape[1]), np.ones(stacked.shape[1])
    spread = rows.std(axis=0)
    return rows.mean(axis=0), np.where(spread > 0, spread, 1.0)


def _one_step(model, t, x, u, interpolation):
    """x(t_{k+1}) predicted by one RK4 step from x(t_k); shape (n_samples - 1, n_states)."""
    h = np.diff(t)[:, None]
    u0, u1 = u[:-1], u[1:]
    um = u0 if interpolation == "zoh" else 0.5 * (u0 + u1)
    u1 = u0 if interpolation == "zoh" else u1
    x0 = x[:-1]
    with np.errstate(all="ignore"):
        k1 = model.rhs(x0, u0)
        k2 = model.rhs(x0 + 0.5 * h * k1, um)
        k3 = model.rhs(x0 + 0.5 * h * k2, um)
        k4 = model.rhs(x0 + h * k3, u1)
    return x0 + h / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)


def noise_levels(model, smoothed, refinement, n_measured, interpolation):
    """(measurement_std per output, process_std per state) from the training runs."""
    measurement = smoothed.noise()
    residuals, seconds = [], 0.0
    for run, fitted in zip(smoothed.full, refinement.simulated_states):
        x = fitted.copy()
        x[:, :n_measured] = run.x[:, :n_measured]
        step = x[1:] - _one_step(model, run.t, x, run.u, interpolation)
        keep = np.isfinite(step).all(axis=1)
        keep[:smoothed.trim] = False
        keep[len(keep) - smoothed.trim:] = False
        residuals.append(step[keep])
        seconds += float(np.sum(np.diff(run.t)[keep]))
    residuals = np.vstack(residuals)
    spread = _typical(refinement.simulated_states)[1]
    length = max(seconds, 1e-300)
    floor = PROCESS_FLOOR * np.where(spread > 0, spread, 1.0) / np.sqrt(length / max(len(smoothed.full), 1))
    process = np.sqrt(np.sum(residuals ** 2, axis=0) / length) if len(residuals) else floor.copy()
    # A hidden state's trajectory is the model's own free run, so its one-step residuals only
    # see what its equation reads from the measured states: it gets at least the measured
    # states' process noise relative to their spread.
    if 0 < n_measured < len(process):
        relative = float(np.median(process[:n_measured] / np.where(spread[:n_measured] > 0, spread[:n_measured], 1.0)))
        process[n_measured:] = np.maximum(process[n_measured:], relative * spread[n_measured:])
    return measurement, np.maximum(process, floor)


def fast_functions(model, structure):
    """(f, g): the model's right-hand side and outputs on rows, through the refinement's evaluator.

    The filter calls them for one sigma point at a time, tens of thousands of times per
    run; the monomial evaluator of :mod:`discover.integrator` is the cheaper path there.
    """
    from .integrator import _Dynamics

    dynamics = _Dynamics(structure)
    xi = dynamics.xi(np.array([structure.equations[s][t] for s, t in dynamics.coef_pairs]))

    def f(x, u):
        return dynamics.rhs(x, u, xi, None)[0]

    def g(x, u):
        return dynamics.evaluate_outputs(np.concatenate([x, u], axis=1))

    return f, g


def estimate_runs(model, fit, smoothed_train, smoothed_held, training, held_out, simulation, interpolation,
                  n_measured, *, estimate=True):
    """Every run's estimate (when ``estimate``) and the held-out validation: an :class:`Estimates`.

    The filter's RK4 takes the substeps per sample interval that the output-error fit
    resolved for the same model (stable steps along the data).
    """
    from .estimation import estimate_states
    from .refine_types import structure_from_model

    refinement = fit.refinement
    f, g = fast_functions(model, structure_from_model(model, hidden=model.hidden_states,
                                                      outputs=model.output_expressions))
    measurement, process = noise_levels(model, smoothed_train, refinement, n_measured, interpolation)
    typical, spread = _typical(refinement.simulated_states)
    notes, runs = [], []
    jobs = [(run, smooth, "training", x0) for run, smooth, x0 in
            zip(training.runs, smoothed_train.full, refinement.initial_states)]
    jobs += [(run, smooth, "held_out", None) for run, smooth in zip(held_out.runs, smoothed_held.full)]
    for run, smooth, role, x0 in jobs:
        # Prior spread: twice the noise for a measured state; for a hidden one a tenth of its spread
        # from the fitted initial value of a training run, its whole spread on a held-out run.
        cov_spread = 0.1 * spread
        if x0 is None:
            x0 = typical.copy()
            x0[:n_measured] = smooth.x[0, :n_measured]
            cov_spread = spread.copy()
        cov_spread[:n_measured] = np.maximum(2 * measurement[:n_measured], 1e-9 * spread[:n_measured])
        result, message = None, ""
        if estimate:
            try:
                max_step = float(np.median(np.diff(run.t))) / refinement.substeps * (1 + 1e-9)
                result = estimate_states(f, g, run.t, run.x, run.u if model.input_names else None,
                                         state_names=model.state_names, x0=x0, x0_cov=np.diag(cov_spread ** 2),
                                         measurement_std=measurement, process_std=process,
                                         interpolation=interpolation, max_step=max_step)
            except DataError as err:
                message = f"state estimation of run {run.name!r} failed: {err}"
                notes.append(message)
        simulated, metrics, diverged = None, None, False
        if role == "held_out":
            start = result.smoothed[0] if result is not None else x0
            sim = run_model(model, run.t, start, run.u, simulation)
            diverged = bool(sim.diverged)
            simulated = model.outputs(np.nan_to_num(sim.x), run.u) if not diverged else None
            metrics = fit_metrics(run.x, simulated) if simulated is not None else None
            if diverged:
                notes.append(f"held-out run {run.name!r}: the free run diverged ({sim.message}).")
        runs.append(RunEstimate(run.name, role, run.t, run.x, run.u, result, simulated, metrics, diverged, message))
    return Estimates(measurement, process, typical, spread, interpolation, tuple(runs), tuple(notes))
