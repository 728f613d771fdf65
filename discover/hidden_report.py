"""Summary text, figures and the HTML report of a run with hidden states. Reports only format.

Reads a :class:`discover.hidden_pipeline.HiddenResult`; nothing here fits or estimates.
"""

from __future__ import annotations

import numpy as np

from .html_parts import _STYLE, _figure, _number, _paragraph, _table, esc
from .summary_text import CAUTION, coefficient_text, format_equation, pretty_term

PLAIN = ("Identifiability: every coefficient and every hidden initial value is determined by the measured "
         "outputs (no direction of the scaled output sensitivities is below the tolerance).")


def identifiability_lines(model):
    """Plain sentences: what the data do not determine, how each hidden state's scale is set."""
    record = model.info.get("identifiability", {})
    lines = []
    for text in record.get("not_identifiable", []):
        lines.append(f"Not identifiable: {text}.")
    for text in record.get("scale", []):
        lines.append(f"Scale: {text}.")
    if record.get("arbitrary"):
        lines.append("The numbers of " + ", ".join(record["arbitrary"]) + " are arbitrary: one point of a family "
                     "that fits equally well, not findings. Fix one of them with [hidden].known (a known "
                     "component value) or set [hidden].scale = \"unit_coupling\".")
    if not record.get("singular_values"):
        lines.append("Identifiability: not computed (the free run of the fitted model diverged); no coefficient "
                     "is established.")
    elif not lines:
        lines.append(PLAIN)
    return lines


def estimate_lines(result):
    """Per run: the hidden states' smoothed range and band half-width; held-out output fits."""
    model, lines = result.model, []
    hidden = [model.state_names.index(h) for h in model.hidden_states]
    for item in result.estimates.runs:
        if item.estimate is None:
            if item.message:
                lines.append(f"  {item.run} ({item.role}): {item.message}")
            continue
        parts = []
        for k in hidden:
            values, band = item.estimate.smoothed[:, k], 2 * item.estimate.smoothed_std[:, k]
            parts.append(f"{model.state_names[k]} {values.min():.4g} to {values.max():.4g} "
                         f"(±2σ median {np.median(band):.3g})")
        if parts:
            lines.append(f"  {item.run} ({item.role}): " + "; ".join(parts))
    return lines


def summary(result):
    """The text printed at the end of a run with hidden states (also summary.txt)."""
    model = result.model
    lines = [f"Identified equations (output error; hidden: {', '.join(model.hidden_states) or 'none'}):"]
    for state, kept in model.equations():
        lines.append("  " + format_equation(state, kept))
    lines.append("Outputs:")
    for name, expr in model.output_expressions.items():
        lines.append(f"  {name} = {pretty_term(expr)}")
    lines.append("Coefficients ± standard error (Newey-West), given the structure:")
    for state, kept in model.equations():
        for expr, value, stats in kept:
            se = stats.get("standard_error", np.nan)
            fixed = any(f["state"] == state and f["expr"] == expr for f in model.info.get("fixed_terms", []))
            tail = "fixed" if fixed else ("not determined" if not np.isfinite(se) else f"± {coefficient_text(se, 2)}")
            lines.append(f"  d({state})/dt: {expr}  {coefficient_text(value)}  {tail}")
    lines += identifiability_lines(model)
    dropped = model.info.get("output_error", {}).get("dropped_by_threshold", [])
    if dropped:
        lines.append(f"Dropped by the threshold {model.info['output_error']['threshold']:g} (dimensionless): "
                     + ", ".join(dropped))
    if model.hidden_states:
        lines.append("Hidden states, smoothed estimate (unscented Kalman filter + RTS smoother):")
        lines += estimate_lines(result)
    held = [item for item in result.estimates.runs if item.role == "held_out"]
    if held:
        lines.append("Held-out runs (free run from the smoothed start, recorded input):")
        for item in held:
            if item.metrics is None:
                lines.append(f"  {item.run}: diverged")
                continue
            fits = ", ".join(f"{name} {f:.1f} %" for name, f in zip(model.output_expressions,
                                                                   item.metrics["fit_percent"]))
            lines.append(f"  {item.run}: fit {fits}")
    for warning in result.warnings:
        lines.append(f"Warning: {warning}")
    lines.append(CAUTION)
    return "\n".join(lines)


# --------------------------------------------------------------------------- figures


