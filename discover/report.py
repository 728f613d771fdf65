"""Tables and figures (the terminal summary: :mod:`discover.summary_text`). Reports only format: nothing here
fits anything."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

# The text parts live in summary_text; imported here, where callers have always found them.
from .summary_text import (CAUTION, DIGITS, SUPERSCRIPTS, coefficient_text, diagnostic_lines,  # noqa: F401
                           format_equation, pretty_term, ranking_lines, refinement_lines, summary)


def cv_table(cv, state_names):
    rows = []
    for t, threshold in enumerate(cv.thresholds):
        for i, state in enumerate(state_names):
            rows.append({
                "state": state,
                "threshold": threshold,
                "cv_error": cv.error[t, i],
                "cv_error_se": cv.error_se[t, i],
                "n_terms": int(cv.n_terms[t, i]),
                "selected": bool(np.isclose(threshold, cv.selected[i])),
            })
    return pd.DataFrame(rows)


def _plain_log_ticks(ax, *axes):
    """Log-axis tick labels as plain numbers: figures are drawn with math text off (names from
    the data may hold "$"), and matplotlib's default log labels are math text."""
    from matplotlib.ticker import FuncFormatter, NullFormatter

    for name in axes:
        axis = getattr(ax, f"{name}axis")
        axis.set_major_formatter(FuncFormatter(lambda value, _: f"{value:g}"))
        axis.set_minor_formatter(NullFormatter())


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def plot_cv_curve(cv, state_names):
    """CV error (with ±1 SE) and term count against the threshold, one panel per state."""
    plt = _pyplot()
    n = len(state_names)
    fig, axes = plt.subplots(1, n, figsize=(4.2 * n, 3.4), squeeze=False)
    for i, (ax, state) in enumerate(zip(axes[0], state_names)):
        ax.errorbar(cv.thresholds, cv.error[:, i], yerr=cv.error_se[:, i], color="black",
                    marker="o", markersize=3, capsize=2, label="CV error")
        ax.axvline(cv.selected[i], color="0.4", linestyle="--", label="selected")
        ax.set_xscale("log")
        ax.set_yscale("log")
        _plain_log_ticks(ax, "x", "y")
        ax.set_xlabel("threshold (dimensionless)")
        ax.set_ylabel("relative CV error of d/dt")
        ax.set_title(f"d({state})/dt")
        twin = ax.twinx()
        twin.step(cv.thresholds, cv.n_terms[:, i], where="mid", color="0.55", linestyle=":")
        twin.set_ylabel("terms kept", color="0.35")
        if i == 0:
            ax.legend(loc="upper left", fontsize=8)
    fig.tight_layout()
    return fig


def plot_held_out(item, state_names, *, band=None):
    """Measured vs simulated states of one held-out run."""
    plt = _pyplot()
    n = len(state_names)
    fig, axes = plt.subplots(n, 1, figsize=(7, 2.2 * n + 0.6), sharex=True, squeeze=False)
    sim = item.simulation
    for i, (ax, state) in enumerate(zip(axes[:, 0], state_names)):
        if band is not None:
            ax.fill_between(sim.t, band[0][:, i], band[1][:, i], color="0.85", label="ensemble band", zorder=1)
        ax.plot(item.t, item.x[:, i], color="0.45", linewidth=0.8, label="measured", zorder=2)
        ax.plot(sim.t, sim.x[:, i], color="black", linestyle="--", linewidth=1.2, label="simulated", zorder=3)
        ax.set_ylabel(state)
        fit = item.metrics["fit_percent"][i]
        ax.set_title(f"{state}: fit {fit:.1f} %" if np.isfinite(fit) else f"{state}: diverged", fontsize=9)
    axes[0, 0].legend(loc="best", fontsize=8)
    axes[-1, 0].set_xlabel("time")
    fig.suptitle(f"held-out run {item.run}", fontsize=10)
    fig.tight_layout()
    return fig


def safe_name(text):
    """A file-name-safe version of a name that came from the data."""
    return re.sub(r"[^A-Za-z0-9_.-]", "_", text)[:80] or "run"


def file_stems(names):
    """File-name-safe stems, one per name and all different ('run 1' and 'run_1' both
    become 'run_1' on their own; the second then gets a suffix)."""
    stems, taken = [], set()
    for name in names:
        stem, n = safe_name(name), 2
        while stem.lower() in taken:  # case-insensitive file systems too
            stem, n = f"{safe_name(name)}-{n}", n + 1
        taken.add(stem.lower())
        stems.append(stem)
    return stems


