"""Figures of a raster comparison (matplotlib, Agg backend).

Colours come from the Okabe–Ito palette, which stays distinguishable under the
common colour-vision deficiencies; every category also has its own marker, so
the figures read in grey-scale print too. Each function takes a
:class:`~spikegauge.analysis.comparison.Comparison` (or a ComparisonSet for the
front) and returns a Figure drawn by the Agg canvas; :func:`write_figures`
saves them as PNG. Figures are made without pyplot, so nothing here changes
the caller's backend or keeps figures alive in a global registry.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure

# Okabe & Ito (2008), "Color Universal Design".
OKABE_ITO = {"black": "#000000", "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73",
             "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7"}
SHIFT_CMAP = "PuOr_r"
"""Diverging map for signed shifts (purple early, orange late); readable with colour-vision deficiencies."""


def _new_figure(ax, size=(7.0, 4.0)):
    if ax is not None:
        return ax.figure, ax
    fig = Figure(figsize=size, layout="constrained")
    FigureCanvasAgg(fig)
    return fig, fig.add_subplot()


@dataclass(frozen=True)
class RasterView:
    """The part of a comparison the raster-difference figure shows.

    Attributes
    ----------
    cells : ndarray of int64, shape (n_shown,)
        Cell ids, one row each, bottom to top.
    t_start_ms, t_stop_ms : float
        Time window shown (ms).
    description : str
        Which subset this is, in words (the figure's title says it, and
        ``spikegauge compare`` prints it).
    """

    cells: np.ndarray
    t_start_ms: float
    t_stop_ms: float
    description: str


def raster_difference_view(comparison, *, t_start_ms: float | None = None, t_stop_ms: float | None = None,
                           cells=None, max_cells: int = 50, max_window_ms: float = 500.0) -> RasterView:
    """Which cells and time window :func:`plot_raster_difference` shows, and a sentence saying so.

    Defaults: the first ``max_window_ms`` of the compared interval and the
    first ``max_cells`` cells that fire in either raster (a figure of more
    rows or a longer window no longer shows single spikes).
    """
    ref, test = comparison.reference, comparison.test
    t0 = ref.t_start_ms if t_start_ms is None else float(t_start_ms)
    t1 = min(ref.t_stop_ms, t0 + max_window_ms) if t_stop_ms is None else float(t_stop_ms)
    if cells is None:
        active = np.flatnonzero((ref.counts() + test.counts()) > 0)
        cells = active[:max_cells]
        if cells.size == active.size:
            which = f"all {active.size} firing cells of {ref.n_cells}"
        else:
            which = f"the first {cells.size} of {active.size} firing cells (ids {cells[0]}-{cells[-1]})"
    else:
        cells = np.asarray(cells, dtype=np.int64)
        which = f"{cells.size} chosen cells of {ref.n_cells}"
    if t0 <= ref.t_start_ms and t1 >= ref.t_stop_ms:
        when = f"{ref.t_start_ms:g}-{ref.t_stop_ms:g} ms (the whole interval)"
    else:
        when = f"{t0:g}-{t1:g} ms of {ref.t_start_ms:g}-{ref.t_stop_ms:g} ms"
    return RasterView(cells=np.asarray(cells, dtype=np.int64), t_start_ms=t0, t_stop_ms=t1,
                      description=f"{which}, {when}")


def plot_raster_difference(comparison, *, t_start_ms: float | None = None,
                           t_stop_ms: float | None = None, cells=None, max_cells: int = 50,
                           ax=None) -> Figure:
    """Reference and test spikes of a window and a cell subset on one time axis.

    Matched reference spikes are grey ticks; each matched test spike is a dot
    on the same row coloured by its signed shift (test - reference) on a
    diverging scale, so drift shows as a colour trend. Missed reference spikes
    are vermillion crosses, extra test spikes blue triangles. The title says
    which cells and which window are shown (:func:`raster_difference_view`).

    Parameters
    ----------
    comparison : Comparison
    t_start_ms, t_stop_ms : float, optional
        Time window (ms); default the first 500 ms of the interval.
    cells : array_like of int, optional
        Cells to show; default the first ``max_cells`` cells that fire.
    max_cells : int
        Used when ``cells`` is not given.
    ax : matplotlib Axes, optional
    """
    ref, test, m = comparison.reference, comparison.test, comparison.matching
    view = raster_difference_view(comparison, t_start_ms=t_start_ms, t_stop_ms=t_stop_ms, cells=cells,
                                  max_cells=max_cells)
    cells, t0, t1 = view.cells, view.t_start_ms, view.t_stop_ms
    row = np.full(ref.n_cells, -1)
    row[cells] = np.arange(cells.size)
    fig, ax = _new_figure(ax, (8.0, max(3.0, 0.12 * cells.size + 1.5)))

    def shown(r, keep):
        return keep & (row[r.cell] >= 0) & (r.time_ms >= t0) & (r.time_ms < t1)

    matched_ref = shown(ref, m.ref_partner >= 0)
    ax.scatter(ref.time_ms[matched_ref], row[ref.cell[matched_ref]], marker="|", s=60,
               color="0.55", linewidths=1.0, label="reference, matched", zorder=2)
    matched_test = shown(test, m.test_partner >= 0)
    shift = test.time_ms[matched_test] - ref.time_ms[m.test_partner[matched_test]]
    # Colour range: the 99th percentile of |shift|, so one outlier does not wash out the drift.
    p99 = comparison.summary.get("shift_p99_abs_ms", float("nan"))
    limit = p99 if p99 > 0 else 1e-12
    sc = ax.scatter(test.time_ms[matched_test], row[test.cell[matched_test]], c=shift, s=14,
                    cmap=SHIFT_CMAP, norm=TwoSlopeNorm(0.0, -limit, limit), edgecolors="0.2",
                    linewidths=0.3, label="test, matched", zorder=3)
    missed = shown(ref, m.ref_partner < 0)
    ax.scatter(ref.time_ms[missed], row[ref.cell[missed]], marker="x", s=36,
               color=OKABE_ITO["vermillion"], linewidths=1.5, label="missed (reference only)", zorder=4)
    extra = shown(test, m.test_partner < 0)
    ax.scatter(test.time_ms[extra], row[test.cell[extra]], marker="^", s=30,
               color=OKABE_ITO["blue"], label="extra (test only)", zorder=4)
    fig.colorbar(sc, ax=ax, label="shift, test − reference (ms)", pad=0.01, extend="both")
    ax.set_xlim(t0, t1)
    ax.set_ylim(-1, max(cells.size, 1))
    step = max(1, cells.size // 10)
    ax.set_yticks(np.arange(0, cells.size, step), [str(c) for c in cells[::step]])
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("cell")
    ax.set_title(f"Raster difference: {view.description}", fontsize="medium")
    ax.legend(loc="upper left", bbox_to_anchor=(0.0, -0.14), ncol=4, fontsize="small", frameon=False)
    return fig


def plot_jitter_histogram(comparison, *, bins: int = 81, ax=None) -> Figure:
    """Histogram of signed shifts (test - reference) of matched pairs, log count."""
    fig, ax = _new_figure(ax)
    shift = comparison.pairs["shift_ms"].to_numpy()
    w = comparison.settings.get("match_window_ms", float(np.max(np.abs(shift), initial=1.0)))
    edges = np.linspace(-w, w, bins + 1) if w > 0 else bins
    ax.hist(shift, bins=edges, color=OKABE_ITO["blue"], edgecolor="white", linewidth=0.3)
    if shift.size:
        ax.set_yscale("log")
    else:
        ax.text(0.5, 0.5, "no matched pairs", transform=ax.transAxes, ha="center")
    ax.axvline(0.0, color="0.3", linewidth=0.8)
    s = comparison.summary
    ax.set_title(f"Jitter of {s['matched']} matched spikes: bias {s['shift_mean_ms']:.3g} ms, "
                 f"RMS {s['shift_rms_ms']:.3g} ms", fontsize="medium")
    ax.set_xlabel("shift, test − reference (ms)")
    ax.set_ylabel("pairs (log scale)")
    return fig


def plot_jitter_vs_rate(comparison, *, ax=None) -> Figure:
    """RMS jitter of each cell against its reference firing rate."""
    fig, ax = _new_figure(ax)
    pc = comparison.per_cell
    ok = pc["matched"].to_numpy() > 0
    groups = pc["group"].to_numpy()
    colours = list(OKABE_ITO.values())[1:]
    markers = "os^Dv<>p"
    for k, name in enumerate(dict.fromkeys(groups)):
        sel = ok & (groups == name)
        ax.scatter(pc["rate_ref_hz"].to_numpy()[sel], pc["shift_rms_ms"].to_numpy()[sel], s=12,
                   color=colours[k % len(colours)], marker=markers[k % len(markers)],
                   alpha=0.8, label=str(name))
    if len(set(groups)) > 1:
        ax.legend(title="group", fontsize="small")
    ax.set_xlabel("reference rate (Hz)")
    ax.set_ylabel("RMS jitter (ms)")
    ax.set_title("Per-cell jitter against rate", fontsize="medium")
    return fig


def plot_error_over_time(comparison, *, ax=None) -> Figure:
    """Chance-corrected agreement and RMS jitter over time, horizon marked."""
    fig, ax = _new_figure(ax)
    ot = comparison.over_time
    mid = 0.5 * (ot["start_ms"] + ot["stop_ms"])
    ax.plot(mid, ot["corrected"], color=OKABE_ITO["blue"], marker="o", markersize=2.5,
            label="agreement (chance-corrected)")
    threshold = comparison.settings.get("min_agreement", 0.5)
    ax.axhline(threshold, color=OKABE_ITO["blue"], linestyle=":", linewidth=0.8,
               label=f"agreement lost below {threshold:g}")
    # Unrelated rasters score a little below 0 (see agreement_over_time): keep them in view.
    low = np.nanmin(ot["corrected"].to_numpy(), initial=0.0)
    ax.set_ylim(min(-0.1, low - 0.05), 1.05)
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("agreement", color=OKABE_ITO["blue"])
    ax2 = ax.twinx()
    ax2.plot(mid, ot["shift_rms_ms"], color=OKABE_ITO["orange"], marker="s", markersize=2.5,
             linestyle="--", label="RMS jitter")
    ax2.set_ylabel("RMS jitter (ms)", color=OKABE_ITO["orange"])
    ax2.set_ylim(bottom=0.0)
    s = comparison.summary
    horizon = s["t_start_ms"] + s["horizon_ms"]
    label = f"horizon {s['horizon_ms']:.4g} ms" + ("" if s["diverged"] else " (never diverged)")
    ax.axvline(horizon, color=OKABE_ITO["vermillion"], linewidth=1.5, label=label)
    lines = ax.get_legend_handles_labels()
    lines2 = ax2.get_legend_handles_labels()
    ax.legend(lines[0] + lines2[0], lines[1] + lines2[1], loc="upper left", bbox_to_anchor=(0.0, -0.14),
              ncol=2, fontsize="small", frameon=False)
    ax.set_title("Agreement over time", fontsize="medium")
    return fig


def plot_front(comparison_set, *, ax=None) -> Figure:
    """Cost against error of every test, the cost-accuracy front joined by a line."""
    fig, ax = _new_figure(ax)
    table = comparison_set.table
    key = comparison_set.accuracy_key
    if "cost" not in table.columns:
        raise ValueError("the comparison set has no costs: pass costs to compare_many")
    off = ~table["on_front"].to_numpy()
    ax.scatter(table["cost"][off], table[key][off], color=OKABE_ITO["sky"], marker="o",
               label="dominated")
    front = comparison_set.front
    ax.plot(front["cost"], front[key], color=OKABE_ITO["vermillion"], marker="D", drawstyle="steps-post",
            label="front")
    for name, row in table.iterrows():
        ax.annotate(str(name), (row["cost"], row[key]), textcoords="offset points",
                    xytext=(4, 4), fontsize="small")
    ax.set_xlabel("cost (as given)")
    ax.set_ylabel(key.replace("_", " "))
    ax.legend(fontsize="small")
    ax.set_title("Cost against accuracy", fontsize="medium")
    return fig


def write_figures(comparison, out_dir, prefix: str = "", dpi: int = 120) -> list[Path]:
    """Write the four figures of one comparison as PNG files into ``out_dir``.

    Returns the paths written: ``{prefix}raster_difference.png``,
    ``{prefix}jitter_histogram.png``, ``{prefix}jitter_vs_rate.png``,
    ``{prefix}error_over_time.png``.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = []
    for name, fn in (("raster_difference", plot_raster_difference),
                     ("jitter_histogram", plot_jitter_histogram),
                     ("jitter_vs_rate", plot_jitter_vs_rate),
                     ("error_over_time", plot_error_over_time)):
        path = out_dir / f"{prefix}{name}.png"
        fn(comparison).savefig(path, dpi=dpi)
        paths.append(path)
    return paths


def write_front(comparison_set, out_dir, dpi: int = 120) -> Path:
    """Write the cost-accuracy front as ``front.png`` into ``out_dir``."""
    path = Path(out_dir) / "front.png"
    path.parent.mkdir(parents=True, exist_ok=True)
    plot_front(comparison_set).savefig(path, dpi=dpi)
    return path
