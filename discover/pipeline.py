"""Chain the stages: settings → data → derivatives → Grams → selection → ensemble →
validation → ranking. Each stage takes typed inputs and returns a frozen result;
this module only chains them. :func:`run` is the Python entry point (``discover.run``);
:func:`discover.outputs.write_outputs` writes the folder.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from . import bootstrap, choice, compute, resources, stream, window_choice
from .candidates import Ranking, collect_candidates, rank_candidates
from .config import Settings, load_config
from .data import Dataset, check_excitation, data_warnings, load_dataset
from .grams import (
    ChunkedBackend,
    check_collinear_terms,
    check_library_size,
    fold_labels,
    library_for,
    make_plan,
)
from .model import Model
from .output_error import OutputFit, refine_model
from .selection import Selection, select_terms
from .simulate import SimulationSettings, simulation_settings
from .smoothing import SmoothedRuns, resolve_trim, smooth_runs
from .validation import (
    Diagnostics,
    diagnose,
    validate_runs,
    validation_warnings,
    with_bands,
)
from .weak_grams import target_info, training_backend


@dataclass(frozen=True)
class Result:
    """Everything a run produced; reports and writers read it and compute nothing new."""

    settings: Settings
    model: Model
    library_terms: tuple
    selection: Selection
    training: Dataset
    held_out: Dataset
    smoothed: SmoothedRuns | None  # training runs (None when read in chunks)
    validation: tuple
    warnings: tuple
    single_model: Model
    simulation: SimulationSettings
    ensemble: bootstrap.Ensemble | None = None
    ranking: Ranking | None = None
    diagnostics: Diagnostics | None = None
    output_fit: OutputFit | None = None
    timings: dict = field(default_factory=dict)  # wall-clock seconds per stage

    @property
    def cv(self):
        return self.selection.cv

    @property
    def candidates(self):
        return self.ranking.candidates if self.ranking is not None else ()

    def validation_table(self):
        rows = []
        for item in self.validation:
            for i, state in enumerate(self.model.state_names):
                rows.append({
                    "run": item.run, "state": state, "rmse": item.metrics["rmse"][i],
                    "nrmse": item.metrics["nrmse"][i], "nrmse_fit_percent": item.metrics["fit_percent"][i],
                    "diverged": item.simulation.diverged,
                    "band_coverage": item.band.coverage[i] if item.band is not None else np.nan,
                    "members_diverged": item.band.members_diverged if item.band is not None else np.nan,
                })
        return pd.DataFrame(rows, columns=["run", "state", "rmse", "nrmse", "nrmse_fit_percent", "diverged",
                                           "band_coverage", "members_diverged"])

    def validation_ranges(self):
        """(min, max) over the training runs of every state, then every input (exact, also when read in chunks)."""
        ranges = [run.ranges() for run in self.training.runs]
        low = np.concatenate([np.min([r[0] for r in ranges], axis=0), np.min([r[2] for r in ranges], axis=0)])
        high = np.concatenate([np.max([r[1] for r in ranges], axis=0), np.max([r[3] for r in ranges], axis=0)])
        return low, high

    def inclusion_table(self):
        """Every candidate term × state: inclusion probability and coefficient statistics."""
        if self.ensemble is None:
            return None
        rows = []
        written = {(state, term): value for state, kept in self.model.equations() for term, value, _ in kept}
        for i, state in enumerate(self.model.state_names):
            for j, term in enumerate(self.library_terms):
                row = {"state": state, "term": term, "in_model": (state, term) in written,
                       "coefficient": written.get((state, term), 0.0)}
                row.update({name: values[j, i] for name, values in self.ensemble.summary.as_stats().items()})
                rows.append(row)
        return pd.DataFrame(rows)


def training_extent(training):
    """Exact per-state minimum and maximum over the training runs."""
    ranges = [run.ranges() for run in training.runs]
    return np.min([r[0] for r in ranges], axis=0), np.max([r[1] for r in ranges], axis=0)


def resolve_simulation(settings, training):
    """The one :class:`~discover.simulate.SimulationSettings` of this run."""
    sim = settings.simulation
    low, high = training_extent(training)
    return simulation_settings(low, high, method=sim.method, rtol=sim.rtol, atol=sim.atol,
                               divergence_factor=sim.divergence_factor, interpolation=sim.input_interpolation,
                               time_limit=settings.compute.simulation_time_limit)


def replay_info(settings, simulation):
    """What ``discover simulate`` needs to repeat this run's held-out simulations exactly."""
    return {"time": settings.data.time,
            "derivatives": {"method": settings.derivatives.method, **settings.derivatives.options},
            "simulation": simulation.to_dict()}