def write_figures(result, folder):
    import matplotlib

    # Names from the data may hold "$", which matplotlib would otherwise read as TeX.
    with matplotlib.rc_context({"text.parse_math": False}):
        _write_figures(result, folder)


def _write_figures(result, folder):
    plt = _pyplot()
    figures = []
    if result.cv is not None:
        figures.append(("cv_curve.png", plot_cv_curve(result.cv, result.model.state_names)))
    if result.ensemble is not None:
        figures.append(("inclusion_map.png", plot_inclusion_map(
            result.library_terms, result.model.state_names, result.ensemble.summary.inclusion_probability)))
        figures.append(("coefficient_distributions.png",
                        plot_coefficient_distributions(result.model, result.ensemble.coef)))
    if result.ranking is not None and len(result.ranking.table):
        figures.append(("ranking_pareto.png", plot_pareto(result.ranking.table)))
        if result.validation:
            figures.append(("ranking_top.png", plot_top_candidates(result, result.settings.ranking.top)))
    for item, stem in zip(result.validation, file_stems([item.run for item in result.validation])):
        band = (item.band.low, item.band.high) if item.band is not None else None
        figures.append((f"heldout_{stem}.png",
                        plot_held_out(item, result.model.state_names, band=band)))
    for name, fig in figures:
        fig.savefig(folder / name, dpi=110, metadata={"Software": None})
        plt.close(fig)


def band_table(item, state_names):
    """Median trajectory and central band of the ensemble on one held-out run."""
    band = item.band
    table = {"t": item.t}
    for i, state in enumerate(state_names):
        table[f"{state}_measured"] = item.x[:, i]
        table[f"{state}_median"] = band.median[:, i]
        table[f"{state}_low"] = band.low[:, i]
        table[f"{state}_high"] = band.high[:, i]
    return pd.DataFrame(table)


def plot_inclusion_map(terms, state_names, probability):
    """Term × state heat map of inclusion probabilities (grey scale, values printed)."""
    plt = _pyplot()
    shown = np.flatnonzero(probability.max(axis=1) > 0.0)
    if shown.size == 0:
        shown = np.arange(len(terms))
    values = probability[shown]
    fig, ax = plt.subplots(figsize=(1.6 + 1.3 * len(state_names), 0.8 + 0.28 * len(shown)))
    image = ax.imshow(values, cmap="Greys", vmin=0.0, vmax=1.0, aspect="auto")
    ax.set_xticks(range(len(state_names)), [f"d({s})/dt" for s in state_names], rotation=30, ha="right")
    ax.set_yticks(range(len(shown)), [pretty_term(terms[j]) for j in shown])
    for (r, c), p in np.ndenumerate(values):
        ax.text(c, r, f"{p:.2f}", ha="center", va="center", fontsize=7,
                color="white" if p > 0.6 else "black")
    fig.colorbar(image, ax=ax, label="inclusion probability")
    ax.set_title("terms ever kept by a member", fontsize=9)
    fig.tight_layout()
    return fig


