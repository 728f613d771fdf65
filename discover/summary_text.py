"""The terminal summary (also summary.txt) and the text pieces of reports."""

from __future__ import annotations

import re

import numpy as np

SUPERSCRIPTS = str.maketrans("0123456789-", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻")
CAUTION = (
    "Caution: an identified model is an estimate from finite, noisy data. Validate it on "
    "independent runs before using it to control real equipment, and defer to local codes "
    "and licensed engineering practice."
)


def pretty_term(expr):
    """``'yaw_rate**3*rudder' -> 'yaw_rate³·rudder'`` for reading; files keep the Python form."""
    text = re.sub(r"\*\*(\d+)", lambda m: m.group(1).translate(SUPERSCRIPTS), expr)
    return text.replace("*", "·")


#: Significant digits of coefficients in the terminal, the summary and the LaTeX export.
DIGITS = 4


def coefficient_text(value, digits=DIGITS):
    """``value`` to ``digits`` significant digits; a rounded value keeps its trailing zeros,
    so that 1.0004 reads ``1.000`` and a bare ``1`` always means exactly one."""
    short = f"{value:.{digits}g}"
    if float(short) == value:
        return short
    return f"{value:#.{digits}g}".rstrip(".") if "e" not in short else short


def format_equation(state, kept, *, show_probability=False):
    """``d(yaw_rate)/dt = -0.05·yaw_rate + 0.005·rudder`` from (expr, coefficient, stats) rows."""
    if not kept:
        return f"d({state})/dt = 0"
    parts = []
    for n, (expr, coefficient, stats) in enumerate(kept):
        sign = "-" if coefficient < 0 else "+"
        magnitude = coefficient_text(abs(coefficient))
        body = magnitude if expr == "1" else f"{magnitude}·{pretty_term(expr)}"
        p = stats.get("inclusion_probability")
        if show_probability and p is not None and np.isfinite(p):
            body += f" [p={p:.2f}]"
        parts.append((f"-{body}" if sign == "-" else body) if n == 0 else f" {sign} {body}")
    return f"d({state})/dt = " + "".join(parts)


def weak_target_text(info):
    """One sentence on the weak regression target of a model's ``info``."""
    weak = info.get("weak") if isinstance(info.get("weak"), dict) else {}
    return (f"Regression target: the weak (integral) form, {weak.get('windows')} test-function windows of "
            f"half-width {weak.get('half_width')} samples (degree p = {weak.get('degree_p')}, stride "
            f"{weak.get('stride')}); thresholds are on the scale of the weak target.")


def summary(result):
    """The text printed at the end of a run (also written as summary.txt)."""
    model = result.model
    show = "inclusion_probability" in model.term_stats
    lines = ["Identified equations" + (" [p = inclusion probability over the bootstrap members]:" if show else ":")]
    for state, kept in model.equations():
        lines.append("  " + format_equation(state, kept, show_probability=show))
    lines += refinement_lines(model)
    if model.info.get("derivative_window_choice"):
        lines.append(model.info["derivative_window_choice"])
    thresholds = model.info.get("threshold", {})
    if thresholds:
        how = f"cross-validated, rule {result.cv.rule!r}" if result.cv is not None else "fixed"
        lines.append("Threshold (dimensionless, " + how + "): "
                     + ", ".join(f"{s} {v:.3g}" for s, v in thresholds.items()))
    if model.info.get("target") == "weak":
        lines.append(weak_target_text(model.info))
    if result.validation:
        lines.append("Held-out runs (free-run simulation with the recorded input):")
        for item in result.validation:
            sim = item.simulation
            if sim.diverged:
                lines.append(f"  {item.run}: diverged ({sim.message})")
                continue
            fits = ", ".join(f"{s} {f:.1f} %" for s, f in zip(model.state_names, item.metrics["fit_percent"]))
            lines.append(f"  {item.run}: fit {fits}")
            if item.band is not None:
                cover = ", ".join(f"{s} {100 * c:.0f} %" for s, c in zip(model.state_names, item.band.coverage))
                lines.append(f"  {item.run}: samples inside the {100 * item.band.level:.0f} % ensemble band: {cover}")
    lines += diagnostic_lines(result.diagnostics)
    if result.ranking is not None:
        lines += ranking_lines(result.ranking.table, result.ranking.criterion, scored_on=result.ranking.scored_on)
    for warning in result.warnings:
        lines.append(f"Warning: {warning}")
    lines.append(CAUTION)
    return "\n".join(lines)


def refinement_lines(model):
    """The refined coefficients beside the derivative fit, with their confidence intervals."""
    info = model.info.get("refinement")
    if not isinstance(info, dict) or "derivative_fit" not in model.term_stats:
        return []
    level = 100 * info.get("interval_level", 0.9)
    lines = [f"Refined by output error (multiple shooting); coefficient ± half-width of its {level:.0f} % "
             "confidence interval given these terms, then the derivative fit:"]
    rows = [(f"d({state})/dt", expr, coefficient, stats) for state, kept in model.equations()
            for expr, coefficient, stats in kept]
    width = max((len(r[0]) for r in rows), default=0)
    term_width = max((len(pretty_term(r[1])) for r in rows), default=0)
    for label, expr, coefficient, stats in rows:
        low, high = stats.get("interval_low", np.nan), stats.get("interval_high", np.nan)
        # Six digits and the half-width: four digits can hide that an interval misses a round value.
        interval = f"{coefficient:.6g} ± {(high - low) / 2:.2g}" if np.isfinite(low) and np.isfinite(high) else \
            f"{coefficient:.6g} (not determined)"
        lines.append(f"  {label:<{width}}  {pretty_term(expr):<{term_width}}  {interval:<24} "
                     f"{coefficient_text(stats.get('derivative_fit', np.nan))}")
    return lines


def diagnostic_lines(diagnostics):
    """Residual verdicts per state (held-out runs, else training runs) and input excitation."""
    if diagnostics is None:
        return []
    lines = []
    analysis, where = ((diagnostics.held_out, "held-out") if diagnostics.held_out is not None
                       else (diagnostics.training, "training"))
    if analysis is not None:
        lines.append(f"Residual checks (equation residuals on the {where} runs, every {diagnostics.stride} "
                     f"samples, {100 * analysis.level:.0f} % bounds, {analysis.max_lag} lags):")
        lines += [f"  {verdict}" for verdict in analysis.verdicts]
    excitation = diagnostics.excitation
    if excitation is not None:
        lines.append("Input excitation (training runs): " + ", ".join(
            f"{name} order {order}{'+' if order >= excitation.max_order else ''}, "
            f"band {low:.3g}–{high:.3g} (frequency units of 1/time)"
            for name, order, low, high in zip(excitation.input_names, excitation.order, excitation.band_low,
                                             excitation.band_high)))
    return lines


def ranking_lines(table, criterion, top=8, *, scored_on="held-out runs"):
    """The ranking as aligned text lines (the CSV holds every column)."""
    from .ranking import why_chosen

    lines = [f"Ranking of {len(table)} candidate structures on the {scored_on} (by {criterion}; "
             "Δ ≤ 2 substantial support, > 10 essentially none; rank 1 is written to model.json):",
             f"  {'rank':>4} {'terms':>5} {'Δ':>9} {'weight':>6} {'sim. error':>10}  {'support':<16} candidate"]
    for _, row in table.head(top).iterrows():
        flag = " (Pareto)" if row["pareto"] else ""
        lines.append(f"  {row['rank']:>4} {row['n_terms']:>5} {row['delta']:>9.1f} {row['weight']:>6.2f} "
                     f"{row['simulation_error']:>10.4f}  {row['support']:<16} {row['candidate']}{flag}")
    if len(table) > top:
        lines.append(f"  ... {len(table) - top} more in ranking.csv")
    lines.append("  " + why_chosen(table, criterion, scored_on))
    return lines