def plot_estimate(item, model):
    """Measured outputs with the estimate's outputs (and the held-out free run); hidden states ±2σ."""
    from .report import _pyplot

    plt = _pyplot()
    outputs = list(model.output_expressions)
    hidden = [model.state_names.index(h) for h in model.hidden_states]
    rows = len(outputs) + len(hidden)
    fig, axes = plt.subplots(rows, 1, figsize=(8, 2.2 * rows + 0.6), sharex=True, squeeze=False)
    estimate = item.estimate
    fitted = model.outputs(estimate.smoothed, item.u) if estimate is not None else None
    for k, name in enumerate(outputs):
        ax = axes[k, 0]
        ax.plot(item.t, item.y[:, k], ".", ms=2, color="0.5", label="measured")
        if fitted is not None:
            ax.plot(item.t, fitted[:, k], color="k", lw=1.2, label="smoothed estimate")
        if item.simulated_outputs is not None:
            ax.plot(item.t, item.simulated_outputs[:, k], "--", color="tab:blue", lw=1.0, label="free run")
        ax.set_ylabel(name)
        ax.legend(loc="best", fontsize=8)
    for n, k in enumerate(hidden):
        ax = axes[len(outputs) + n, 0]
        if estimate is not None:
            ax.fill_between(item.t, estimate.low[:, k], estimate.high[:, k], color="tab:orange", alpha=0.3,
                            label="±2σ")
            ax.plot(item.t, estimate.smoothed[:, k], color="tab:orange", lw=1.2, label="smoothed estimate")
            ax.legend(loc="best", fontsize=8)
        ax.set_ylabel(f"{model.state_names[k]} (hidden)")
    axes[-1, 0].set_xlabel("time")
    fig.suptitle(f"{item.run} ({item.role.replace('_', '-')})")
    fig.tight_layout()
    return fig


def write_figures(result, folder, stems):
    """estimate_<run>.png for every run; returns {file name: PNG bytes}."""
    from .report import _pyplot

    plt = _pyplot()
    written = {}
    for item, stem in zip(result.estimates.runs, stems):
        fig = plot_estimate(item, result.model)
        path = folder / f"estimate_{stem}.png"
        fig.savefig(path, dpi=100, metadata={"Software": None})
        plt.close(fig)
        written[path.name] = path.read_bytes()
    return written


# --------------------------------------------------------------------------- HTML


def render_report(result, figures, stems):
    """The self-contained report.html text (figures embedded)."""
    model = result.model
    title = f"discover report: {', '.join(model.state_names)} (hidden: {', '.join(model.hidden_states) or 'none'})"
    equations = "".join(f'<div class="equation">{esc(format_equation(s, k))}</div>' for s, k in model.equations())
    outputs = "".join(f'<div class="equation">{esc(n)} = {esc(pretty_term(e))}</div>'
                      for n, e in model.output_expressions.items())
    rows = []
    for state, kept in model.equations():
        for expr, value, stats in kept:
            rows.append([f"d({state})/dt", expr, _number(value), _number(stats.get("standard_error")),
                         _number(stats.get("interval_low")), _number(stats.get("interval_high")),
                         _number(stats.get("start_value"))])
    table = _table(["equation", "term", "coefficient", "standard error", "interval low", "interval high",
                    "start (lifted)"], rows, numeric=(2, 3, 4, 5, 6),
                   caption="Coefficients by output error; — where the data do not determine them")
    ident = "".join(_paragraph(line) for line in identifiability_lines(model))
    est = model.info.get("estimation", {})
    noise = _table(["quantity", "values", "from"], [
        ["measurement noise std", ", ".join(f"{k} {v:.3g}" for k, v in est.get("measurement_std", {}).items()),
         est.get("measurement_std_from", "")],
        ["process noise std (per √time)", ", ".join(f"{k} {v:.3g}" for k, v in est.get("process_std", {}).items()),
         est.get("process_std_from", "")]], caption="Noise levels of the state estimator")
    valid = result.validation_table()
    valid_html = _table(list(valid.columns), [[_number(v) if isinstance(v, float) else v for v in row]
                                              for row in valid.itertuples(index=False)],
                        caption="Held-out runs: free-run output fit") if len(valid) else \
        _paragraph("No run is held out: the model is not validated on unseen data.", "absent")
    figs = "".join(_figure(None, f"Run {item.run}: outputs and hidden states (estimate ± 2σ); file "
                                 f"estimate_{stem}.csv", figures.get(f"estimate_{stem}.png"))
                   for item, stem in zip(result.estimates.runs, stems) if f"estimate_{stem}.png" in figures)
    warnings = "".join(f"<li>{esc(w)}</li>" for w in result.warnings)
    body = [
        f"<header><h1>{esc(title)}</h1>{_paragraph(f'Config: {result.settings.source}.')}</header>",
        f'<section id="caution"><h2>Caution</h2><p class="caution">{esc(CAUTION)}</p></section>',
        f'<section id="equations"><h2>Equations and outputs</h2>{equations}<h3>Outputs</h3>{outputs}{table}</section>',
        f'<section id="identifiability"><h2>Identifiability</h2>{ident}</section>',
        f'<section id="estimation"><h2>Hidden-state estimation</h2>{noise}{figs}</section>',
        f'<section id="held-out"><h2>Held-out validation</h2>{valid_html}</section>',
        f'<section id="warnings"><h2>Warnings</h2><ul class="warnings">{warnings}</ul></section>',
    ]
    return "\n".join(["<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
                      f"<title>{esc(title)}</title>", f"<style>{_STYLE}</style>", "</head>", "<body>", "<main>",
                      *body, "</main>", "</body>", "</html>", ""])