def plot_coefficient_distributions(model, ensemble_coef):
    """Histograms of the members' coefficients for each term of the model."""
    plt = _pyplot()
    pairs = [(j, i) for i in range(len(model.state_names)) for j in np.flatnonzero(model.coef[:, i])]
    n = max(1, len(pairs))
    cols = min(4, n)
    rows = -(-n // cols)
    fig, axes = plt.subplots(rows, cols, figsize=(3.0 * cols, 2.3 * rows), squeeze=False)
    for ax in axes.ravel()[len(pairs):]:
        ax.axis("off")
    for ax, (j, i) in zip(axes.ravel(), pairs):
        values = ensemble_coef[:, j, i]
        kept = values[values != 0]
        # Identical values (every member agrees) get one bin: 20 bins of zero width do not exist.
        spread = np.ptp(kept) if kept.size else 0.0
        bins = 20 if spread > 1e-9 * max(1.0, float(np.abs(kept).max(initial=0.0))) else 1
        ax.hist(kept, bins=bins, color="0.55", edgecolor="black", linewidth=0.4)
        ax.axvline(model.coef[j, i], color="black", linestyle="--", linewidth=1.0)
        ax.set_title(f"d({model.state_names[i]})/dt: {pretty_term(model.terms[j])}", fontsize=8)
        ax.set_xlabel("coefficient", fontsize=8)
        ax.tick_params(labelsize=7)
        # Few ticks, offset notation: small coefficients with many digits do not overlap.
        ax.xaxis.set_major_locator(plt.MaxNLocator(4))
        ax.ticklabel_format(axis="x", style="sci", scilimits=(-3, 4), useOffset=True)
    fig.tight_layout()
    return fig


def plot_pareto(table):
    """Complexity against the scored simulation error, Pareto front joined, Δ labelled."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    ok = np.isfinite(table["simulation_error"])
    ax.scatter(table["n_terms"][ok], table["simulation_error"][ok], color="0.6", edgecolor="black",
               s=28, label="candidate", zorder=2)
    front = table[table["pareto"] & ok].sort_values("n_terms")
    ax.plot(front["n_terms"], front["simulation_error"], color="black", marker="s", markersize=5,
            label="Pareto front", zorder=3)
    # Labels take three heights in turn, so that neighbours never overlap.
    for k, (_, row) in enumerate(table[ok].head(6).iterrows()):
        ax.annotate(f"#{row['rank']} Δ={row['delta']:.0f}", (row["n_terms"], row["simulation_error"]),
                    textcoords="offset points", xytext=(4, 5 + 11 * (k % 3)), fontsize=7,
                    arrowprops={"arrowstyle": "-", "color": "0.6", "linewidth": 0.5})
    model = table[(table["candidate"] == "model") & ok]
    if len(model):
        ax.scatter(model["n_terms"], model["simulation_error"], marker="*", s=160, color="white",
                   edgecolor="black", linewidth=1.0, label="identified model", zorder=4)
    ax.set_yscale("log")
    _plain_log_ticks(ax, "y")
    ax.set_xlabel("number of terms")
    ax.set_ylabel("simulation error, scored (mean NRMSE)")
    ax.legend(fontsize=8)
    fig.tight_layout()
    return fig


def plot_top_candidates(result, top):
    """Held-out trajectories of the best-ranked candidates (first held-out run), as the
    ranking simulated them (nothing is simulated here)."""
    plt = _pyplot()
    item = result.validation[0]
    names = result.model.state_names
    fig, axes = plt.subplots(len(names), 1, figsize=(7, 2.2 * len(names) + 0.6), sharex=True, squeeze=False)
    styles = ["-", "--", ":", "-.", (0, (5, 1)), (0, (1, 1))]
    for i, ax in enumerate(axes[:, 0]):
        ax.plot(item.t, item.x[:, i], color="0.7", linewidth=2.0, label="measured")
        ax.set_ylabel(names[i])
    for n, (_, row) in enumerate(result.ranking.table.head(top).iterrows()):
        trajectory = result.ranking.first_run[row["candidate"]]
        for i, ax in enumerate(axes[:, 0]):
            ax.plot(item.t, trajectory[:, i], color="black", linestyle=styles[n % len(styles)], linewidth=1.0,
                    label=f"#{row['rank']} {row['candidate']}")
    axes[0, 0].legend(fontsize=7, loc="best")
    axes[-1, 0].set_xlabel("time")
    fig.suptitle(f"top candidates on held-out run {item.run}", fontsize=10)
    fig.tight_layout()
    return fig


def plot_run_overview(run, state_names, input_names):
    """A run's states and inputs over time, one panel per column (grey scale).

    States are solid black, inputs dashed grey (drawn as steps when the recorded
    input mostly holds its values, as a logged command does).

    Parameters
    ----------
    run : discover.data.Run
        ``t`` of shape (n_samples,), ``x`` of shape (n_samples, n_states), ``u`` of
        shape (n_samples, n_inputs).
    state_names, input_names : sequence of str
        Axis labels.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from .simulate import guess_interpolation

    plt = _pyplot()
    names = [(name, run.x[:, i], "state") for i, name in enumerate(state_names)]
    names += [(name, run.u[:, j], "input") for j, name in enumerate(input_names)]
    n = max(1, len(names))
    fig, axes = plt.subplots(n, 1, figsize=(7, 1.5 * n + 0.7), sharex=True, squeeze=False)
    # A held command is drawn as steps, as the simulation would hold it.
    held = guess_interpolation(run.u) == "zoh"
    for ax, (name, values, kind) in zip(axes[:, 0], names):
        if kind == "state":
            ax.plot(run.t, values, color="black", linewidth=1.0)
        else:
            ax.plot(run.t, values, color="0.35", linewidth=1.0, linestyle="--",
                    drawstyle="steps-post" if held else "default")
        ax.set_ylabel(f"{name}\n({kind})", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(True, color="0.9", linewidth=0.6)
    axes[-1, 0].set_xlabel("time")
    fig.suptitle(f"run {run.name}: {len(run.t)} samples", fontsize=10)
    fig.tight_layout()
    return fig


def plot_derivative_check(smoothed_run, raw_t, raw_x, state_names):
    """Smoothed against raw states of one run, their difference, and the derivative.

    Left: the raw samples (grey dots) and the smoothed states the derivatives come
    from (black line). Middle: raw minus smoothed on the samples kept after end
    trimming; it should look like measurement noise, with no trace of the signal
    left in it. Right: the derivative estimate (black line) over central differences
    of the raw samples (grey dots, :func:`numpy.gradient`), which are noisy but unbiased.

    Parameters
    ----------
    smoothed_run : discover.pipeline.Smoothed
        ``t`` of shape (n_kept,), ``x``, ``x_dot`` and ``x_raw`` of shape (n_kept, n_states).
    raw_t : ndarray of shape (n_samples,)
    raw_x : ndarray of shape (n_samples, n_states)
        The run as loaded, ends included.
    state_names : sequence of str

    Returns
    -------
    matplotlib.figure.Figure
    """
    plt = _pyplot()
    n = len(state_names)
    fig, axes = plt.subplots(n, 3, figsize=(11, 2.0 * n + 0.7), sharex=True, squeeze=False,
                             gridspec_kw={"width_ratios": [3, 2, 3]})
    residual = smoothed_run.x_raw - smoothed_run.x
    raw_slope = np.gradient(raw_x, raw_t, axis=0) if len(raw_t) > 1 else np.zeros_like(raw_x)
    for i, state in enumerate(state_names):
        left, middle, right = axes[i]
        left.plot(raw_t, raw_x[:, i], linestyle="none", marker=".", markersize=2.5, color="0.6", label="raw")
        left.plot(smoothed_run.t, smoothed_run.x[:, i], color="black", linewidth=1.0, label="smoothed")
        left.set_ylabel(state, fontsize=8)
        middle.plot(smoothed_run.t, residual[:, i], color="0.3", linewidth=0.6)
        middle.axhline(0.0, color="black", linewidth=0.6)
        middle.set_ylabel(f"raw − smoothed\n{state}", fontsize=8)
        right.plot(raw_t, raw_slope[:, i], linestyle="none", marker=".", markersize=2.0, color="0.65",
                   label="central differences of raw")
        right.plot(smoothed_run.t, smoothed_run.x_dot[:, i], color="black", linewidth=1.0, label="estimate")
        right.set_ylabel(f"d({state})/dt", fontsize=8)
        # Keep the estimate readable: the raw differences may be far noisier.
        low, high = np.nanpercentile(smoothed_run.x_dot[:, i], [0, 100]) if len(smoothed_run.t) else (0, 0)
        pad = 0.5 * (high - low) if high > low else 1.0
        right.set_ylim(low - pad, high + pad)
        for ax in (left, middle, right):
            ax.tick_params(labelsize=7)
            ax.grid(True, color="0.9", linewidth=0.6)
    axes[0, 0].legend(fontsize=7, loc="best", markerscale=3)
    axes[0, 2].legend(fontsize=7, loc="best", markerscale=3)
    for ax in axes[-1]:
        ax.set_xlabel("time")
    fig.suptitle(f"derivative check on run {smoothed_run.name}", fontsize=10)
    fig.tight_layout()
    return fig


# --------------------------------------------------------------------------- sections


def plot_state_coverage(training, held_out, state_names):
    """Pairwise state-space coverage: every pair of states, training runs (grey) against held-out
    runs (black), so a held-out run that leaves the trained region shows at a glance."""
    plt = _pyplot()
    n = len(state_names)
    pairs = [(i, j) for i in range(n) for j in range(i + 1, n)] or [(0, 0)]
    cols = min(3, len(pairs))
    rows = -(-len(pairs) // cols)
    fig, axes = plt.subplots(rows, cols, figsize=(3.2 * cols, 3.0 * rows), squeeze=False)
    for ax in axes.ravel()[len(pairs):]:
        ax.axis("off")
    for ax, (i, j) in zip(axes.ravel(), pairs):
        for dataset, color, label in ((training, "0.7", "training"), (held_out, "black", "held out")):
            for k, run in enumerate(dataset.runs):
                x_axis = run.t if i == j else run.x[:, i]
                ax.plot(x_axis, run.x[:, j], color=color, linewidth=0.6, label=label if k == 0 else None)
        ax.set_xlabel("time" if i == j else state_names[i], fontsize=8)
        ax.set_ylabel(state_names[j], fontsize=8)
        ax.tick_params(labelsize=7)
    axes[0, 0].legend(fontsize=7, loc="best")
    fig.tight_layout()
    return fig