def training_states(training, data):
    """The states of every training run for the window choice; runs read in chunks
    (``[data].chunk_rows``) give their first :data:`window_choice.GCV_ROWS` rows only."""
    if not data.chunk_rows:
        return [run.x for run in training.runs]
    states = []
    for run in training.runs:
        chunks = stream.checked_chunks(run.source, time=data.time, states=data.states, inputs=data.inputs,
                                       rename=data.rename, chunk_rows=window_choice.GCV_ROWS)
        states.append(next(chunks)[1])
        chunks.close()
    return states


def run(source, *, progress=False):
    """Run the pipeline from a config (a TOML path, a dict, or loaded :class:`Settings`).

    Returns a :class:`Result`; nothing is written (see :func:`discover.write_outputs`).
    """
    settings = load_config(source)
    from threadpoolctl import threadpool_limits

    # One BLAS thread: sums in a fixed order, so the same config and data give the same
    # model bit for bit whatever the machine's thread count.
    with threadpool_limits(limits=1), compute.cluster(settings.compute, settings.source) as client:
        return _run(settings, compute.Executor(client, settings.bootstrap.n_jobs), progress)


class _StageClock:
    """Wall-clock seconds per stage, in the order the stages ran."""

    def __init__(self):
        self.seconds, self._last = {}, time.perf_counter()

    def done(self, stage):
        now = time.perf_counter()
        self.seconds[stage] = self.seconds.get(stage, 0.0) + now - self._last
        self._last = now


