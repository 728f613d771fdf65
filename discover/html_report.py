"""The self-contained HTML report of a run (``report.html``). Reports only format.

:func:`write_report` turns a :class:`discover.pipeline.Result` into one HTML file
that opens offline in any browser: every figure is embedded as a base64 PNG
``data:`` URI, the style sheet is inline, and nothing is loaded from anywhere
else (no links, scripts or fonts). Text is selectable and tables are real HTML
tables. Every string that comes from the data or the config (column names, file
names, run names, candidate names, warnings, the config itself) goes through
:func:`html.escape`.

The figures are those of :mod:`discover.report`; each takes parts of a result and
returns a matplotlib figure, so notebooks can call them one by one. The building
blocks (escaping, tables, embedded figures, style) are in :mod:`discover.html_parts`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .config import to_toml
from .html_parts import _STYLE, _figure, _number, _paragraph, _percent, _table, esc, figure_uri  # noqa: F401
from .provenance import provenance
from .summary_text import weak_target_text
from .report import (
    CAUTION,
    file_stems,
    format_equation,
    plot_coefficient_distributions,
    plot_cv_curve,
    plot_derivative_check,
    plot_held_out,
    plot_inclusion_map,
    plot_pareto,
    plot_run_overview,
    plot_state_coverage,
    plot_top_candidates,
    pretty_term,
)

#: Section ids of the report, in page order, with their headings.
SECTIONS = {
    "caution": "Before you use this model",
    "equations": "Identified equations",
    "held-out": "Held-out validation",
    "residuals": "Residual and excitation checks",
    "warnings": "Warnings",
    "inclusion-map": "Inclusion map",
    "cv-curve": "Threshold cross-validation",
    "ranking": "Ranking of candidate structures",
    "data-overview": "Data overview",
    "derivative-check": "Derivative check",
    "inputs": "Data files, versions and config",
}
MAX_OVERVIEW_RUNS = 12  # runs drawn in the data overview; the table lists them all
MAX_RANKING_ROWS = 30  # rows of the ranking table; ranking.csv has them all

def _section(key, body):
    return f'<section>\n<h2 id="{key}">{esc(SECTIONS[key])}</h2>\n{body}\n</section>'


def _caution():
    return _section("caution", f'<div class="caution"><p>{esc(CAUTION)}</p></div>')


def _ensemble_info(result):
    """The ``ensemble`` record of the model file (members, interval level...), or {}."""
    info = result.model.info.get("ensemble")
    return info if isinstance(info, dict) else {}


def _interval_level(result):
    return _ensemble_info(result).get("interval_level", result.settings.bootstrap.level)


def _equations(result, figures):
    model = result.model
    stats = model.term_stats
    has_p = "inclusion_probability" in stats
    has_interval = "coefficient_low" in stats and "coefficient_high" in stats
    level = _interval_level(result)
    parts = []
    if result.ensemble is None:
        parts.append(_paragraph("The bootstrap ensemble was off ([bootstrap].members = 0): the terms have no "
                                "inclusion probabilities or coefficient intervals.", "absent"))
    else:
        members = _ensemble_info(result).get("members", result.settings.bootstrap.members)
        parts.append(_paragraph(
            f"Inclusion probability: the share of {members} bootstrap members that keep the term. "
            f"Member spread: the central {100 * level:.0f} % of the coefficients of the members that keep it. "
            "It shows how much the estimate moves between resamples of the data, not a confidence "
            "interval: it leaves out the bias of smoothing and differentiation, so the true value can lie "
            "outside it. Coefficients are in the data's own units."))
    refined = "derivative_fit" in stats
    refinement = model.info.get("refinement", {}) if isinstance(model.info.get("refinement"), dict) else {}
    ci_level = refinement.get("interval_level", level)
    if refined:
        dropped = refinement.get("dropped_by_wald_test") or []
        parts.append(_paragraph(
            "Coefficients refined by output error: on the chosen terms, the free-run simulation error over the "
            "training runs was minimised (multiple shooting), which removes the bias smoothing leaves in the "
            "derivative fit (shown beside it). Confidence interval: "
            f"{esc(refinement.get('interval_meaning', 'from the Newey-West covariance'))}, at "
            f"{100 * ci_level:.0f} %. It does not include the uncertainty of choosing the terms; the inclusion "
            "probabilities speak to that."
            + (f" Dropped by the Wald test after refinement: {esc(', '.join(dropped))}." if dropped else "")))
    thresholds = model.info.get("threshold", {})
    for state, kept in model.equations():
        parts.append(f"<h3>d({esc(state)})/dt</h3>")
        parts.append(f'<p class="equation">{esc(format_equation(state, kept))}</p>')
        if not kept:
            parts.append(_paragraph("Every candidate term fell below the threshold: this equation is empty.",
                                    "absent"))
            continue
        header = ["term", "coefficient"]
        if refined:
            header += ["derivative fit", f"confidence low ({100 * ci_level:.0f} %)",
                       f"confidence high ({100 * ci_level:.0f} %)"]
        if has_p:
            header.append("inclusion probability")
        if has_interval:
            header += [f"member spread low ({100 * level:.0f} %)", f"member spread high ({100 * level:.0f} %)"]
        rows = []
        for expr, coefficient, values in kept:
            row = [pretty_term(expr), _number(coefficient, 6)]
            if refined:
                row += [_number(values.get(k), 6) for k in ("derivative_fit", "interval_low", "interval_high")]
            if has_p:
                row.append(_number(values.get("inclusion_probability"), 3))
            if has_interval:
                row += [_number(values.get("coefficient_low"), 4), _number(values.get("coefficient_high"), 4)]
            rows.append(row)
        threshold = thresholds.get(state)
        caption = f"terms of d({state})/dt" + (
            f" (threshold {threshold:.3g}, dimensionless)" if isinstance(threshold, (int, float)) else "")
        parts.append(_table(header, rows, caption=caption, numeric=range(1, len(header))))
    if result.ensemble is not None and np.any(model.coef):
        parts.append(_figure(lambda: plot_coefficient_distributions(model, result.ensemble.coef),
                             png=figures.get("coefficient_distributions.png"), caption=
                             "Coefficients of the bootstrap members that keep each term; dashed: the model's."))
    return _section("equations", "\n".join(parts))


def _held_out(result, figures):
    if not result.validation:
        body = _paragraph("No run was held out: the model is not validated on unseen data. Hold out at least "
                          "one run ([data].held_out) before trusting its predictions.", "absent")
        return _section("held-out", body)
    table = result.validation_table()
    rows = [[r["run"], r["state"], _percent(r["nrmse_fit_percent"]), _number(r["rmse"]), _number(r["nrmse"]),
             "yes" if r["diverged"] else "no",
             _percent(100 * r["band_coverage"], 0) if np.isfinite(r["band_coverage"]) else "—",
             "—" if not np.isfinite(r["members_diverged"]) else str(int(r["members_diverged"]))]
            for _, r in table.iterrows()]
    header = ["run", "state", "fit", "RMSE", "NRMSE", "diverged", "samples inside the band", "members diverged"]
    parts = [_paragraph("Free-run simulation of each held-out run from its first (smoothed) state with its "
                        "recorded input. Fit = 100·(1 − NRMSE), NRMSE = RMSE / std of the measured state."),
             _table(header, rows, caption="held-out fit", numeric=(2, 3, 4, 6, 7))]
    names = result.model.state_names
    for item, stem in zip(result.validation, file_stems([item.run for item in result.validation])):
        band = (item.band.low, item.band.high) if item.band is not None else None
        what = "measured (grey), simulated (dashed)" + (", ensemble band (shaded)" if band is not None else "")
        parts.append(_figure(lambda item=item, band=band: plot_held_out(item, names, band=band),
                             png=figures.get(f"heldout_{stem}.png"), caption=
                             f"Held-out run {item.run}: {what}."))
    return _section("held-out", "\n".join(parts))


def _residuals(result):
    diagnostics = result.diagnostics
    if diagnostics is None:
        return _section("residuals", _paragraph("No checks were run.", "absent"))
    parts = [_paragraph(
        "A model that has captured the dynamics leaves equation residuals ẋ − f(x, u) that are white and "
        "independent of the inputs' past (Ljung, System Identification, 1999, ch. 16). Residuals are taken "
        f"every {diagnostics.stride} samples (the smoothing window); the bounds are ±z/√N at the test level. "
        "A residual correlated with an input suggests a missing term in that input; one that is not white, a "
        "missing dynamic term. Inputs faster than the smoothing window can leave a smoothing bias that "
        "follows the input too.")]
    for analysis, where in ((diagnostics.held_out, "held-out runs"), (diagnostics.training, "training runs")):
        if analysis is None:
            continue
        rows = [[state, _number(q), _number(p, 3), verdict] for state, q, p, verdict in
                zip(analysis.state_names, analysis.ljung_box, analysis.ljung_box_p, analysis.verdicts)]
        parts.append(_table(["equation", f"Ljung–Box Q ({analysis.max_lag} lags)", "p", "verdict"], rows,
                            caption=f"residuals on the {where} ({100 * analysis.level:.0f} % level, "
                                    f"N = {analysis.n_samples})", numeric=(1, 2)))
    excitation = diagnostics.excitation
    if excitation is not None:
        rows = [[name, f"{order}{'+' if order >= excitation.max_order else ''}", _number(low), _number(high)]
                for name, order, low, high in zip(excitation.input_names, excitation.order, excitation.band_low,
                                                 excitation.band_high)]
        parts.append(_table(["input", "order of persistent excitation", "band low", "band high"], rows,
                            caption=f"input excitation in the training runs (band: {100 * excitation.power:.0f} % "
                                    "of the power; order on samples one correlation length apart)",
                            numeric=(1, 2, 3)))
    low, high = result.validation_ranges()
    names = list(result.model.state_names) + list(result.model.input_names)
    parts.append(_table(["state or input", "training min", "training max"],
                        [[n, _number(a), _number(b)] for n, a, b in zip(names, low, high)],
                        caption="range covered by the training runs", numeric=(1, 2)))
    outside = [m for check in diagnostics.extrapolation for m in check.messages]
    parts.append(_paragraph("; ".join(outside) + "." if outside else
                            "Every held-out run stays inside the training range of every state and input."))
    if result.held_out.runs:
        parts.append(_figure(lambda: plot_state_coverage(result.training, result.held_out, result.model.state_names),
                             "State-space coverage: each pair of states, training runs (grey) against held-out "
                             "runs (black)."))
    return _section("residuals", "\n".join(parts))


def _warnings(result):
    if not result.warnings:
        return _section("warnings", _paragraph("No warnings."))
    items = "".join(f"<li>{esc(w)}</li>" for w in result.warnings)
    return _section("warnings", f'<ul class="warnings">{items}</ul>')


def _inclusion(result, figures):
    if result.ensemble is None:
        return _section("inclusion-map", _paragraph(
            "The bootstrap ensemble was off ([bootstrap].members = 0): no inclusion map.", "absent"))
    names = result.model.state_names
    probability = result.ensemble.summary.inclusion_probability
    shown = np.flatnonzero(probability.max(axis=1) > 0.0)
    rows = [[pretty_term(result.library_terms[j])] + [_number(p, 3) for p in probability[j]] for j in shown]
    parts = [
        _figure(lambda: plot_inclusion_map(result.library_terms, names, probability),
                png=figures.get("inclusion_map.png"), caption=
                "Inclusion probability of every candidate term that some member kept, per equation."),
        _table(["term"] + [f"d({s})/dt" for s in names], rows,
               caption=f"inclusion probabilities ({len(shown)} of {len(result.library_terms)} candidate terms "
                       "kept by at least one member)", numeric=range(1, len(names) + 1)),
    ]
    return _section("inclusion-map", "\n".join(parts))


def _cv(result, figures):
    names = result.model.state_names
    thresholds = result.model.info.get("threshold", {})
    if result.cv is None:
        fixed = ", ".join(f"{s} {v:.3g}" for s, v in thresholds.items()) or "none recorded"
        return _section("cv-curve", _paragraph(
            f"The threshold was fixed in the config ([selection].threshold), not cross-validated: {fixed}.",
            "absent"))
    cv = result.cv
    rows = []
    for i, state in enumerate(names):
        t = int(np.argmin(np.abs(cv.thresholds - cv.selected[i])))
        rows.append([state, _number(cv.selected[i], 3), _number(cv.error[t, i], 3), _number(cv.error_se[t, i], 3),
                     str(int(cv.n_terms[t, i]))])
    split = result.model.info.get("cv_split")
    parts = [_paragraph(weak_target_text(result.model.info))] if result.model.info.get("target") == "weak" else []
    parts += [
        _paragraph(f"Rule {cv.rule!r}" + (f", folds by {split}" if split else "")
                   + ": 'one_se' takes the largest threshold whose error is within one standard error of the "
                     "minimum; 'min' the minimum."),
        _table(["equation", "selected threshold", "CV error", "± 1 SE", "terms kept"],
               [[f"d({r[0]})/dt"] + r[1:] for r in rows], caption="selected thresholds", numeric=(1, 2, 3, 4)),
        _figure(lambda: plot_cv_curve(cv, names), png=figures.get("cv_curve.png"), caption=
                "Cross-validation error (± 1 SE) and terms kept (dotted, right axis) against the threshold; "
                "dashed: the selected threshold."),
    ]
    return _section("cv-curve", "\n".join(parts))


def _ranking(result, figures):
    if result.ranking is None:
        return _section("ranking", _paragraph("The ranking was off ([ranking].enabled = false).", "absent"))
    table = result.ranking.table
    if not len(table):
        return _section("ranking", _paragraph("No candidate structure was scored.", "absent"))
    from .ranking import why_chosen

    criterion = result.ranking.criterion
    columns = [("rank", "rank", str), ("candidate", "candidate", str), ("source", "source", str),
               ("n_terms", "terms", str), ("deviance", "deviance", _number), ("delta", "Δ", lambda v: _number(v, 3)),
               ("weight", "weight", lambda v: _number(v, 2)), ("n_effective", "effective samples", _number),
               ("simulation_error", "sim. error", _number), ("support", "support", str),
               ("pareto", "Pareto", lambda v: "yes" if v else "no")]
    columns = [c for c in columns if c[0] in table.columns]
    rows = [[fmt(row[key]) for key, _, fmt in columns] for _, row in table.head(MAX_RANKING_ROWS).iterrows()]
    numeric = [k for k, (key, _, _) in enumerate(columns) if key not in ("candidate", "source", "support", "pareto")]
    scored_on = f"the {result.ranking.scored_on}"
    caption = f"{len(table)} candidate structures"
    if len(table) > MAX_RANKING_ROWS:
        caption += f" (first {MAX_RANKING_ROWS}; ranking.csv has all)"
    parts = [
        _paragraph(why_chosen(table, criterion, result.ranking.scored_on)),
        _paragraph(f"Scored by {criterion} on {scored_on}: each candidate is simulated with the recorded "
                   "inputs on data not used to fit it (a fold's coefficients come from the other folds). "
                   "The deviance is n_eff·ln(RSS/n), with n_eff the effective number of independent samples of "
                   "the autocorrelated residuals. Δ ≤ 2: substantial support; > 10: essentially none. Rank 1 is "
                   "the fewest-term candidate within Δ ≤ 2 of the best, and it is the model this report "
                   "describes. The simulation error is the mean NRMSE of those free runs."),
        _table([label for _, label, _ in columns], rows, numeric=numeric, caption=caption),
        _figure(lambda: plot_pareto(table), png=figures.get("ranking_pareto.png"), caption="Number of terms against the scored simulation error; the Pareto "
                                            "front joined, the best-ranked labelled #rank Δ."),
    ]
    if result.validation and result.candidates:
        top = result.settings.ranking.top
        parts.append(_figure(lambda: plot_top_candidates(result, top), png=figures.get("ranking_top.png"),
                             caption=
                             f"The {top} best-ranked candidates on held-out run {result.validation[0].run}."))
    return _section("ranking", "\n".join(parts))


def _sampling(t):
    steps = np.diff(t)
    if steps.size == 0:
        return "—", "—"
    median = float(np.median(steps))
    uniform = np.allclose(steps, median, rtol=1e-6, atol=0.0)
    spread = "uniform" if uniform else f"{_number(steps.min())} to {_number(steps.max())}"
    return _number(median), spread


def _data_overview(result):
    training, held_out = result.training, result.held_out
    runs = [(run, "training") for run in training.runs] + [(run, "held out") for run in held_out.runs]
    rows = []
    for run, role in runs:
        median, spread = _sampling(run.t)
        rows.append([run.name, role, str(len(run.t)), _number(run.t[-1] - run.t[0]), median, spread,
                     str(run.touched)])
    touched = sum(run.touched for run, _ in runs)
    missing = result.settings.data.missing
    parts = [
        _paragraph(f"{len(runs)} runs, {sum(len(r.t) for r, _ in runs)} samples; states: "
                   f"{', '.join(training.state_names)}; inputs: {', '.join(training.input_names) or 'none'}. "
                   f"Gap handling ([data].missing = {missing!r}) touched {touched} samples."),
        _table(["run", "role", "samples", "duration", "sampling step (median)", "step range",
                "samples dropped or interpolated"], rows, caption="runs", numeric=(2, 3, 4, 6)),
    ]
    for run, role in runs[:MAX_OVERVIEW_RUNS]:
        parts.append(_figure(lambda run=run: plot_run_overview(run, training.state_names, training.input_names),
                             f"Run {run.name} ({role}): states (solid) and inputs (dashed)."))
    if len(runs) > MAX_OVERVIEW_RUNS:
        parts.append(_paragraph(f"{len(runs) - MAX_OVERVIEW_RUNS} more runs are listed above but not drawn.",
                                "absent"))
    return _section("data-overview", "\n".join(parts))


def _derivative_check(result):
    if not result.smoothed:
        return _section("derivative-check", _paragraph("No training run was smoothed.", "absent"))
    smoothed = result.smoothed.trimmed[0]
    raw = next((run for run in result.training.runs if run.name == smoothed.name), None)
    section = result.settings.derivatives
    options = ", ".join(f"{k} = {v!r}" for k, v in section.options.items())
    noise = (smoothed.x_raw - smoothed.x).std(axis=0)
    dropped = (len(raw.t) - len(smoothed.t)) // 2 if raw is not None else None
    parts = [
        _paragraph(f"Method {section.method!r}" + (f" ({options})" if options else "")
                   + (f"; {dropped} samples dropped at each end of a run, where the estimate is unreliable."
                      if dropped is not None else ".")),
        _table(["state", "std of raw − smoothed (noise estimate)"],
               [[s, _number(v)] for s, v in zip(result.model.state_names, noise)],
               caption=f"run {smoothed.name}", numeric=(1,)),
    ]
    if raw is not None:
        parts.append(_figure(lambda: plot_derivative_check(smoothed, raw.t, raw.x, result.model.state_names),
                             f"Run {smoothed.name}: raw samples against the smoothed states, their "
                             "difference, and the derivative estimate over central differences of the raw samples."))
    return _section("derivative-check", "\n".join(parts))


def _inputs(result):
    record = provenance(result)
    files = [[f["run"], f["role"].replace("_", " "), str(f["samples"]), f["path"], f["sha256"]]
             for f in record["data_files"]]
    packages = [[name, version or "not installed"] for name, version in record["packages"].items()]
    packages.append(["python", record["python"]])
    parts = [
        _paragraph(f"Config: {record['config_source']}; paths relative to {record['config_base']}; "
                   f"seed {record['seed']}."),
        _table(["run", "role", "samples", "file", "SHA-256"], files, caption="data files", numeric=(2,),
               classes={3: "path", 4: "hash"}),
        _table(["package", "version"], packages, caption="package versions"),
        "<h3>Config as run (every default filled in)</h3>",
        f"<pre>{esc(to_toml(result.settings))}</pre>",
    ]
    return _section("inputs", "\n".join(parts))


# --------------------------------------------------------------------------- the page


def render_report(result, figures=None):
    """The HTML text of the report of a :class:`discover.pipeline.Result`.

    ``figures`` maps file names (``cv_curve.png``...) to PNG bytes already drawn for the
    output folder; those figures are embedded as they are instead of being drawn again.
    """
    figures = figures or {}
    model = result.model
    n_runs = len(result.training.runs) + len(result.held_out.runs)
    title = f"discover report: {', '.join(model.state_names)}"
    kept = int(np.count_nonzero(model.coef))
    lead = (f"dx/dt = f(x, u) for the states {', '.join(model.state_names)} with the inputs "
            f"{', '.join(model.input_names) or '(none)'}, identified from {len(result.training.runs)} training "
            f"run(s) of {n_runs}; {kept} terms kept. Config: {result.settings.source}.")
    nav = "".join(f'<li><a href="#{key}">{esc(heading)}</a></li>' for key, heading in SECTIONS.items())
    sections = [_caution(), _equations(result, figures), _held_out(result, figures), _residuals(result),
                _warnings(result),
                _inclusion(result, figures), _cv(result, figures), _ranking(result, figures), _data_overview(result),
                _derivative_check(result), _inputs(result)]
    return "\n".join([
        "<!DOCTYPE html>",
        '<html lang="en">',
        "<head>",
        '<meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{esc(title)}</title>",
        f"<style>{_STYLE}</style>",
        "</head>",
        "<body>",
        f"<header><h1>{esc(title)}</h1>{_paragraph(lead)}"
        + (f'<p>{len(result.warnings)} warning(s): see <a href="#warnings">Warnings</a>.</p>'
           if result.warnings else "") + "</header>",
        f"<nav><ol>{nav}</ol></nav>",
        "<main>",
        *sections,
        "</main>",
        "</body>",
        "</html>",
        "",
    ])


def write_report(result, folder):
    """Write ``folder/report.html`` for a :class:`discover.pipeline.Result`; return its path."""
    path = Path(folder) / "report.html"
    figures = {p.name: p.read_bytes() for p in Path(folder).glob("*.png")}  # drawn once, for the folder
    path.write_text(render_report(result, figures), encoding="utf-8")
    return path
