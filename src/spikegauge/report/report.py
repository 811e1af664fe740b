"""The profile report: ``report.md``, a self-contained ``report.html`` and ``figures/*.png``.

:func:`build_report` reads only what a profile stored (``results.csv``,
``profile.json``, the points' spikes, step traces and comparisons; the raster
differences are recomputed from stored spikes), so it never reruns a
simulation. Every number it prints comes from ``results.csv`` or
``profile.json`` through :func:`fmt`, so the report and the files agree.
The verdict and recommendation come first, then the reference and the
horizons, the tables and the figures.
"""
from __future__ import annotations

import base64
import html
import io
from pathlib import Path

import numpy as np
import pandas as pd

from ..analysis import compare
from ..profile.front import REFERENCE_FLOOR_FACTOR
from ..profile.results import COMPARE_OPTIONS, load_results
from ..runs import atomic_path, load_run
from . import profile_figures as pf
from .raster_plots import plot_raster_difference

DPI = 110


def fmt(x) -> str:
    """How every number appears in the report: 4 significant digits, NaN as 'n/a'."""
    if x is None:
        return "n/a"
    if isinstance(x, (bool, np.bool_)):
        return "yes" if x else "no"
    if isinstance(x, (int, np.integer)):
        return str(int(x))
    x = float(x)
    if not np.isfinite(x):
        return "n/a"
    if x == int(x) and abs(x) < 1e15:
        return str(int(x))
    return f"{x:.4g}"


