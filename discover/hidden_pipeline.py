"""The run of a config with hidden states: data → smoothing → output-error fit → estimation.

Chains the stages for ``[hidden]`` configs (:func:`discover.pipeline.run` hands over when
:func:`discover.schema.uses_hidden` holds); a config without hidden states or further
outputs never comes here. The derivative-based selection, the bootstrap ensemble and
the ranking work on measured states and are not run; the summary says so.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from .data import Dataset, check_excitation, data_warnings, load_dataset
from .hidden import fit_hidden
from .hidden_config import hidden_spec
from .hidden_estimation import Estimates, estimate_runs
from .model import Model
from .simulate import SimulationSettings, guess_interpolation, simulation_settings
from .smoothing import smooth_runs
from .window_choice import resolve_window

NOT_RUN = ("With hidden states the model is fitted by output error; the derivative-based selection, the "
           "bootstrap ensemble and the ranking ([selection], [bootstrap], [ranking]) were not run.")


@dataclass(frozen=True)
class HiddenResult:
    """Everything a run with hidden states produced; writers and reports compute nothing new."""

    settings: object
    model: Model
    spec: object
    training: Dataset
    held_out: Dataset
    fit: object
    estimates: Estimates
    simulation: SimulationSettings
    warnings: tuple
    timings: dict = field(default_factory=dict)

    def validation_table(self):
        rows = []
        for item in self.estimates.runs:
            if item.role != "held_out":
                continue
            for k, name in enumerate(self.model.output_expressions):
                metrics = item.metrics or {}
                value = (lambda key: float(metrics[key][k]) if key in metrics else np.nan)  # noqa: E731
                rows.append({"run": item.run, "output": name, "rmse": value("rmse"), "nrmse": value("nrmse"),
                             "nrmse_fit_percent": value("fit_percent"), "diverged": item.diverged})
        return pd.DataFrame(rows, columns=["run", "output", "rmse", "nrmse", "nrmse_fit_percent", "diverged"])


def state_extent(trajectories):
    """(min, max) of every state over the fitted free runs; 0 and 1 for a state that is never finite."""
    stacked = np.vstack(trajectories)
    finite = np.isfinite(stacked)
    low = np.array([stacked[finite[:, k], k].min() if finite[:, k].any() else 0.0 for k in range(stacked.shape[1])])
    high = np.array([stacked[finite[:, k], k].max() if finite[:, k].any() else 1.0 for k in range(stacked.shape[1])])
    return low, high


def unused_hidden_columns(hidden, runs):
    """A warning for each hidden state that a file has a column for: that column is not read."""
    notes = []
    for name in hidden:
        files = [run.source for run in runs if name in run.columns]
        if files:
            notes.append(f"Column {name!r} in {', '.join(files)} is not used: {name!r} is declared hidden "
                         "([hidden].states). List it in [data].states to fit it as a measured state.")
    return notes


def run_hidden(settings, *, progress=False):
    """Run a config with hidden states; return a :class:`HiddenResult` (nothing is written)."""
    clock, last = {}, time.perf_counter()

    def done(stage):
        nonlocal last
        now = time.perf_counter()
        clock[stage] = now - last
        last = now

    where = settings.source
    spec = hidden_spec(settings.data, settings.hidden, settings.terms, where)
    # The measured columns are read as the dataset's "states": the measured states, then the further outputs.
    columns = replace(settings, data=replace(settings.data, states=spec.output_columns))
    training, held_out = load_dataset(columns)
    check_excitation(training, where)
    done("data")
    # A window left to the data is chosen once from the measured channels, as in a measured-states run.
    derivatives, _ = resolve_window(settings.derivatives, lambda: [run.x for run in training.runs])
    settings = replace(settings, derivatives=derivatives)
    smoothed = smooth_runs(training, settings.derivatives, progress=progress)
    held_smoothed = smooth_runs(held_out, settings.derivatives)
    done("derivatives")
    rule = settings.simulation.input_interpolation
    interpolation = [guess_interpolation(run.u) if rule == "auto" else rule for run in training.runs]
    fit = fit_hidden(spec, training, smoothed, settings, interpolation)
    done("output error")
    low, high = state_extent(fit.refinement.simulated_states)
    sim = settings.simulation
    simulation = simulation_settings(low, high, method=sim.method, rtol=sim.rtol, atol=sim.atol,
                                     divergence_factor=sim.divergence_factor, interpolation=sim.input_interpolation,
                                     time_limit=settings.compute.simulation_time_limit)
    estimates = estimate_runs(fit.model, fit, smoothed, held_smoothed, training, held_out, simulation,
                              interpolation[0], len(spec.measured), estimate=settings.hidden.estimate)
    info = dict(fit.model.info)
    info["estimation"] = estimates.record(fit.model)
    info["simulation"] = simulation.to_dict()
    model = replace(fit.model, info=info)
    done("estimation")
    warnings = list(settings.notes) + data_warnings(training, held_out) + list(fit.notes) + list(estimates.notes)
    warnings.append(NOT_RUN)
    warnings += unused_hidden_columns(spec.hidden, list(training.runs) + list(held_out.runs))
    if not held_out.runs:
        warnings.append("No run is held out: the model is not validated on unseen data.")
    return HiddenResult(settings, model, spec, training, held_out, fit, estimates, simulation, tuple(warnings),
                        clock)


def write_hidden_files(result, folder):
    """Every file of the output folder of a :class:`HiddenResult`, into ``folder``."""
    import json
    from pathlib import Path

    from . import hidden_report
    from .estimation import write_estimate_csv
    from .provenance import provenance
    from .report import file_stems
    from .schema import to_toml

    folder = Path(folder)
    model = result.model
    model.save(folder / "model.json")
    rows = [{"state": state, "term": expr, "coefficient": value, **stats}
            for state, kept in model.equations() for expr, value, stats in kept]
    pd.DataFrame(rows, columns=["state", "term", "coefficient"] + sorted(model.term_stats)).to_csv(
        folder / "coefficients.csv", index=False)
    result.validation_table().to_csv(folder / "heldout_metrics.csv", index=False)
    stems = file_stems([item.run for item in result.estimates.runs])
    for item, stem in zip(result.estimates.runs, stems):
        if item.estimate is not None:
            write_estimate_csv(item.estimate, folder / f"estimate_{stem}.csv")
    (folder / "config_effective.toml").write_text(to_toml(result.settings, absolute_paths=True))
    (folder / "provenance.json").write_text(json.dumps(provenance(result), indent=2) + "\n")
    (folder / "warnings.txt").write_text("".join(f"{w}\n" for w in result.warnings))
    (folder / "summary.txt").write_text(hidden_report.summary(result) + "\n")
    figures = hidden_report.write_figures(result, folder, stems) if result.settings.output.figures else {}
    if result.settings.output.report:
        (folder / "report.html").write_text(hidden_report.render_report(result, figures, stems), encoding="utf-8")
