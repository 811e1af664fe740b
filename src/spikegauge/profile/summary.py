"""Plain-text summary of a profile document (what ``spikegauge profile`` prints)."""
from __future__ import annotations


def _horizon(p: dict) -> str:
    if p["median_censored"]:
        return f"> {p['median_horizon_ms']:.4g} ms (agreement never lost in most perturbed runs)"
    return f"{p['median_horizon_ms']:.4g} ms"


def profile_text(doc: dict) -> str:
    """Verdict first, then the reference, the ladder and the point count."""
    lines = []
    v = doc.get("verdict")
    if v:
        lines.append(f"Verdict: {v['text']}.")
        lines.append(f"  Why: {v['reason']}.")
        secs = [f"{s} {c['label']} {c['cpu_s']:.3g} s" for s, c in v["cheapest"].items()
                if c.get("cpu_s") is not None]
        if secs:
            lines.append(f"  CPU seconds on one thread, cheapest setting of each strategy meeting the target: "
                         f"{'; '.join(secs)}.")
        rec = v.get("recommended")
        if rec is not None:
            row = next((p for p in doc.get("points", []) if p["point"] == rec["point"]), None)
            ol = rec.get("open_loop_shift_rms_ms")
            if row is not None and ol is not None:
                lines.append(f"  Open loop over the whole run (reference raster as input): RMS jitter "
                             f"{ol:.3g} ms, (missed + extra) per reference spike "
                             f"{rec.get('open_loop_mismatch_fraction', float('nan')):.3g}.")
    vs = doc.get("verdict_statistics")
    if vs:
        lines.append(f"Statistical verdict: {vs['text']}.")
    sc = doc["scenario"]
    sw = doc["sweep"]
    n_seeds = len(doc["seeds"])
    lines.append(f"Scenario {sc['name']}: {sc['n_cells']} cells, {sc['duration_ms']:g} ms; "
                 f"{sw['n_settings']} settings ({sw['n_runs']} runs with the reference and perturbation "
                 f"runs; {sw['source']} sweep, {n_seeds} seed{'s' if n_seeds != 1 else ''}).")
    for ref, lad in zip(doc["references"], doc["ladder"]):
        u = ref["uncertainty"]
        lines.append(f"Reference (seed {ref['seed']}, {u['kind']}): {u['message']}.")
        for kind, p in lad["probes"].items():
            lines.append(f"  divergence time after a {kind} perturbation: {_horizon(p)} "
                         f"(median of {len(p['cells'])} cells)")
        lines.append(f"  evaluation window: closed-loop per-spike targets judged over the first "
                     f"{lad['judged_window_ms']:.4g} ms; open loop over the whole run")
    t = doc.get("timing")
    if t:
        lines.append(f"{t['points_computed']} runs computed in {t['wall_s']:.1f} s ({t['executor']}).")
    for r in doc.get("reruns", [])[-1:]:
        lines.append(f"This rerun: {r['points_computed']} runs computed in {r['wall_s']:.1f} s; the others "
                     f"were stored.")
    return "\n".join(lines)
