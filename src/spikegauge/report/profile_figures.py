"""Figures of a profile (matplotlib, Agg canvas, no pyplot state).

Each function takes the profile's results table (``results.csv``) and/or
document (``profile.json``) and returns a Figure. Colours are the
Okabe–Ito palette of :mod:`.raster_plots`, and every strategy also has its
own marker, so the figures read in grey-scale print.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from ..profile.front import COST_MEASURES, ERROR_MEASURES, REFERENCE_FLOOR_FACTOR, fit_excluded
from .raster_plots import OKABE_ITO, _new_figure

STYLE = {"fixed": (OKABE_ITO["orange"], "s"), "global-adaptive": (OKABE_ITO["blue"], "^"),
         "local-adaptive": (OKABE_ITO["green"], "o")}
"""Colour and marker of each strategy."""
COMBO_COLOURS = [OKABE_ITO[k] for k in ("orange", "sky", "green", "vermillion", "purple", "blue", "black",
                                        "yellow")]
MARKERS = "sovD^<>P*X"


def plot_front(table: pd.DataFrame, doc: dict, error: str = "jitter", cost: str = "cpu") -> Figure:
    """Work–precision diagram: cost against error of every ok point, each strategy's front as a
    line, the target region shaded, the recommended point ringed, the reference's uncertainty
    drawn as a line."""
    fig, ax = _new_figure(None, (7.5, 6.4))
    ecol, ccol = ERROR_MEASURES[error], COST_MEASURES[cost]
    seed0 = doc["seeds"][0]
    rows = table[(table["seed"] == seed0) & (table["status"] == "ok") & table[ccol].notna()]
    fronts = doc["fronts"][cost][error]
    floor = _floor(rows[ecol])
    for strategy, (colour, marker) in STYLE.items():
        r = rows[rows["strategy"] == strategy]
        if not len(r):
            continue
        y = np.maximum(r[ecol].to_numpy(float), floor)
        ax.scatter(r[ccol], y, color=colour, marker=marker, alpha=0.55, label=strategy)
        f = rows.set_index("point").loc[[p for p in fronts.get(strategy, []) if p in set(rows["point"])]]
        ax.plot(f[ccol], np.maximum(f[ecol].to_numpy(float), floor), color=colour, marker=marker,
                linewidth=1.8, drawstyle="steps-post")
    if error in ("jitter", "mismatch", "open-loop"):
        limit = doc["target"]["mismatch_frac" if error == "mismatch" else "jitter_ms"]
        ax.axhspan(floor, limit, color="0.88", zorder=0,
                   label="within the target (this error alone)")
    if error in ("jitter", "open-loop"):
        unc = doc["references"][0]["uncertainty"].get("shift_rms_ms")
        if unc is not None and np.isfinite(unc) and unc > 0:
            ax.axhline(max(unc, floor), color="0.35", linestyle=":", linewidth=1.0,
                       label="reference's own uncertainty")
    rec = (doc.get("verdict") or {}).get("recommended")
    if rec is not None and rec["point"] in set(rows["point"]):
        r = rows.set_index("point").loc[rec["point"]]
        ax.scatter([r[ccol]], [max(float(r[ecol]), floor)], s=220, facecolors="none",
                   edgecolors=OKABE_ITO["vermillion"], linewidths=2.0, label="recommended", zorder=5)
    ax.set_xscale("log")
    ax.set_yscale("log")
    _draw_lower_bounds(ax, table[table["seed"] == seed0], cost)
    ax.set_xlabel({"work": "work (rhs evaluations + Newton iterations + Jacobians)",
                   "cpu": "CPU seconds on one thread"}[cost])
    ax.set_ylabel({"jitter": "RMS jitter in the evaluation window (ms)",
                   "mismatch": "(missed + extra) per reference spike",
                   "van-rossum": "van Rossum distance (mean over cells)",
                   "rate": "RMS rate error (Hz)",
                   "open-loop": "open-loop RMS jitter over the whole run (ms)"}[error])
    ax.legend(fontsize="small", loc="upper left", bbox_to_anchor=(0.0, -0.12), ncol=2, frameon=False)
    ax.set_title("Work–precision diagram (points at the bottom edge had zero error)", fontsize="medium",
                 pad=12)
    return fig


def _draw_lower_bounds(ax, rows: pd.DataFrame, cost: str) -> None:
    """Runs the sweep stopped at its work limit, and settings it skipped, as right-pointing
    triangles along the top edge: their cost is at least there (a skipped setting's predicted
    work; it has no CPU time), their error unknown."""
    top = ax.get_ylim()[1]
    for status, filled in (("stopped", True), ("skipped", False)):
        r = rows[rows["status"] == status]
        x = r[COST_MEASURES[cost]] if status == "stopped" or cost == "cpu" else r["predicted_work"]
        x = x.to_numpy(float)
        x = x[np.isfinite(x) & (x > 0)]
        if not x.size:
            continue
        ax.scatter(x, np.full(x.size, top), marker=">", s=50, clip_on=False, zorder=4,
                   color="0.3" if filled else "none", edgecolors="0.3",
                   label="stopped at the work limit (cost at least here)"
                   if status == "stopped" else "skipped (predicted cost, never run)")
    ax.set_ylim(top=top)


def _floor(values) -> float:
    v = np.asarray(values, float)
    pos = v[np.isfinite(v) & (v > 0)]
    return float(pos.min() / 10) if pos.size else 1e-12


def plot_convergence(table: pd.DataFrame, doc: dict) -> Figure:
    """Error against dt (fixed) and against rtol (adaptive), fitted slopes in the legends.

    Points left out of the fits (below the reference's own uncertainty) are
    drawn hollow; an adaptive family whose steps the input events set says so.
    """
    from matplotlib.ticker import LogLocator

    fig = Figure(figsize=(11.0, 5.6), layout="constrained")
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    ax1, ax2 = fig.subplots(1, 2)
    rows = table[(table["seed"] == doc["seeds"][0]) & (table["status"] == "ok")]
    unc = doc["references"][0]["uncertainty"].get("shift_rms_ms")
    unc = np.nan if unc is None else float(unc)
    below = fit_excluded(rows, unc)
    fits = {(f["strategy"], f["stepper"], f["crossing"], f["delivery"]): f for f in doc["fits"]}
    col = "target_shift_rms_ms"

    def draw(ax, r, x, i, label):
        colour, marker = COMBO_COLOURS[i % len(COMBO_COLOURS)], MARKERS[i % len(MARKERS)]
        r = r.sort_values(x)
        ax.plot(r[x], r[col], color=colour, linewidth=1.0, label=label)
        solid, hollow = r[~below.loc[r.index]], r[below.loc[r.index]]
        ax.scatter(solid[x], solid[col], color=colour, marker=marker, zorder=3)
        ax.scatter(hollow[x], hollow[col], facecolors="none", edgecolors=colour, marker=marker, zorder=3)

    def describe(f):
        if f is None:
            return ": too few points to fit"
        if f["note"]:
            return f": {f['note']}"
        expected = f["expected"]   # None (NaN in profile.json) when no order is known
        if expected is None or not np.isfinite(expected):
            return f": slope {f['slope']:.2f} (no expected order known)"
        return f": slope {f['slope']:.2f} (expected {expected:.3g})"

    fixed = rows[rows["strategy"] == "fixed"]
    for i, ((st, cr, de), r) in enumerate(fixed.groupby(["stepper", "crossing", "delivery"], sort=True)):
        draw(ax1, r, "dt_ms", i, f"{st} {cr}/{de}" + describe(fits.get(("fixed", st, cr, de))))
    adaptive = rows[rows["strategy"] != "fixed"]
    for i, ((sg, st), r) in enumerate(adaptive.groupby(["strategy", "stepper"], sort=True)):
        draw(ax2, r, "rtol", i, f"{sg} {st}" + describe(fits.get((sg, st, "dense", "exact"))))
    for ax, xlabel, title in ((ax1, "time step dt (ms)", "Fixed step"),
                              (ax2, "relative tolerance rtol", "Adaptive")):
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.xaxis.set_major_locator(LogLocator(base=10, numticks=6))
        ax.xaxis.set_minor_locator(LogLocator(base=10, subs=(2.0, 5.0), numticks=12))
        ax.set_xlabel(xlabel)
        ax.set_ylabel("RMS jitter in the evaluation window (ms)")
        ax.set_title(title, fontsize="medium")
        if np.isfinite(unc) and unc > 0:
            ax.axhline(REFERENCE_FLOOR_FACTOR * unc, color="0.4", linestyle=":", linewidth=1.0)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize="x-small", loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=1,
                      frameon=False)
    fig.suptitle("Convergence (hollow: below 3x the reference's uncertainty, the dotted line; "
                 "left out of the fits)", fontsize="small")
    return fig


def plot_error_growth(over_times: dict, doc: dict, open_loop: dict | None = None) -> Figure:
    """RMS jitter per window over time for a few settings, closed loop (solid) and open loop
    (dashed, where given), the divergence times after each perturbation marked.

    ``over_times`` and ``open_loop`` map a label to a comparison's ``over_time`` table.
    """
    fig, ax = _new_figure(None, (8.0, 5.6))
    colours = [OKABE_ITO[k] for k in ("blue", "vermillion", "green", "purple", "black", "sky")]
    for i, (label, ot) in enumerate(over_times.items()):
        colour = colours[i % len(colours)]
        ot = pd.DataFrame(ot)
        mid = 0.5 * (ot["start_ms"] + ot["stop_ms"])
        ax.plot(mid, ot["shift_rms_ms"].astype(float), color=colour, marker=MARKERS[i % len(MARKERS)],
                markersize=3, label=f"{label}, closed loop")
        if open_loop and label in open_loop:
            ol = pd.DataFrame(open_loop[label])
            ax.plot(0.5 * (ol["start_ms"] + ol["stop_ms"]), ol["shift_rms_ms"].astype(float), color=colour,
                    linestyle="--", linewidth=1.0, label=f"{label}, open loop")
    ladder = doc["ladder"][0]["probes"]
    greys = {"voltage": ("0.15", ":"), "shift": ("0.35", "--"), "delete": ("0.55", "-.")}
    for kind, p in ladder.items():
        colour, style = greys[kind]
        t = float(np.median(p["times_ms"])) + p["median_horizon_ms"]
        bound = "after the run (> " if p["median_censored"] else ""
        ax.axvline(min(t, doc["scenario"]["duration_ms"]), color=colour, linestyle=style, linewidth=1.4,
                   label=f"divergence time after a {kind} perturbation"
                         + (f" ({bound}{p['median_horizon_ms']:.3g} ms))" if bound else ""))
    ax.set_yscale("log")
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("RMS jitter per window (ms)")
    ax.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(0.0, -0.13), ncol=2, frameon=False)
    ax.set_title("Error growth over time", fontsize="medium")
    return fig


def plot_step_traces(steps: pd.DataFrame, spikes: pd.DataFrame, label: str, n_cells: int = 3) -> Figure:
    """log step size over time for a few recorded cells, their spikes marked."""
    fig, ax = _new_figure(None, (7.5, 4.2))
    acc = steps[steps["accepted"].astype(bool)]
    for i, cell in enumerate(np.unique(acc["cell"])[:n_cells]):
        s = acc[acc["cell"] == cell]
        colour = COMBO_COLOURS[i % 8]
        ax.step(s["time_ms"], s["h_ms"], where="post", color=colour, linewidth=0.8, label=f"cell {cell}")
        t = spikes["time_ms"][spikes["cell"] == cell]
        if len(t):
            ax.plot(t, np.full(len(t), s["h_ms"].max() * 1.6), "|", color=colour, markersize=9)
    ax.set_yscale("log")
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("step size (ms)")
    ax.legend(fontsize="small", title="ticks: spikes", title_fontsize="x-small")
    ax.set_title(f"Step sizes, {label}", fontsize="medium")
    return fig


def plot_steps_vs_rate(samples: dict, max_series: int = 6) -> Figure:
    """Steps per cell per ms against the cell's firing rate for up to ``max_series``
    local-adaptive settings (spread over those given; the title says which share is shown).

    ``samples`` maps a label to a DataFrame with ``rate_hz`` and ``steps_per_ms``.
    """
    fig, ax = _new_figure(None, (7.5, 5.2))
    labels = list(samples)
    keep = [labels[int(round(i))] for i in np.linspace(0, len(labels) - 1, min(max_series, len(labels)))]
    colours = [OKABE_ITO[k] for k in ("blue", "vermillion", "green", "purple", "black", "orange")]
    for i, label in enumerate(dict.fromkeys(keep)):
        df = samples[label]
        ax.scatter(df["rate_hz"], df["steps_per_ms"], color=colours[i % len(colours)],
                   marker=MARKERS[i % len(MARKERS)], label=label)
    ax.set_xlabel("firing rate (Hz)")
    ax.set_ylabel("accepted steps per cell per ms")
    ax.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(0.0, -0.13), ncol=2, frameon=False)
    shown = len(dict.fromkeys(keep))
    ax.set_title("Local adaptive: steps against firing rate"
                 + (f" ({shown} of {len(labels)} settings)" if shown < len(labels) else ""), fontsize="medium")
    return fig