def _run(settings, executor, progress):
    from .schema import uses_hidden

    if uses_hidden(settings):  # hidden states or further outputs: fitted by output error
        from .hidden_pipeline import run_hidden

        return run_hidden(settings, progress=progress)
    data, where = settings.data, settings.source
    clock = _StageClock()
    training, held_out = load_dataset(settings, lazy_training=bool(data.chunk_rows))
    clock.done("data")
    # A window left to the data is chosen once, before any run is smoothed, and written
    # into the settings (and so into the effective config): every later step smooths alike.
    derivatives, window_note = window_choice.resolve_window(settings.derivatives,
                                                             lambda: training_states(training, data))
    settings = replace(settings, derivatives=derivatives)
    library = library_for(settings)
    smoothed = None
    if data.chunk_rows:
        backend = ChunkedBackend(settings, training, resolve_trim(settings.derivatives))
    else:
        check_excitation(training, where)
        smoothed = smooth_runs(training, settings.derivatives, progress=progress)
        backend = training_backend(settings, smoothed, executor)  # [selection].target
    clock.done("derivatives")
    plan = make_plan(backend, settings.selection.cv_folds, settings.bootstrap.block_length)
    check_library_size(library, backend.n_rows, where, backend.row_unit)
    rows = settings.bootstrap.resample == "rows"
    resources.check_memory(resources.estimate(
        library_terms=len(library), n_states=len(data.states), run_lengths=backend.lengths,
        sub_length=plan.sub_length, n_folds=plan.n_folds, members=settings.bootstrap.members,
        keep_rows=rows, chunk_rows=data.chunk_rows), settings.compute.memory_limit, where)
    gram_blocks = backend.grams(library, plan, rows=rows)
    training = backend.thin_training(training)
    if data.chunk_rows:
        check_excitation(training, where)
    check_collinear_terms(gram_blocks.blocks, library, where)
    clock.done("grams")
    folds, split = fold_labels(gram_blocks.blocks, settings.selection.cv_folds, settings.selection.cv_split)
    selection = select_terms(settings.selection, gram_blocks.blocks, folds, training.state_names, split=split)
    simulation = resolve_simulation(settings, training)
    info = {"threshold": {s: float(v) for s, v in zip(training.state_names, selection.thresholds)},
            **target_info(settings, backend), "derivative_method": settings.derivatives.method,
            "cv_split": selection.split, **({"derivative_window_choice": window_note} if window_note else {}),
            **replay_info(settings, simulation)}
    single = Model(training.state_names, training.input_names, tuple(library.names), selection.coef, info=info)
    clock.done("selection")
    ensemble, model = None, single
    if settings.bootstrap.members > 0:
        ensemble = bootstrap.run_ensemble(settings.bootstrap, settings.selection, settings.seed, gram_blocks,
                                          selection.thresholds, executor, progress=progress)
        model = bootstrap.ensemble_model(settings.bootstrap, single, ensemble, gram_blocks.blocks)
    clock.done("ensemble")
    held_smoothed = smooth_runs(held_out, settings.derivatives)
    ranking, choice_notes = None, []
    if settings.ranking.enabled:
        inclusion = ensemble.summary.inclusion_probability if ensemble else None
        candidates = collect_candidates(settings, model, gram_blocks, library, backend, inclusion)
        horizon = settings.ranking.horizon
        if horizon is None and smoothed is not None:
            horizon = choice.predictability_horizon(single, smoothed, backend.noise(), simulation)
            if horizon is not None:
                choice_notes.append(f"Nearby trajectories of the model separate within {horizon:.4g} time units; "
                                    "candidates were scored on segments of that length.")
        ranking = rank_candidates(candidates, model, settings, training=training, smoothed=smoothed,
                                  held_out=held_out, held_smoothed=held_smoothed, simulation=simulation,
                                  folds=(folds, split), horizon=horizon, inclusion=inclusion,
                                  library_terms=library.names)
        name, note = choice.written_candidate(ranking.table, settings.ranking.choose,
                                              [h["name"] for h in settings.ranking.hypotheses])
        choice_notes += [note] if note else []
        model = choice.chosen_model(model, ranking, name, horizon)
        clock.done("ranking")
    output_fit = None
    if settings.refine.enabled and smoothed is not None:
        output_fit = refine_model(model, training, smoothed, settings.refine, simulation,
                                  settings.simulation.divergence_factor)
        model = output_fit.model
        choice_notes += [output_fit.note] if output_fit.note else []
        clock.done("refinement")
    elif settings.refine.enabled:
        choice_notes.append("The output-error refinement was skipped: it needs the training runs in memory "
                            "(unset [data].chunk_rows, or set [refine].enabled = false to silence this).")
    validation = validate_runs(model, held_smoothed, held_out, simulation)
    if ensemble is not None and settings.bootstrap.bands:
        validation = with_bands(validation, single, ensemble, simulation, backend.noise(),
                                level=settings.bootstrap.level, seed=settings.seed)
    diagnostics = diagnose(model, training, held_out, smoothed, held_smoothed, library.names)
    clock.done("validation")
    ranking_notes = choice_notes
    if ranking is not None and ranking.scored_on == "the training runs":
        ranking_notes.append("The ranking scored candidates on the training runs they were fitted on "
                             "(no run is held out and the runs were read in chunks).")
    warnings = (list(settings.notes) + data_warnings(training, held_out) + list(selection.warnings) + ranking_notes
                + validation_warnings(validation, settings.bootstrap.members) + list(diagnostics.warnings))
    if not held_out.runs:
        warnings.append("No run is held out: the model is not validated on unseen data.")
    return Result(settings, model, tuple(library.names), selection, training, held_out, smoothed, validation,
                  tuple(warnings), single, simulation, ensemble, ranking, diagnostics, output_fit, clock.seconds)
