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

from ..profile.front import COST_MEASURES, ERROR_MEASURES
from .raster_plots import OKABE_ITO, _new_figure

STYLE = {"fixed": (OKABE_ITO["orange"], "s"), "global-adaptive": (OKABE_ITO["blue"], "^"),
         "local-adaptive": (OKABE_ITO["green"], "o")}
"""Colour and marker of each strategy."""
COMBO_COLOURS = [OKABE_ITO[k] for k in ("orange", "sky", "green", "vermillion", "purple", "blue", "black",
                                        "yellow")]
MARKERS = "sovD^<>P*X"


def plot_front(table: pd.DataFrame, doc: dict, error: str = "jitter", cost: str = "work") -> Figure:
    """Cost against error of every ok point; each strategy's front as a line; target region shaded."""
    fig, ax = _new_figure(None, (7.0, 4.8))
    ecol, ccol = ERROR_MEASURES[error], COST_MEASURES[cost]
    seed0 = doc["seeds"][0]
    rows = table[(table["seed"] == seed0) & (table["status"] == "ok")]
    fronts = doc["fronts"][cost][error]
    floor = _floor(rows[ecol])
    for strategy, (colour, marker) in STYLE.items():
        r = rows[rows["strategy"] == strategy]
        if not len(r):
            continue
        y = np.maximum(r[ecol].to_numpy(float), floor)
        ax.scatter(r[ccol], y, color=colour, marker=marker, alpha=0.55, label=strategy)
        f = rows.set_index("point").loc[fronts.get(strategy, [])]
        ax.plot(f[ccol], np.maximum(f[ecol].to_numpy(float), floor), color=colour, marker=marker,
                linewidth=1.8, drawstyle="steps-post")
    if error in ("jitter", "mismatch"):
        limit = doc["target"]["jitter_ms" if error == "jitter" else "mismatch_frac"]
        ax.axhspan(floor, limit, color="0.85", zorder=0, label="meets the target")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel({"work": "work (rhs evaluations + Newton iterations)", "wall": "wall time (s)"}[cost])
    ax.set_ylabel({"jitter": "RMS jitter in the judged window (ms)",
                   "mismatch": "missed + extra fraction in the judged window",
                   "van-rossum": "van Rossum distance (mean over cells)",
                   "rate": "RMS rate error (Hz)"}[error])
    ax.legend(fontsize="small")
    ax.set_title("Cost-accuracy front (points drawn at the floor had zero error)", fontsize="medium")
    return fig


def _floor(values) -> float:
    v = np.asarray(values, float)
    pos = v[np.isfinite(v) & (v > 0)]
    return float(pos.min() / 10) if pos.size else 1e-12


def plot_convergence(table: pd.DataFrame, doc: dict) -> Figure:
    """Error against dt (fixed) and against rtol (adaptive), fitted slopes in the legend."""
    fig = Figure(figsize=(11.0, 4.5), layout="constrained")
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    ax1, ax2 = fig.subplots(1, 2)
    rows = table[(table["seed"] == doc["seeds"][0]) & (table["status"] == "ok")]
    fits = {(f["strategy"], f["stepper"], f["crossing"], f["delivery"]): f for f in doc["fits"]}
    col = "target_shift_rms_ms"
    fixed = rows[rows["strategy"] == "fixed"]
    for i, ((st, cr, de), r) in enumerate(fixed.groupby(["stepper", "crossing", "delivery"], sort=True)):
        f = fits.get(("fixed", st, cr, de))
        label = f"{st} {cr}/{de}" + (f": slope {f['slope']:.2f} (expected {f['expected']:g})" if f else "")
        ax1.plot(r["dt_ms"], r[col], color=COMBO_COLOURS[i % 8], marker=MARKERS[i % 10], label=label)
    ax1.set_xscale("log")
    ax1.set_yscale("log")
    ax1.set_xlabel("time step dt (ms)")
    ax1.set_ylabel("RMS jitter (ms)")
    ax1.set_title("Fixed step", fontsize="medium")
    if ax1.get_legend_handles_labels()[0]:
        ax1.legend(fontsize="x-small")
    adaptive = rows[rows["strategy"] != "fixed"]
    for i, ((sg, st), r) in enumerate(adaptive.groupby(["strategy", "stepper"], sort=True)):
        f = fits.get((sg, st, "dense", "exact"))
        label = f"{sg} {st}" + (f": slope {f['slope']:.2f} (expected {f['expected']:g})" if f else "")
        ax2.plot(r["rtol"], r[col], color=COMBO_COLOURS[i % 8], marker=MARKERS[i % 10], label=label)
    ax2.set_xscale("log")
    ax2.set_yscale("log")
    ax2.set_xlabel("relative tolerance rtol")
    ax2.set_title("Adaptive", fontsize="medium")
    if ax2.get_legend_handles_labels()[0]:
        ax2.legend(fontsize="x-small")
    return fig


def plot_error_growth(over_times: dict, doc: dict) -> Figure:
    """RMS jitter per window over time for a few settings, sensitivity horizons marked.

    ``over_times`` maps a label to a comparison's ``over_time`` table (dict of lists).
    """
    fig, ax = _new_figure(None, (7.5, 4.2))
    for i, (label, ot) in enumerate(over_times.items()):
        ot = pd.DataFrame(ot)
        mid = 0.5 * (ot["start_ms"] + ot["stop_ms"])
        ax.plot(mid, ot["shift_rms_ms"].astype(float), color=COMBO_COLOURS[i % 8], marker=MARKERS[i % 10],
                markersize=3, label=label)
    ladder = doc["ladder"][0]["probes"]
    styles = {"voltage": ":", "shift": "--", "delete": "-."}
    for kind, p in ladder.items():
        if p["median_censored"]:
            continue
        t = float(np.median(p["times_ms"])) + p["median_horizon_ms"]
        ax.axvline(t, color="0.3", linestyle=styles[kind], label=f"horizon after {kind} probe")
    ax.axvline(doc["ladder"][0]["judged_window_ms"], color=OKABE_ITO["vermillion"], linewidth=1.2,
               label="end of judged window")
    ax.set_yscale("log")
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("RMS jitter per window (ms)")
    ax.legend(fontsize="x-small")
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


def plot_steps_vs_rate(samples: dict) -> Figure:
    """Steps per cell and ms against the cell's firing rate, one series per local-adaptive setting.

    ``samples`` maps a label to a DataFrame with ``rate_hz`` and ``steps_per_ms``.
    """
    fig, ax = _new_figure(None, (6.5, 4.2))
    for i, (label, df) in enumerate(samples.items()):
        ax.scatter(df["rate_hz"], df["steps_per_ms"], color=COMBO_COLOURS[i % 8], marker=MARKERS[i % 10],
                   label=label)
    ax.set_xlabel("firing rate (Hz)")
    ax.set_ylabel("accepted steps per cell and ms")
    ax.legend(fontsize="x-small")
    ax.set_title("Local adaptive: steps against firing rate", fontsize="medium")
    return fig
