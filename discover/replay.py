"""``discover simulate``: a saved model on a run file, the way ``discover run`` validates.

A model file written by ``discover run`` records the time column, the derivative
method (the simulation starts from the *smoothed* first state, as in validation) and
the simulation settings (method, tolerances, bounded region, time limit), so the
metrics printed here reproduce ``heldout_metrics.csv``. Older model files without
them are simulated from the raw first sample, with tolerances and a bounded region
taken from the run itself (said in the output).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .data import load_run
from .derivatives import DERIVATIVE_METHODS
from .exceptions import DataError, ModelFileError
from .model import load_model
from .simulate import DEFAULT_TIME_LIMIT, Simulation, SimulationSettings, fit_metrics, run_model, simulation_settings

#: Bounded region for model files that do not record one: the run's range widened this much.
FALLBACK_DIVERGENCE_FACTOR = 100.0


@dataclass(frozen=True)
class Replay:
    """A saved model simulated on one run."""

    run_name: str
    state_names: tuple
    simulation: Simulation
    metrics: dict
    notes: tuple

    def describe(self):
        """The lines ``discover run`` prints for a held-out run, plus RMSE."""
        lines = [f"Note: {note}" for note in self.notes]
        if self.simulation.diverged:
            lines.append(f"  {self.run_name}: diverged ({self.simulation.message})")
            return "\n".join(lines)
        fits = ", ".join(f"{s} {f:.1f} %" for s, f in zip(self.state_names, self.metrics["fit_percent"]))
        rmse = ", ".join(f"{s} {r:.4g}" for s, r in zip(self.state_names, self.metrics["rmse"]))
        lines.append(f"  {self.run_name}: fit {fits}")
        lines.append(f"  {self.run_name}: RMSE {rmse}")
        return "\n".join(lines)


def _start_state(model, run, notes):
    """The smoothed first state by the model's derivative method, else the raw first sample."""
    recorded = model.info.get("derivatives")
    if not isinstance(recorded, dict) or recorded.get("method") not in DERIVATIVE_METHODS:
        notes.append("the model file records no derivative method; starting from the raw first sample.")
        return run.x[0]
    options = {k: v for k, v in recorded.items() if k != "method"}
    try:
        x_smooth, _ = DERIVATIVE_METHODS[recorded["method"]](run.t - run.t[0], run.x, **options)
    except (DataError, TypeError, ValueError) as err:
        notes.append(f"could not smooth the run as the model's run did ({err}); starting from the raw "
                     "first sample.")
        return run.x[0]
    return x_smooth[0]


def _settings(model, run, interpolation, notes):
    settings = SimulationSettings.from_dict(model.info.get("simulation"), len(model.state_names))
    if settings is None:
        notes.append("the model file records no simulation settings; tolerances and the bounded region "
                     "come from this run's own range.")
        low, high = run.x.min(axis=0), run.x.max(axis=0)
        settings = simulation_settings(low, high, method="LSODA", rtol=1e-5, atol=None,
                                       divergence_factor=FALLBACK_DIVERGENCE_FACTOR,
                                       interpolation="auto", time_limit=DEFAULT_TIME_LIMIT)
    if interpolation is not None:
        settings = SimulationSettings(settings.method, settings.rtol, settings.atol, settings.center,
                                      settings.half_width, interpolation, settings.time_limit)
    return settings


def replay_file(model_path, data_path, *, time=None, interpolation=None):
    """Simulate the model at ``model_path`` on the run file ``data_path``.

    Parameters
    ----------
    time : str, optional
        The time column; default: the one recorded in the model file, else ``"t"``.
    interpolation : {"auto", "linear", "zoh"}, optional
        Input between samples; default: the rule recorded in the model file.
    """
    model = load_model(model_path)
    if model.hidden_states:
        raise ModelFileError(f"{model_path}: the model has hidden states ({', '.join(model.hidden_states)}) that no "
                             "column can start; `discover simulate` needs every state measured. Estimate them with "
                             "discover.load_model(path).estimate_states(t, y, u).")
    time = time or model.info.get("time") or "t"
    if not isinstance(time, str):
        raise ModelFileError(f"{model_path}: 'time' must be the name of the time column. Got {time!r}.")
    run = load_run(Path(data_path), time=time, states=model.state_names, inputs=model.input_names,
                   rename={}, missing="refuse", max_gap=1)
    notes = []
    x0 = _start_state(model, run, notes)
    settings = _settings(model, run, interpolation, notes)
    simulation = run_model(model, run.t, x0, run.u, settings)
    metrics = fit_metrics(run.x, simulation.x)
    if not np.isfinite(metrics["rmse"]).all() and not simulation.diverged:
        notes.append("some fit values are undefined (a state is constant in this run).")
    return Replay(run.name, tuple(model.state_names), simulation, metrics, tuple(notes))
