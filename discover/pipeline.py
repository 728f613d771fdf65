"""Chain the stages: config → data → derivatives → terms → selection → validation → outputs.

:func:`run` is the Python entry point (``discover.run``). It returns a
:class:`Result`; :func:`write_outputs` writes the output folder into a temporary
folder beside the target and renames it into place, so that a failed run never
leaves half a result.
"""

from __future__ import annotations

import json
import os
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from . import bootstrap, compute, ranking, report, resources
from .config import derivative_options, load_config, threshold_grid, to_toml
from . import stream
from .data import Dataset, load_dataset
from .derivatives import DERIVATIVE_METHODS, default_trim, min_samples
from .data import file_hash
from .exceptions import ConfigError, DataError, OutputError
from .outputs import write_outputs  # noqa: F401  (re-exported: discover.write_outputs)
from .expressions import parse_expression
from .model import Model
from .selection import (
    COND_LIMIT,
    ILL_CONDITIONED,
    BlockGrams,
    Scale,
    scaled_problem,
    block_grams,
    condition_numbers,
    cross_validate,
    fit_scaled,
)
from .simulate import SimulationSettings, fit_metrics, run_model, simulation_settings
from .terms import build_library, term_key

SHORT_RUN = 50  # fewer usable samples than this in a run earns a warning


@dataclass(frozen=True)
class Smoothed:
    """One run after the derivative stage, ends already trimmed."""

    name: str
    t: np.ndarray
    x: np.ndarray  # smoothed states
    x_dot: np.ndarray
    u: np.ndarray
    x_raw: np.ndarray


@dataclass
class Result:
    """Everything a run produced; reports and writers read it and compute nothing new."""

    config: dict
    model: Model
    library_terms: list
    cv: object
    training: object
    held_out: object
    smoothed: list
    validation: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    single_model: Model | None = None
    ensemble: object = None
    ranking: object = None
    candidates: list = field(default_factory=list)
    output_dir: Path | None = None
    simulation: SimulationSettings | None = None

    def validation_table(self):
        rows = []
        for item in self.validation:
            for i, state in enumerate(self.model.state_names):
                rows.append({
                    "run": item["run"],
                    "state": state,
                    "rmse": item["metrics"]["rmse"][i],
                    "nrmse": item["metrics"]["nrmse"][i],
                    "fit_percent": item["metrics"]["fit_percent"][i],
                    "diverged": item["simulation"].diverged,
                    "band_coverage": item["band_coverage"][i] if "band_coverage" in item else np.nan,
                    "members_diverged": item.get("members_diverged", np.nan),
                })
        return pd.DataFrame(rows, columns=["run", "state", "rmse", "nrmse", "fit_percent", "diverged",
                                           "band_coverage", "members_diverged"])

    def inclusion_table(self):
        """Every candidate term × state: inclusion probability and coefficient statistics."""
        if self.ensemble is None:
            return None
        summary = self.ensemble.summary
        rows = []
        for i, state in enumerate(self.model.state_names):
            for j, term in enumerate(self.library_terms):
                row = {"state": state, "term": term, "in_model": bool(self.model.coef[j, i] != 0),
                       "coefficient": self.model.coef[j, i]}
                row.update({name: values[j, i] for name, values in summary.as_stats().items()})
                rows.append(row)
        return pd.DataFrame(rows)


def _describe_options(options):
    return "".join(f"{key} = {value!r}, " for key, value in options.items())


def end_trim(config):
    section = config["derivatives"]
    return section["trim"] if section["trim"] is not None else default_trim(section["method"], derivative_options(config))


def differentiate(dataset, config, *, trimmed=True, progress=False):
    """Smooth and differentiate every run; trim the unreliable ends unless ``trimmed`` is False."""
    from tqdm.auto import tqdm

    section = config["derivatives"]
    method, options = section["method"], derivative_options(config)
    trim = end_trim(config)
    needed = max(min_samples(method, options), 2 * trim + 3)
    result = []
    for run in tqdm(dataset.runs, desc="derivatives", disable=None if progress else True, leave=False):
        if len(run.t) < needed:
            raise DataError(
                f"{run.source}: {len(run.t)} samples is too few for [derivatives].method = "
                f"{method!r} with {_describe_options(options)}trim = {trim} (needs at least {needed}). "
                "Use a smaller window, another method, or drop the run."
            )
        try:
            # Time from the run's start: absolute clock stamps (1.7e9 s) lose the
            # float64 resolution a uniform-step check needs.
            x_smooth, x_dot = DERIVATIVE_METHODS[method](run.t - run.t[0], run.x, **options)
        except DataError as err:
            raise DataError(f"{run.source}: {err}") from None
        result.append(Smoothed(run.name, run.t, x_smooth, x_dot, run.u, run.x))
    return [trim_ends(s, trim) for s in result] if trimmed else result


