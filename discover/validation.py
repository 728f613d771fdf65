"""The validation stage: simulate held-out runs with their recorded inputs, score the fit,
and (with an ensemble) the prediction band of the members.

Each held-out run gets a frozen :class:`RunValidation` holding the trajectories, so
reports and tables draw what was simulated here and never simulate again.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import bootstrap
from .expressions import parse_expression
from .simulate import Simulation, fit_metrics, run_model


@dataclass(frozen=True)
class Band:
    """The ensemble's prediction band on one run.

    Attributes
    ----------
    median, low, high : ndarray of shape (n_samples, n_states)
        Median member trajectory and the central band (members plus measurement noise).
    coverage : ndarray of shape (n_states,)
        Share of measured samples inside the band.
    members_diverged : int
    level : float
    """

    median: np.ndarray
    low: np.ndarray
    high: np.ndarray
    coverage: np.ndarray
    members_diverged: int
    level: float


@dataclass(frozen=True)
class RunValidation:
    """One held-out run simulated from its smoothed first state.

    ``metrics`` holds per-state arrays ``rmse``, ``nrmse`` and ``fit_percent``.
    """

    run: str
    t: np.ndarray
    x: np.ndarray
    u: np.ndarray
    x0: np.ndarray
    interpolation: str
    simulation: Simulation
    metrics: dict
    band: Band | None = None


def validate_runs(model, smoothed, dataset, settings):
    """Simulate each run of ``dataset`` from its smoothed first state with its recorded input.

    Parameters
    ----------
    model : discover.model.Model
    smoothed : discover.smoothing.SmoothedRuns
        The same runs after the derivative stage (untrimmed).
    dataset : discover.data.Dataset
    settings : discover.simulate.SimulationSettings
    """
    results = []
    for smooth, run in zip(smoothed.full, dataset.runs):
        simulation = run_model(model, run.t, smooth.x[0], run.u, settings)
        results.append(RunValidation(run.name, run.t, run.x, run.u, smooth.x[0], settings.interpolation_for(run.u),
                                     simulation, fit_metrics(run.x, simulation.x)))
    return tuple(results)


def with_bands(validation, model, ensemble, settings, noise_std, *, level, seed):
    """The validation with every member simulated on each run (batched solves) and the bands.

    The band's noise draws come from a stream of their own (``[seed, 1]``), so the
    band never shifts the members' draws.
    """
    rng = np.random.default_rng([seed, 1])
    used = np.flatnonzero(np.any(ensemble.coef != 0, axis=(0, 2)))
    if used.size == 0:
        return validation
    known = model.state_names + model.input_names
    expressions = [parse_expression(model.terms[j], known) for j in used]
    coef = ensemble.coef[:, used, :]
    out = []
    for item in validation:
        x, diverged = bootstrap.simulate_ensemble(
            expressions, model.state_names, model.input_names, coef, item.t, item.x0, item.u,
            interpolation=item.interpolation, method=settings.method, rtol=settings.rtol, atol=settings.atol,
            limits=settings.limits, time_limit=settings.time_limit,
        )
        median, low, high = bootstrap.prediction_band(x, diverged, level, noise_std=noise_std, rng=rng)
        band = Band(median, low, high, bootstrap.band_coverage(item.x, low, high), int(diverged.sum()), level)
        out.append(RunValidation(item.run, item.t, item.x, item.u, item.x0, item.interpolation, item.simulation,
                                 item.metrics, band))
    return tuple(out)


def validation_warnings(validation, members):
    """Diverged runs and diverged members, one line each."""
    notes = []
    for item in validation:
        if item.simulation.diverged:
            notes.append(f"Held-out run {item.run!r} diverged: {item.simulation.message}.")
        if item.band is not None and item.band.members_diverged:
            notes.append(f"Held-out run {item.run!r}: {item.band.members_diverged} of {members} ensemble "
                         "members diverged; the band uses the others.")
    return notes


# --------------------------------------------------------------------------- diagnostics


@dataclass(frozen=True)
class Diagnostics:
    """Residual, excitation and coverage checks of the model (Ljung 1999, ch. 13 and 16).

    Attributes
    ----------
    held_out, training : discover.residuals.ResidualAnalysis or None
        Correlation tests of the equation residuals ẋ − f(x, u) on the held-out and the
        training runs, taken every ``stride`` samples.
    stride : int
        Samples between residuals used: the smoothing window, beyond which the smoother's
        own colouring of the residuals has died out. Inputs faster than the smoothing
        window leave a smoothing bias in these residuals that follows the input too, so a
        cross-correlation finding on such data can be the smoother's, not the model's.
    excitation : discover.excitation.InputExcitation or None
        Band and order of persistent excitation of each input in the training runs,
        sampled once per correlation length of the inputs.
    extrapolation : tuple of discover.coverage.Extrapolation
        One per held-out run.
    warnings : tuple of str
    """

    held_out: object
    training: object
    stride: int
    excitation: object
    extrapolation: tuple
    warnings: tuple


def _equation_residuals(model, smoothed, stride):
    runs = [run for run in smoothed.trimmed if len(run.t) >= 8 * stride]
    residuals = [(run.x_dot - model.rhs(run.x, run.u))[::stride] for run in runs]
    return residuals, [run.u[::stride] for run in runs], [run.name for run in runs]


def diagnose(model, training, held_out, training_smoothed, held_smoothed, library_names):
    """Residual tests on held-out and training runs, input excitation, extrapolation warnings."""
    from . import diagnostics

    stride = 2 * held_smoothed.trim + 1
    analyses = []
    for smoothed in (held_smoothed, training_smoothed):
        if smoothed is None:
            analyses.append(None)
            continue
        residuals, inputs, names = _equation_residuals(model, smoothed, stride)
        labels = [f"d({state})/dt" for state in model.state_names]
        analyses.append(diagnostics.residual_analysis(residuals, inputs, state_names=labels,
                                                      input_names=model.input_names, run_names=names)
                        if residuals else None)
    excitation = None
    if model.input_names:
        # Sampled once per correlation length of the inputs: the model is instantaneous in u,
        # so what counts is how many different values the input takes, not how smoothly it
        # moves between neighbouring samples (which makes lagged copies nearly equal).
        step = max(bootstrap.correlation_length(r.u) for r in training.runs)
        excitation = diagnostics.input_excitation([r.t[::step] for r in training.runs],
                                                  [r.u[::step] for r in training.runs],
                                                  input_names=model.input_names,
                                                  run_names=[r.name for r in training.runs])
    # Extremes, so that runs read in chunks (thin samples) are covered exactly.
    extremes = [run.ranges() for run in training.runs]
    reach = diagnostics.training_range([np.vstack(e[:2]) for e in extremes], [np.vstack(e[2:]) for e in extremes],
                                       state_names=model.state_names, input_names=model.input_names)
    extrapolation = tuple(diagnostics.check_extrapolation(reach, run.x, run.u, run_name=run.name)
                          for run in held_out.runs)
    known = model.state_names + model.input_names
    used = [parse_expression(t, known).names for t in library_names]
    counts = {name: sum(name in names for names in used) for name in model.input_names}
    notes = diagnostics.diagnostic_warnings(residuals=analyses[0] or analyses[1], excitation=excitation,
                                            extrapolations=extrapolation, term_counts=counts)
    return Diagnostics(analyses[0], analyses[1], stride, excitation, extrapolation, notes)