class _Doc:
    """Blocks rendered both as Markdown and as HTML."""

    def __init__(self):
        self.blocks = []

    def h(self, level, text):
        self.blocks.append(("h", level, text))

    def p(self, text):
        self.blocks.append(("p", text))

    def table(self, header, rows):
        self.blocks.append(("table", header, rows))

    def figure(self, name, caption, png: bytes):
        self.blocks.append(("fig", name, caption, png))

    def markdown(self) -> str:
        out = []
        for b in self.blocks:
            if b[0] == "h":
                out.append("#" * b[1] + " " + b[2])
            elif b[0] == "p":
                out.append(b[1])
            elif b[0] == "table":
                out.append("| " + " | ".join(b[1]) + " |")
                out.append("|" + "---|" * len(b[1]))
                out += ["| " + " | ".join(r) + " |" for r in b[2]]
            else:
                out.append(f"![{b[2]}](figures/{b[1]})\n\n*{b[2]}*")
            out.append("")
        return "\n".join(out)

    def html(self, title) -> str:
        parts = [f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>{html.escape(title)}</title>",
                 "<style>body{font-family:sans-serif;max-width:1100px;margin:2em auto;line-height:1.4}"
                 "table{border-collapse:collapse}td,th{border:1px solid #bbb;padding:3px 8px;text-align:left}"
                 "img{max-width:100%}figcaption{font-style:italic;margin-bottom:1.5em}</style></head><body>"]
        for b in self.blocks:
            if b[0] == "h":
                parts.append(f"<h{b[1]}>{html.escape(b[2])}</h{b[1]}>")
            elif b[0] == "p":
                parts.append(f"<p>{html.escape(b[1])}</p>")
            elif b[0] == "table":
                parts.append("<table><tr>" + "".join(f"<th>{html.escape(c)}</th>" for c in b[1]) + "</tr>")
                parts += ["<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in r) + "</tr>" for r in b[2]]
                parts.append("</table>")
            else:
                data = base64.b64encode(b[3]).decode()
                parts.append(f"<figure><img alt='{html.escape(b[2])}' src='data:image/png;base64,{data}'>"
                             f"<figcaption>{html.escape(b[2])}</figcaption></figure>")
        parts.append("</body></html>")
        return "\n".join(parts)


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    return buf.getvalue()


def _horizon_text(p) -> str:
    bound = "> " if p["median_censored"] else ""
    return f"{bound}{fmt(p['median_horizon_ms'])} ms"


def build_report(profile_dir) -> list[Path]:
    """Write ``report.md``, ``report.html`` and ``figures/*.png`` into the profile folder.

    Returns the paths written.
    """
    d = Path(profile_dir)
    table, doc = load_results(d)
    figdir = d / "figures"
    figdir.mkdir(exist_ok=True)
    seed0 = doc["seeds"][0]
    rows = table[table["seed"] == seed0]
    by_point = table.set_index("point")
    v = doc["verdict"]
    rep = _Doc()
    title = f"Accuracy profile: {doc['scenario']['name']}"
    rep.h(1, title)

    rep.h(2, "Verdict")
    rep.p(f"{v['text']}.")
    rep.p(f"Why: {v['reason']}.")
    tgt = doc["target"]
    rep.p(f"Target: RMS jitter <= {fmt(tgt['jitter_ms'])} ms and missed + extra spikes <= "
          f"{fmt(tgt['mismatch_frac'])} (as a fraction of the reference's), closed loop within the evaluation window and open loop over the whole run.")
    rec = v.get("recommended")
    if rec:
        r = by_point.loc[rec["point"]]
        rep.p(f"Recommended setting: {r['label']} (point {rec['point']}): RMS jitter {fmt(r['target_shift_rms_ms'])} ms, "
              f"(missed + extra) per reference spike {fmt(r['target_mismatch_fraction'])}, "
              f"{fmt(r['cpu_s'])} s of CPU on one thread (spread {fmt(r['cpu_spread'])} over "
              f"{fmt(r['cpu_repeats'])} runs), work {fmt(r['work'])}.")
    advice_path = d / "advice.json"
    if advice_path.is_file():
        import json

        a = json.loads(advice_path.read_text())
        p = a["predicted"]
        if "cpu_s" in p:
            from ..profile.advice import format_bytes, format_duration

            rep.p(f"Production advice (advice.json): {a['label']} for {fmt(p['n_cells'])} cells over "
                  f"{format_duration(a['run']['duration_s'])}: predicted {fmt(p['steps'])} cell-steps, CPU "
                  f"{format_duration(p['cpu_s'])} on one thread, memory {format_bytes(p['memory_bytes'])}."
                  + (f" Warning: {a['memory_warning']}." if a.get("memory_warning") else ""))
    if v["seeds"] > 1:
        rep.p(f"The verdict held for {v['seeds_held']} of {v['seeds']} seeds.")

    rep.h(2, "Reference, perturbations and divergence time")
    rep.p("Networks amplify small differences. The reference is rerun under three small "
          "perturbations (an initial voltage moved by 1e-6 mV; one spike shifted by the jitter target; "
          "one spike deleted), each on a few cells; the divergence time is how long the perturbed run "
          "stays spike-for-spike with the reference. Per-spike targets are judged closed loop only up "
          "to it (the evaluation window); past it two runs are different realisations of the same "
          "activity, which the open-loop figures below still judge.")
    for ref, lad in zip(doc["references"], doc["ladder"]):
        u = ref["uncertainty"]
        rep.p(f"Seed {ref['seed']}: reference {u['kind']}; uncertainty: RMS {fmt(u['shift_rms_ms'])} ms, "
              f"largest {fmt(u['shift_max_abs_ms'])} ms, mismatch {fmt(u['mismatch_fraction'])}; "
              f"adequate: {fmt(u['adequate'])}. {u['message']}.")
        rep.table(["perturbation", "size", "median divergence time", "median time to first error",
                   "cells that lost agreement"],
                  [[k, fmt(p["size"]), _horizon_text(p), f"{fmt(p['median_first_error_ms'])} ms",
                    f"{p['diverged']} of {len(p['cells'])}"] for k, p in lad["probes"].items()])
        rep.p(f"Evaluation window: closed-loop per-spike targets are judged over the first "
              f"{fmt(lad['judged_window_ms'])} ms.")

    rep.h(2, "Cheapest setting of each strategy that meets the target")
    header = ["strategy", "setting", "point", "CPU (s)", "work", "µs per cell-step", "RMS jitter (ms)",
              "(missed + extra) per reference spike", "steps per cell per ms"]
    trows = []
    for strategy, c in v["cheapest"].items():
        r = by_point.loc[c["point"]]
        trows.append([strategy, r["label"], str(c["point"]), fmt(r["cpu_s"]), fmt(r["work"]),
                      fmt(1e6 * r["cpu_s"] / r["steps"]), fmt(r["target_shift_rms_ms"]),
                      fmt(r["target_mismatch_fraction"]), fmt(r["steps_per_cell_ms"])])
    rep.table(header, trows)
    rep.p("CPU: seconds of one thread for the whole run, compilation excluded, the least of up to "
          "five repeats. Work: right-hand-side evaluations, Newton iterations and Jacobian evaluations; it leaves out what "
          "a step costs besides them (error control, dense output, crossing search, event handling), "
          "which is why the verdict ranks by CPU seconds.")

    rep.h(2, "Open loop over the whole run")
    rep.p("Past the divergence time two runs of a chaotic network are different realisations of the "
          "same activity, so closed-loop spike-for-spike error says nothing there. Each setting was "
          "therefore also run open loop: the reference's raster drives every synapse instead of the "
          "network's own spikes, so its spike-time error is the integration error of the setting over "
          "the whole run. It is a lower bound on the closed-loop error (it leaves out what a cell "
          "inherits from its inputs); the target is judged both ways.")
    if rec:
        r = by_point.loc[rec["point"]]
        rep.p(f"Recommended setting open loop: RMS jitter {fmt(r.get('open_loop_shift_rms_ms'))} ms, "
              f"(missed + extra) per reference spike {fmt(r.get('open_loop_mismatch_fraction'))}.")
    ol = doc.get("open_loop") or {}
    if ol.get("fits"):
        rep.table(["family", "slope (open loop)", "spikes matched at every setting", "expected", "source"],
                  [[f"{f['strategy']} {f['stepper']} {f['crossing']}" + (
                      f"/{f['delivery']}" if isinstance(f["delivery"], str) else ""),
                    f"{fmt(f['slope'])} ± {fmt(f['stderr'])} ({f['n']} points)", fmt(f["spikes"]),
                    *_expected_order(f)] for f in ol["fits"]])
    amplifying = [m for m in ol.get("mismatching", []) if m["cells"]]
    if amplifying:
        rep.p("Cells that mismatch open loop even at a family's finest setting (their own dynamics "
              "amplify tiny differences: near-threshold grazes, bistable ranges): " + "; ".join(
                  f"{m['label']}: {len(m['cells'])} of {m['n_cells']}" for m in amplifying) + ".")
    else:
        rep.p("No cell mismatches open loop at the finest setting of any family.")

    yard = doc.get("yardstick")
    if yard:
        rep.h(2, "Statistical fidelity")
        rep.p(f"Past the divergence time a setting can still be asked whether it changed the activity's "
              f"statistics. The yardstick is their spread over {yard['k']} runs of the reference with "
              f"every initial voltage moved a little; a setting passes when each statistic of its run lies "
              f"within the prediction interval of those runs (ISI distributions: Kolmogorov–Smirnov "
              f"distance against the reference runs' own pairs), Holm-corrected at "
              f"{fmt(100 * yard['family_alpha'])} % family-wise.")
        vs = doc.get("verdict_statistics")
        if vs:
            rep.p(f"Statistical verdict: {vs['text']}.")
        rep.table(["statistic", "reference mean", "spread (sd)"],
                  [[n, fmt(v["mean"]), fmt(v["sd"])] for n, v in yard["statistics"].items()])
        if "statistics_pass" in rows:
            ran = rows[rows["status"] == "ok"]
            failed = ran[~ran["statistics_pass"].astype(bool)]
            rep.p(f"{int(ran['statistics_pass'].astype(bool).sum())} of {len(ran)} settings that ran to the "
                  f"end pass." + (" Failing: " + "; ".join(
                      f"{r['label']} ({r['statistics_failed']})" for _, r in failed.iterrows()) + "."
                      if len(failed) else ""))

    rep.h(2, "How the sweep ran")
    rep.p(_sweep_story(rows, doc))
    unusual = rows[(rows["origin"] != "sweep") | rows["status"].isin(["stopped", "skipped"])] \
        if "origin" in rows else rows.iloc[0:0]
    if len(unusual):
        rep.table(["setting", "added", "round", "status", "work", "work limit", "note"],
                  [[r["label"], "" if r["origin"] == "sweep" else f"{r['origin']} edge",
                    fmt(r["round"]) if r["round"] >= 0 else "",
                    r["status"], fmt(r["work"] if r["status"] != "skipped" else r["predicted_work"]),
                    fmt(r["work_limit"]), r["message"] if isinstance(r["message"], str) else ""]
                   for _, r in unusual.iterrows()])

    rep.h(2, "Measured orders")
    rep.table(["strategy", "stepper", "crossing/delivery", "measured slope", "expected", "source"],
              [[f["strategy"], f["stepper"], f"{f['crossing']}/{f['delivery']}", _fit_text(f),
                f["note"] or fmt(f["expected"]), f["source"]] for f in doc["fits"]])
    unc = doc["references"][0]["uncertainty"]["shift_rms_ms"]
    rep.p(f"Fixed step: slope of log RMS jitter on log dt; adaptive: on log rtol. Only points "
          f"whose spikes all match the reference enter a fit, and only those whose error is at least "
          f"{fmt(REFERENCE_FLOOR_FACTOR)} times the reference's own uncertainty ({fmt(unc)} ms): below "
          f"that they measure the reference, not the setting (drawn hollow in the convergence figure).")

    rep.h(2, "Figures")
    figures = [("front.png", "Work–precision diagram: CPU seconds against RMS jitter (evaluation window)",
                pf.plot_front(table, doc, "jitter", "cpu")),
               ("front_work.png", "Work–precision diagram: work against RMS jitter (evaluation window)",
                pf.plot_front(table, doc, "jitter", "work")),
               ("front_open_loop.png", "Work–precision diagram, open loop: CPU seconds against RMS "
                "jitter over the whole run", pf.plot_front(table, doc, "open-loop", "cpu")),
               ("front_mismatch.png", "Work–precision diagram: CPU seconds against (missed + extra) "
                "per reference spike", pf.plot_front(table, doc, "mismatch", "cpu")),
               ("convergence.png", "Convergence: error against dt and against rtol, fitted slopes",
                pf.plot_convergence(table, doc))]
    ref_run = load_run(d / "points" / doc["references"][0]["digests"][-1])
    ok = rows[rows["status"] == "ok"]
    shown = {}
    if rec:
        shown["recommended"] = rec["point"]
    best_fixed = v["cheapest"].get("fixed")
    if best_fixed is not None and best_fixed["point"] != shown.get("recommended"):
        shown["best fixed step"] = best_fixed["point"]
    for name, point in shown.items():
        r = by_point.loc[point]
        c = compare(ref_run, load_run(d / "points" / r["digest"]), t_stop_ms=ref_run.t_stop_ms,
                    **COMPARE_OPTIONS)
        fig = plot_raster_difference(c)
        fig.axes[0].set_title(f"Raster difference, {name}: {r['label']}")
        figures.append((f"raster_{name.replace(' ', '_')}.png",
                        f"Raster difference against the reference, {name} ({r['label']})", fig))
    growth, growth_open = {}, {}
    picks = list(shown.values()) + [c["point"] for c in v["cheapest"].values()]
    for point in dict.fromkeys(picks):
        r = by_point.loc[point]
        comp = _stored_comparison(d, r["digest"])
        if comp is not None:
            growth[r["label"]] = comp["over_time"]
        twin = r.get("open_loop_digest")
        comp = _stored_comparison(d, twin) if isinstance(twin, str) else None
        if comp is not None:
            growth_open[r["label"]] = comp["over_time"]
    if growth:
        figures.append(("error_growth.png", "Error growth over time, closed loop (solid) and open loop "
                        "(dashed), with the divergence times", pf.plot_error_growth(growth, doc, growth_open)))
    for strategy in ("local-adaptive", "global-adaptive"):
        point = v["cheapest"].get(strategy, {}).get("point")
        if point is None:
            cand = ok[ok["strategy"] == strategy]
            point = int(cand.iloc[0]["point"]) if len(cand) else None
        if point is None:
            continue
        r = by_point.loc[point]
        run = load_run(d / "points" / r["digest"])
        if run.step_trace is not None and len(run.step_trace):
            figures.append((f"steps_{strategy}.png", f"Step sizes of a few cells, {r['label']}",
                            pf.plot_step_traces(run.step_trace, run.spikes, r["label"])))
    samples = {}
    for _, r in ok[ok["strategy"] == "local-adaptive"].iterrows():
        run = load_run(d / "points" / r["digest"])
        if run.step_trace is None or not len(run.step_trace):
            continue
        st = run.step_trace[run.step_trace["accepted"].astype(bool)]
        counts = st.groupby("cell").size()
        span = run.t_stop_ms - run.t_start_ms
        fired = run.spikes["cell"].value_counts().reindex(counts.index, fill_value=0)
        samples[r["label"]] = pd.DataFrame({"rate_hz": fired.to_numpy() * 1000.0 / span,
                                            "steps_per_ms": counts.to_numpy() / span})
    if samples:
        figures.append(("steps_vs_rate.png", "Local adaptive: steps per cell against firing rate",
                        pf.plot_steps_vs_rate(samples)))
    written = []
    for name, caption, fig in figures:
        png = _png(fig)
        path = figdir / name
        with atomic_path(path) as tmp:
            Path(tmp).write_bytes(png)
        written.append(path)
        rep.figure(name, caption, png)
    for name, text in (("report.md", rep.markdown()), ("report.html", rep.html(title))):
        with atomic_path(d / name) as tmp:
            Path(tmp).write_text(text, encoding="utf-8")
        written.append(d / name)
    return written


def _sweep_story(rows: pd.DataFrame, doc: dict) -> str:
    """One paragraph: rounds, edges extended, runs stopped or skipped, the pilots."""
    if "origin" not in rows:
        return "The sweep ran every setting."
    counts = rows["status"].value_counts()
    n_rounds = int(rows["round"].max()) + 1 if rows["round"].max() >= 0 else 0
    added = rows["origin"].value_counts()
    text = (f"The sweep ran in {n_rounds} rounds, each family of settings from its cheapest setting to "
            f"its dearest. {added.get('coarser', 0)} settings were added at the coarse edge (the coarsest "
            f"setting of a family met the target) and {added.get('finer', 0)} at the fine edge (its "
            f"strategy met no target). {counts.get('stopped', 0)} runs were stopped at the work limit "
            f"({fmt(doc.get('work_limit_factor', float('nan')))} times the least work of a point of an "
            f"earlier round that met the target, among comparable strategies) and "
            f"{counts.get('skipped', 0)} settings were skipped without running.")
    for p in doc.get("pilots", []):
        text += (f" A {fmt(p['t_stop_ms'])} ms pilot of {p['label']} predicted "
                 f"{fmt(p['predicted_work'])} work units for the whole run.")
    return text


def _expected_order(f: dict) -> list:
    """Expected spike-time order of an open-loop fit and its source."""
    from ..profile.front import FIXED_ORDER_SOURCES, VARIABLE_ORDER_SOURCES

    if f["strategy"] != "fixed":
        if f["stepper"] in VARIABLE_ORDER_SOURCES:
            return ["tolerance proportionality", VARIABLE_ORDER_SOURCES[f["stepper"]][1]]
        return ["tolerance proportionality", "Higham 1991"]
    if f["crossing"] == "step" or f["delivery"] == "grid":
        return ["1", "Hansel et al. 1998 (times quantised to the grid)"]
    order, source = FIXED_ORDER_SOURCES.get((f["stepper"], f["crossing"]), (float("nan"), "none known"))
    return [fmt(order), source]


def _fit_text(f: dict) -> str:
    text = f"{fmt(f['slope'])} ± {fmt(f['stderr'])} ({f['n']} points"
    if f.get("excluded"):
        text += f"; {f['excluded']} below the reference's uncertainty left out"
    return text + ")"


def _stored_comparison(d: Path, digest: str):
    import json

    p = d / "points" / digest / "comparison.json"
    if not p.is_file():
        return None
    doc = json.loads(p.read_text())
    return (doc.get("comparison") or None)