def trim_ends(smoothed, trim):
    """The run without ``trim`` samples at each end, where smoothing is least reliable."""
    keep = slice(trim, len(smoothed.t) - trim)
    s = smoothed
    return Smoothed(s.name, s.t[keep], s.x[keep], s.x_dot[keep], s.u[keep], s.x_raw[keep])


def library_from_config(config, terms=None, label="[terms]"):
    """The candidate library of ``[terms]`` (or of another table with the same keys)."""
    terms = config["terms"] if terms is None else terms
    data = config["data"]
    return build_library(
        data["states"],
        data["inputs"],
        degree=terms["degree"],
        variables=terms["variables"],
        input_degree=terms["input_degree"],
        state_input_products=terms["state_input_products"],
        constant=terms["constant"],
        trig_variables=terms["trig_variables"],
        trig_frequencies=terms["trig_frequencies"],
        trig_input_products=terms["trig_input_products"],
        custom=terms["custom"],
        where=f"{config['_source']}: {label}",
    )


def regression_blocks(smoothed, library, sub_length, n_folds, client=None):
    """Evaluate the library once per run and keep one augmented Gram per sub-block.

    Each run is cut into contiguous sub-blocks of about ``sub_length`` rows (and at
    least ``n_folds`` of them); folds and bootstrap members are sums of these Grams.
    With a Dask ``client`` each run's Grams are a task and no rows come back
    (``pieces`` is then None).
    """
    if client is not None:
        from .compute import map_in_order

        per_run = map_in_order(client, _run_grams, list(enumerate(smoothed)), library, sub_length, n_folds)
        grams = [g for blocks in per_run for g in blocks.grams]
        counts = [c for blocks in per_run for c in blocks.counts]
        runs = [r for r, blocks in enumerate(per_run) for _ in blocks.counts]
        positions = [p for blocks in per_run for p in blocks.positions]
        return BlockGrams(np.array(grams), np.array(counts), np.array(runs), len(library), np.array(positions)), None
    pieces, stacked = [], []
    k = len(library)
    for r, run in enumerate(smoothed):
        with np.errstate(all="ignore"):
            z = library.evaluate(run.x, run.u, append=run.x_dot)  # [Θ Ẋ], one allocation per run
        bad = ~np.isfinite(z[:, :k])
        if bad.any():
            row, j = np.argwhere(bad)[0]
            raise DataError(
                f"run {run.name!r}: the candidate term {library.names[j]!r} is not finite at row "
                f"{row + 1} of the trimmed run (value {float(z[row, j])!r}); a division by zero or a log/sqrt "
                "of a negative number? Change the term or the data's range."
            )
        n_sub = min(len(run.t), max(n_folds, len(run.t) // sub_length))
        for rows in np.array_split(np.arange(len(run.t)), n_sub):
            block = z[rows[0]: rows[-1] + 1]
            stacked.append((r, block, None))
            pieces.append((r, block[:, :k], block[:, k:]))
    return block_grams(stacked, n_terms=k), pieces


class MemorySource:
    """Block Grams of training runs held in memory (the default)."""

    def __init__(self, smoothed, n_folds):
        self.smoothed, self.n_folds = smoothed, n_folds
        correlation = int(np.median([bootstrap.correlation_length(r.x_dot[: stream.CORRELATION_ROWS])
                                     for r in smoothed]))
        self.lengths = [len(r.t) for r in smoothed]
        self.correlation = correlation

    def plan(self, block_length):
        self.sub_length, self.block_length = bootstrap.block_plan(self.lengths, self.correlation, block_length)

    def blocks(self, library, client=None, rows=False):
        blocks, pieces = regression_blocks(self.smoothed, library, self.sub_length, self.n_folds, client)
        if rows and pieces is None:
            pieces = regression_blocks(self.smoothed, library, self.sub_length, self.n_folds)[1]
        return blocks, pieces

    def noise(self):
        return measurement_noise(self.smoothed)


class StreamSource:
    """Block Grams of training runs read chunk by chunk ([data].chunk_rows); see stream.py."""

    def __init__(self, config, training_paths, n_folds):
        self.config, self.paths, self.n_folds = config, training_paths, n_folds
        self.chunk_rows = config["data"]["chunk_rows"]
        trim = config["derivatives"]["trim_resolved"]
        self.sizes = [stream.count_rows(p, config, self.chunk_rows) for p in training_paths]
        needed = max(min_samples(config["derivatives"]["method"], derivative_options(config)), 2 * trim + 3)
        for path, n in zip(training_paths, self.sizes):
            if n < needed:
                raise DataError(f"{path}: {n} samples is too few for [derivatives].method = "
                                f"{config['derivatives']['method']!r} (needs at least {needed}).")
        self.lengths = [n - 2 * trim for n in self.sizes]
        self.correlation = int(np.median([
            bootstrap.correlation_length(stream.prefix_derivative(p, config, self.chunk_rows, n))
            for p, n in zip(training_paths, self.sizes)
        ]))
        self.stats = {}

    def plan(self, block_length):
        self.sub_length, self.block_length = bootstrap.block_plan(self.lengths, self.correlation, block_length)

    def blocks(self, library, client=None, rows=False):
        stats = self.stats if not self.stats else None  # the first pass records the runs' statistics
        blocks = stream.stream_grams(self.paths, self.config, library, self.sub_length, self.n_folds,
                                     self.sizes, self.chunk_rows, stats)
        if stats is not None:
            self.stats = stats
        return blocks, None

    def thin_runs(self):
        return [stream.thin_run(p, self.config, self.chunk_rows, n, self.stats[r])
                for r, (p, n) in enumerate(zip(self.paths, self.sizes))]

    def noise(self):
        total = sum(s.n_trimmed for s in self.stats.values())
        mean = sum(s.noise_sum for s in self.stats.values()) / total
        return np.sqrt(np.maximum(sum(s.noise_sq for s in self.stats.values()) / total - mean**2, 0.0))


def _run_grams(item, library, sub_length, n_folds):
    """One run's sub-block Grams (a Dask task)."""
    r, run = item
    blocks, _ = regression_blocks([run], library, sub_length, n_folds)
    return blocks


def fold_labels(blocks, n_folds, split):
    """CV fold of each sub-block; rows are never assigned at random.

    ``"runs"``: whole runs are folds (run i in fold i mod n_folds). ``"blocks"``: each
    run is cut into n_folds contiguous stretches and fold k holds the k-th stretch of
    every run. ``"auto"`` takes runs when there are at least n_folds of them.
    Neighbouring samples are nearly identical; random rows would leak.
    """
    n_runs = len(np.unique(blocks.runs))
    if split == "auto":
        split = "runs" if n_runs >= n_folds else "blocks"
    if split == "runs":
        return blocks.runs % n_folds, split
    per_run = np.bincount(blocks.runs)[blocks.runs]
    return blocks.positions * n_folds // per_run, split


def check_excitation(training, where):
    """A state or input that never moves in any training run cannot be identified."""
    ranges = [run.ranges() for run in training.runs]
    for kind, names, low, high in (("state", training.state_names, 0, 1), ("input", training.input_names, 2, 3)):
        for j, name in enumerate(names):
            spread = max(r[high][j] - r[low][j] for r in ranges)
            # Relative to the channel's own magnitude: results must not depend on units.
            scale = max(max(abs(r[low][j]), abs(r[high][j])) for r in ranges)
            if spread <= 1e-12 * scale or spread == 0:
                raise DataError(
                    f"{where}: {kind} {name!r} never moves in any training run (constant "
                    f"{float(ranges[0][low][j])!r}); its effect cannot be identified. Remove it from "
                    f"[data].{kind}s or add runs that excite it."
                )


def check_collinear_terms(blocks, library, where):
    """Refuse a library whose columns are exactly linearly dependent on the training rows."""
    total, count = blocks.total()
    k = len(library)
    scale = Scale.from_gram(total, count, k)
    g, _ = scaled_problem(total, count, k, scale)
    keep = np.flatnonzero(~scale.zero)
    values, vectors = np.linalg.eigh(g[np.ix_(keep, keep)])
    if values[0] > 1e-11 * values[-1]:
        return
    involved = [library.names[keep[j]] for j in np.flatnonzero(np.abs(vectors[:, 0]) > 0.05)]
    raise DataError(
        f"{where}: the candidate terms {involved} are collinear on the training data (a combination "
        "of them is zero on every row), so their coefficients cannot be told apart. Remove one of "
        "them, e.g. with [terms].variables, input_degree or degree."
    )


def check_library_size(library, n_rows, where):
    if len(library) >= n_rows:
        raise DataError(
            f"{where}: the library has {len(library)} terms but the training runs give only "
            f"{n_rows} usable samples. Lower [terms].degree or add data."
        )


def select_model(config, blocks, library):
    """Cross-validate the threshold per state and fit the single sparse model."""
    sel = config["selection"]
    folds, split = fold_labels(blocks, sel["cv_folds"], sel["cv_split"])
    k = len(library)
    total, count = blocks.total()
    check_library_size(library, count, config["_source"])
    check_collinear_terms(blocks, library, config["_source"])
    cv = None
    if sel["threshold"] == "cv":
        cv = cross_validate(
            blocks, folds, threshold_grid(sel), ridge=sel["ridge"], max_iter=sel["max_iter"], rule=sel["cv_rule"]
        )
        thresholds = cv.selected
    else:
        thresholds = np.full(len(config["data"]["states"]), sel["threshold"])
    coef, converged = fit_scaled(
        total, count, k, threshold=thresholds, ridge=sel["ridge"], max_iter=sel["max_iter"]
    )
    warnings = []
    if not converged:
        warnings.append(f"Thresholding stopped at max_iter={sel['max_iter']} before the support settled.")
    for state, cond in zip(config["data"]["states"], condition_numbers(total, count, k, coef != 0)):
        if cond > COND_LIMIT:
            warnings.append(ILL_CONDITIONED.format(state=state, cond=cond))
    for i, state in enumerate(config["data"]["states"]):
        if not np.any(coef[:, i]):
            warnings.append(
                f"Every term of d({state})/dt fell below the threshold {thresholds[i]:.3g}; "
                "its equation is empty (dx/dt = 0)."
            )
    return coef, thresholds, cv, split, warnings


def training_extent(training):
    """Exact per-state minimum and maximum over the training runs."""
    ranges = [run.ranges() for run in training.runs]
    return np.min([r[0] for r in ranges], axis=0), np.max([r[1] for r in ranges], axis=0)


def resolve_simulation(config, training):
    """The one :class:`~discover.simulate.SimulationSettings` of this run."""
    sim = config["simulation"]
    low, high = training_extent(training)
    return simulation_settings(low, high, method=sim["method"], rtol=sim["rtol"], atol=sim["atol"],
                               divergence_factor=sim["divergence_factor"],
                               interpolation=sim["input_interpolation"],
                               time_limit=config["compute"]["simulation_time_limit"])


def validate_held_out(model, held_full, held_out, settings):
    """Simulate each held-out run from its smoothed initial state with its recorded input."""
    results = []
    for smooth, run in zip(held_full, held_out.runs):
        simulation = run_model(model, run.t, smooth.x[0], run.u, settings)
        metrics = fit_metrics(run.x, simulation.x)
        results.append({"run": run.name, "simulation": simulation, "metrics": metrics,
                        "interpolation": settings.interpolation_for(run.u), "t": run.t, "x": run.x, "u": run.u,
                        "x0": smooth.x[0]})
    return results


def frozen(low, high):
    """True where a channel does not move, relative to its own magnitude (not its units)."""
    return (high - low) <= 1e-12 * np.maximum(np.abs(low), np.abs(high))


def data_warnings(training, held_out=None):
    notes = []
    for run in list(training.runs) + list(held_out.runs if held_out is not None else []):
        x_min, x_max, u_min, u_max = run.ranges()
        for kind, names, low, high in (("state", training.state_names, x_min, x_max),
                                       ("input", training.input_names, u_min, u_max)):
            for j in np.flatnonzero(frozen(low, high)):
                notes.append(f"{run.source}: {kind} {names[j]!r} never moves in this run (constant "
                             f"{float(low[j])!r}); its effect cannot be identified from it.")
        if run.time_note:
            notes.append(f"{run.source}: {run.time_note}.")
        if run.n_samples < SHORT_RUN:
            notes.append(f"{run.source}: only {run.n_samples} samples; estimates from it are fragile.")
        if run.touched:
            notes.append(f"{run.source}: {run.touched} samples were dropped or interpolated by gap handling.")
    return notes


def run(source, *, progress=False):
    """Run the whole pipeline from a config (path to a TOML file, or a dict).

    Returns
    -------
    Result
        The model, the CV curve, the held-out validation and the warnings. Nothing is
        written; see :func:`write_outputs` (the CLI does both).
    """
    config = source if _is_loaded(source) else load_config(source)
    from threadpoolctl import threadpool_limits

    # One BLAS thread: sums in a fixed order, so the same config and data give the same
    # model bit for bit on any machine and thread count.
    with threadpool_limits(limits=1), compute.cluster(config) as client:
        return _run(config, client, progress)


def _is_loaded(source):
    """A config that load_config already returned (it carries where it came from)."""
    return isinstance(source, dict) and "_source" in source and "_base" in source


def _run(config, client, progress):
    config["derivatives"]["trim_resolved"] = end_trim(config)
    n_folds = config["selection"]["cv_folds"]
    if config["data"]["chunk_rows"]:
        training, held_out = load_dataset(config, lazy_training=True)
        library = library_from_config(config)
        source = StreamSource(config, [Path(r.source) for r in training.runs], n_folds)
        smoothed = []
    else:
        training, held_out = load_dataset(config)
        check_excitation(training, config["_source"])
        library = library_from_config(config)
        smoothed = differentiate(training, config, progress=progress)
        source = MemorySource(smoothed, n_folds)
    source.plan(config["bootstrap"]["block_length"])
    block_length = source.block_length
    check_library_size(library, sum(source.lengths), config["_source"])
    needs_rows = config["bootstrap"]["resample"] == "rows" or config["ranking"]["sr3"]
    resources.check_memory(resources.estimate(
        library_terms=len(library), n_states=len(training.state_names), run_lengths=source.lengths,
        sub_length=source.sub_length, n_folds=n_folds, members=config["bootstrap"]["members"],
        keep_rows=needs_rows and not config["data"]["chunk_rows"], chunk_rows=config["data"]["chunk_rows"],
    ), config["compute"]["memory_limit"], config["_source"])
    blocks, pieces = source.blocks(library, client, rows=needs_rows)
    if config["data"]["chunk_rows"]:
        training = Dataset(training.state_names, training.input_names, tuple(source.thin_runs()))
        check_excitation(training, config["_source"])
    coef, thresholds, cv, split, warnings = select_model(config, blocks, library)
    info = {
        "threshold": {s: float(v) for s, v in zip(training.state_names, thresholds)},
        "threshold_scale": "dimensionless: |coefficient| * rms(term) / rms(derivative)",
        "derivative_method": config["derivatives"]["method"],
        "cv_split": split if cv is not None else None,
    }
    single = Model(training.state_names, training.input_names, tuple(library.names), coef, info=info)
    ensemble = None
    model = single
    if config["bootstrap"]["members"] > 0:
        ensemble = run_ensemble(config, blocks, pieces, library, thresholds, block_length, progress, client)
        model = ensemble_model(config, single, ensemble, blocks)
    settings = resolve_simulation(config, training)
    model = Model(model.state_names, model.input_names, model.terms, model.coef, model.term_stats,
                  {**model.info, **replay_info(config, settings)})
    # Simulations start from the smoothed state, so held-out runs are kept untrimmed here.
    held_full = differentiate(held_out, config, trimmed=False)
    validation = validate_held_out(model, held_full, held_out, settings)
    if ensemble is not None and config["bootstrap"]["bands"]:
        add_prediction_bands(config, model, ensemble, validation, settings, source.noise())
    ranking_table, candidates = None, []
    if config["ranking"]["enabled"]:
        candidates = collect_candidates(config, model, blocks, pieces, library, source, cv)
        if pieces is None and config["ranking"]["sr3"]:
            warnings.append("SR3 candidates need the rows in memory; with [data].chunk_rows they are left out.")
        ranking_table = rank(config, candidates, model, training, held_out,
                             held_out_smoothed(config, held_full), settings, ensemble, library)
        if not held_out.runs:
            warnings.append("The ranking scored candidates on the training runs (no run is held out).")
    warnings = data_warnings(training, held_out) + warnings
    for item in validation:
        if item["simulation"].diverged:
            warnings.append(f"Held-out run {item['run']!r} diverged: {item['simulation'].message}.")
        if item.get("members_diverged"):
            warnings.append(
                f"Held-out run {item['run']!r}: {item['members_diverged']} of "
                f"{config['bootstrap']['members']} ensemble members diverged; the band uses the others."
            )
    if not held_out.runs:
        warnings.append("No run is held out: the model is not validated on unseen data.")
    return Result(config, model, library.names, cv, training, held_out, smoothed, validation, warnings,
                  single_model=single, ensemble=ensemble, ranking=ranking_table, candidates=candidates,
                  simulation=settings)


def replay_info(config, settings):
    """What ``discover simulate`` needs to repeat this run's held-out simulations exactly."""
    return {
        "time": config["data"]["time"],
        "derivatives": {"method": config["derivatives"]["method"], **derivative_options(config)},
        "simulation": settings.to_dict(),
    }


def held_out_smoothed(config, full):
    """(trimmed smoothed run, smoothed states on every sample) from untrimmed smoothed runs."""
    trim = end_trim(config)
    return [(trim_ends(s, trim), s.x) for s in full]


def hypothesis_candidate(config, hypothesis, model, source):
    """A user's term set, fitted by least squares; states it leaves out keep the model's terms."""
    data = config["data"]
    per_state = []
    for i, state in enumerate(data["states"]):
        if state in hypothesis:
            per_state.append(hypothesis[state])
        else:
            per_state.append([model.terms[j] for j in np.flatnonzero(model.coef[:, i])])
    texts = list(dict.fromkeys(t for terms in per_state for t in terms))
    library = build_library(data["states"], data["inputs"], degree=0, constant=False, custom=texts,
                            where=f"{config['_source']}: [[ranking.hypotheses]] {hypothesis['name']!r}")
    keys = [term_key(t) for t in library.names]
    support = np.zeros((len(library), len(per_state)), dtype=bool)
    for i, terms in enumerate(per_state):
        for t in terms:
            support[keys.index(term_key(t)), i] = True
    return ranking.least_squares_candidate(f"hypothesis {hypothesis['name']!r}", "hypothesis", library,
                                           support, source.blocks(library)[0])


def collect_candidates(config, model, blocks, pieces, library, source, cv):
    """The model itself, the threshold path, other libraries, user hypotheses and SR3."""
    sel, rank_cfg = config["selection"], config["ranking"]
    grid = threshold_grid(sel)
    # Order matters for names: a duplicate term set keeps the first name (user's names first).
    candidates = [ranking.Candidate("model", "model", model.terms, model.coef)]
    for hypothesis in rank_cfg["hypotheses"]:
        candidates.append(hypothesis_candidate(config, hypothesis, model, source))
    if rank_cfg["path"]:
        candidates += ranking.path_candidates(blocks, library, grid, ridge=sel["ridge"],
                                              max_iter=sel["max_iter"], label="path")
    for table in rank_cfg["libraries"]:
        other = library_from_config(config, table, label=f"[[ranking.libraries]] {table['name']!r}")
        other_blocks, _ = source.blocks(other)
        coef, *_ = select_model(config, other_blocks, other)
        candidates.append(ranking.Candidate(f"library {table['name']!r} (cv)", "library", tuple(other.names), coef))
        candidates += ranking.path_candidates(other_blocks, other, grid, ridge=sel["ridge"],
                                              max_iter=sel["max_iter"], label=f"library {table['name']!r}")
    if rank_cfg["sr3"] and pieces is not None:
        candidates += ranking.sr3_candidates(pieces, library, grid)
    return ranking.merge_duplicates(candidates, model.state_names)


def rank(config, candidates, model, training, held_out, held_smoothed, settings, ensemble, library):
    """Score candidates on the held-out runs (training runs if none) and order them."""
    runs, smoothed = held_out.runs, held_smoothed
    if not runs:  # scored on the training runs instead; run() warns about it
        runs, smoothed = training.runs, held_out_smoothed(config, differentiate(training, config, trimmed=False))
    inclusion = ensemble.summary.inclusion_probability if ensemble is not None else None
    scores = ranking.score_candidates(
        candidates, model.state_names, model.input_names, runs, smoothed,
        settings=settings, inclusion=inclusion, library_terms=library.names,
        horizon=config["ranking"]["horizon"],
    )
    return ranking.score_table(candidates, scores, config["ranking"]["criterion"])


@dataclass(frozen=True)
class Ensemble:
    """Bootstrap members and their summary."""

    coef: np.ndarray  # (n_members, n_terms, n_states)
    available: np.ndarray  # (n_members, n_terms)
    summary: object
    scheme: str
    block_length: int
    weights: np.ndarray | None


def run_ensemble(config, blocks, pieces, library, thresholds, block_length, progress, client=None):
    """Fit the bootstrap members at the selected thresholds."""
    boot, sel = config["bootstrap"], config["selection"]
    rng = np.random.default_rng(config["seed"])
    scheme = bootstrap.resolve_scheme(boot["resample"], len(np.unique(blocks.runs)))
    n, k = boot["members"], len(library)
    weights = None
    if scheme == "rows":
        grams, counts = bootstrap.row_weights_ensemble(pieces, n, rng)
        available = bootstrap.library_masks(n, k, boot["library_fraction"], rng)
        coef = np.array([
            bootstrap.fit_member(g, c, k, a, thresholds, sel["ridge"], sel["max_iter"])
            for g, c, a in zip(grams, counts, available)
        ])
    else:
        weights = bootstrap.member_weights(blocks.runs, n, scheme, rng)
        available = bootstrap.library_masks(n, k, boot["library_fraction"], rng)
        coef = bootstrap.fit_ensemble(
            blocks, weights, available, thresholds, ridge=sel["ridge"], max_iter=sel["max_iter"],
            n_jobs=boot["n_jobs"], progress=progress, client=client,
        )
    summary = bootstrap.summarize(coef, available, boot["level"])
    return Ensemble(coef, available, summary, scheme, block_length if scheme == "blocks" else None, weights)


def ensemble_model(config, single, ensemble, blocks):
    """The model of the ensemble: the terms kept often enough, with their statistics."""
    boot = config["bootstrap"]
    summary = ensemble.summary
    total, count = blocks.total()
    coef = bootstrap.final_coefficients(
        summary, total, count, len(single.terms), inclusion_min=boot["inclusion_min"],
        method=boot["coefficients"],
    )
    stats = {
        "inclusion_probability": summary.inclusion_probability,
        "coefficient_median": summary.median_kept,
        "coefficient_low": summary.low_kept,
        "coefficient_high": summary.high_kept,
    }
    info = dict(single.info)
    info["ensemble"] = {
        "members": int(boot["members"]),
        "resample": ensemble.scheme,
        "block_length": ensemble.block_length,
        "library_fraction": boot["library_fraction"],
        "inclusion_min": boot["inclusion_min"],
        "coefficients": boot["coefficients"],
        "interval_level": boot["level"],
        "interval_over": "members that keep the term",
    }
    return Model(single.state_names, single.input_names, single.terms, coef, stats, info)


def measurement_noise(smoothed):
    """Per-state std of raw minus smoothed training states: the measurement noise estimate."""
    residual = np.vstack([run.x_raw - run.x for run in smoothed])
    return residual.std(axis=0)


def add_prediction_bands(config, model, ensemble, validation, settings, noise_std):
    """Simulate all members on each held-out run (one solver call per batch) and add bands."""
    level = config["bootstrap"]["level"]
    # A stream of its own, so that the band does not shift the members' draws.
    rng = np.random.default_rng([config["seed"], 1])
    used = np.flatnonzero(np.any(ensemble.coef != 0, axis=(0, 2)))
    if used.size == 0:
        return
    known = model.state_names + model.input_names
    expressions = [parse_expression(model.terms[j], known) for j in used]
    coef = ensemble.coef[:, used, :]
    for item in validation:
        x, diverged = bootstrap.simulate_ensemble(
            expressions, model.state_names, model.input_names, coef, item["t"],
            item["x0"], item["u"], interpolation=item["interpolation"], method=settings.method,
            rtol=settings.rtol, atol=settings.atol, limits=settings.limits, time_limit=settings.time_limit,
        )
        median, low, high = bootstrap.prediction_band(x, diverged, level, noise_std=noise_std, rng=rng)
        item["band"] = (median, low, high)
        item["band_coverage"] = bootstrap.band_coverage(item["x"], low, high)
        item["members_diverged"] = int(diverged.sum())


def rank_more(out_dir, hypotheses_path, *, criterion=None, allow_changed_data=False):
    """Score extra hypotheses against an earlier run's ranking without refitting the rest.

    Reads ``config_effective.toml``, ``provenance.json``, ``model.json`` and
    ``ranking.csv`` from ``out_dir``; checks that the data files are the ones that run
    read (SHA-256), fits and scores only the new hypotheses on the same training and
    held-out runs, and returns the combined, re-ordered table and its criterion.
    """
    from .config import tomllib, validate
    from .model import load_model

    out_dir, hypotheses_path = Path(out_dir), Path(hypotheses_path)
    needed = ["config_effective.toml", "provenance.json", "model.json", "ranking.csv"]
    missing = [name for name in needed if not (out_dir / name).is_file()]
    if missing:
        raise OutputError(f"{out_dir}: not a discover output folder with a ranking (missing {', '.join(missing)}).")
    try:
        raw = tomllib.loads((out_dir / "config_effective.toml").read_text(encoding="utf-8"))
        record = json.loads((out_dir / "provenance.json").read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as err:
        raise OutputError(f"{out_dir}: cannot read the earlier run's config or provenance ({err}).") from None
    try:
        extra = tomllib.loads(hypotheses_path.read_bytes().decode("utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"{hypotheses_path}: file not found.") from None
    except (OSError, UnicodeDecodeError) as err:
        raise ConfigError(f"{hypotheses_path}: cannot read it as UTF-8 text ({err}).") from None
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(f"{hypotheses_path}: not valid TOML: {err}.") from None
    unknown = sorted(set(extra) - {"ranking"}) or sorted(set(extra.get("ranking", {})) - {"hypotheses"})
    if unknown or not extra.get("ranking", {}).get("hypotheses"):
        raise ConfigError(f"{hypotheses_path}: expected only [[ranking.hypotheses]] entries"
                          + (f"; found {unknown}." if unknown else "; found none."))
    raw.setdefault("ranking", {})["hypotheses"] = extra["ranking"]["hypotheses"]
    config = validate(raw, str(hypotheses_path))
    config["_source"] = str(hypotheses_path)
    config["_base"] = record.get("config_base", str(out_dir))
    criterion = criterion or config["ranking"]["criterion"]
    old = pd.read_csv(out_dir / "ranking.csv", keep_default_na=False, na_values=[""])
    clash = sorted(set(f"hypothesis {h['name']!r}" for h in config["ranking"]["hypotheses"]) & set(old["candidate"]))
    if clash:
        raise ConfigError(f"{hypotheses_path}: {clash} are already in {out_dir / 'ranking.csv'}; rename them.")
    training, held_out = load_dataset(config)
    if not allow_changed_data:
        check_same_data(record, list(training.runs) + list(held_out.runs), out_dir)
    model = load_model(out_dir / "model.json")
    config["derivatives"]["trim_resolved"] = end_trim(config)
    source = MemorySource(differentiate(training, config), config["selection"]["cv_folds"])
    source.plan(config["bootstrap"]["block_length"])
    candidates = [hypothesis_candidate(config, h, model, source) for h in config["ranking"]["hypotheses"]]
    scored = held_out if held_out.runs else training  # as the run did when nothing was held out
    scores = ranking.score_candidates(candidates, model.state_names, model.input_names, scored.runs,
                                      held_out_smoothed(config, differentiate(scored, config, trimmed=False)),
                                      settings=resolve_simulation(config, training),
                                      horizon=config["ranking"]["horizon"])
    new = ranking.score_table(candidates, scores, criterion)
    combined = pd.concat([old, new], ignore_index=True)
    combined["also"] = combined["also"].fillna("")
    return ranking.order_table(combined, criterion), criterion


def check_same_data(record, runs, out_dir):
    """Refuse data files whose bytes differ from those the earlier run read."""
    recorded = {str(Path(f["path"]).resolve()): f.get("sha256") for f in record.get("data_files", [])}
    for run in runs:
        path = str(Path(run.source).resolve())
        if path not in recorded:
            raise DataError(f"{run.source}: was not among the data files of {out_dir} (see its provenance.json); "
                            "the new scores would not be comparable. Pass --allow-changed-data to score anyway.")
        if recorded[path] != run.sha256:
            raise DataError(f"{run.source}: changed since {out_dir} was written (SHA-256 differs from its "
                            "provenance.json), so new scores would not be comparable with the table. Run "
                            "'discover run' again, or pass --allow-changed-data to score anyway.")
