"""The verdict: is adaptive stepping worth it here, and which setting meets the target.

Settings are ranked by what a user pays: the CPU seconds of a run on one
thread (``cpu_s``, :mod:`.cost`). Work (right-hand-side evaluations,
Newton / linear-solve iterations and Jacobian evaluations) is shown beside it; where the two rank
differently the reason says so, with the seconds per cell-step of each
strategy (the per-step cost of error control, dense output, root finding and
event handling that work leaves out).

Settings whose CPU seconds lie within ``TIE_FRACTION`` of each other count as
a tie (the measurement's own repeatability on a shared machine); among tied
settings the one with more accuracy margin is preferred. This holds inside
a strategy (its best setting) and between fixed and adaptive stepping (the
verdict then says it is a tie and names both). With several seeds the
verdict says in how many the first seed's outcome held.
"""
from __future__ import annotations

import math

import pandas as pd

from .front import ERROR_MEASURES, fitted_orders, strategy_fronts

STRATEGY_ORDER = ("fixed", "global-adaptive", "local-adaptive")
TIE_FRACTION = 0.10
"""Settings whose CPU seconds differ by at most this fraction (of the smaller) are a tie."""


def accuracy_margin(row, target_jitter_ms: float, target_mismatch_frac: float) -> float:
    """How many times better than the target a point is: the smaller of target / RMS jitter
    and target / (missed + extra fraction); infinite where both errors are zero."""
    ratios = []
    for err, target in ((row["target_shift_rms_ms"], target_jitter_ms),
                        (row["target_mismatch_fraction"], target_mismatch_frac)):
        err = float(err)
        ratios.append(math.inf if not err > 0 else target / err)  # NaN jitter: no spike to judge
    return min(ratios)


def tied(a: float, b: float, fraction: float = TIE_FRACTION) -> bool:
    """Whether two costs lie within ``fraction`` of the smaller."""
    lo, hi = sorted((float(a), float(b)))
    return hi <= lo * (1.0 + fraction)


def _pick(rows: list[dict]) -> tuple[dict, list[dict]]:
    """The preferred of candidate rows: among those tied with the cheapest, the largest
    margin (then the cheapest, then the lowest point id). Returns it and the others tied."""
    cheapest = min(rows, key=lambda r: (r["cpu_s"], r["point"]))
    ties = [r for r in rows if tied(r["cpu_s"], cheapest["cpu_s"])]
    best = max(ties, key=lambda r: (r["margin"], -r["cpu_s"], -r["point"]))
    return best, [r for r in ties if r is not best]


def cheapest_meeting(rows: pd.DataFrame, target_jitter_ms: float, target_mismatch_frac: float) -> dict:
    """Per strategy, the preferred row (dict, with ``margin`` and ``tied_with``) of those that
    meet the target and have a measured CPU time (see the module docstring)."""
    out = {}
    good = rows[rows["meets_target"].astype(bool) & rows["cpu_s"].notna()]
    for strategy in STRATEGY_ORDER:
        r = good[good["strategy"] == strategy]
        if not len(r):
            continue
        cands = [dict(x, margin=accuracy_margin(x, target_jitter_ms, target_mismatch_frac))
                 for x in r.to_dict("records")]
        best, others = _pick(cands)
        out[strategy] = dict(best, tied_with=[o["label"] for o in others])
    return out


_BRIEF = ("point", "label", "strategy", "stepper", "dt_ms", "crossing", "delivery", "rtol", "cpu_s",
          "cpu_spread", "work", "rhs_evals", "steps", "arrivals", "steps_per_cell_ms", "arrivals_per_ms",
          "target_shift_rms_ms", "target_mismatch_fraction", "open_loop_shift_rms_ms",
          "open_loop_mismatch_fraction", "margin", "tied_with")


def _brief(row: dict) -> dict:
    return {k: row.get(k) for k in _BRIEF}


def _secs(row: dict) -> str:
    return f"{row['cpu_s']:.3g} s"


def seed_verdict(rows: pd.DataFrame, n_cells: int, duration_ms: float, target_jitter_ms: float,
                 target_mismatch_frac: float) -> dict:
    """Verdict of one seed's rows.

    Returns
    -------
    dict
        ``outcome`` ("adaptive", "fixed", "tie" or "none"), ``ratio`` (CPU seconds
        of the dearer of the best fixed and best adaptive setting over the cheaper),
        ``work_ratio`` (the work of the same two, dearer over cheaper in seconds: below 1
        where work alone would rank them the other way), ``text``, ``reason``, ``recommended`` and
        ``cheapest`` (the preferred setting of each strategy).
    """
    best = cheapest_meeting(rows, target_jitter_ms, target_mismatch_frac)
    fixed = best.get("fixed")
    adaptive = [best[s] for s in ("global-adaptive", "local-adaptive") if s in best]
    adapt = _pick(adaptive)[0] if adaptive else None
    ratio = work_ratio = math.nan
    if fixed is None and adapt is None:
        outcome, winner = "none", None
        text = "no setting of the sweep meets the target; extend the sweep to smaller steps or tolerances"
    elif fixed is None or adapt is None:
        winner = fixed or adapt
        outcome = "fixed" if adapt is None else "adaptive"
        text = (f"adaptive stepping pays off here: {adapt['label']} meets the target ({_secs(adapt)}) and "
                f"no fixed step of the sweep does" if adapt is not None else
                f"adaptive stepping does not pay off: no adaptive setting meets the target; fixed step "
                f"dt = {fixed['dt_ms']:g} ms ({fixed['label']}, {_secs(fixed)}) does")
    else:
        cheap, dear = sorted((fixed, adapt), key=lambda r: (r["cpu_s"], r["point"]))
        ratio = dear["cpu_s"] / cheap["cpu_s"] if cheap["cpu_s"] > 0 else math.inf
        work_ratio = dear["work"] / cheap["work"] if cheap["work"] > 0 else math.inf
        if tied(fixed["cpu_s"], adapt["cpu_s"]):
            outcome = "tie"
            winner = max((fixed, adapt), key=lambda r: (r["margin"], -r["cpu_s"], -r["point"]))
            text = (f"fixed and adaptive stepping cost the same here (within {TIE_FRACTION:.0%}): "
                    f"{fixed['label']} takes {_secs(fixed)} and {adapt['label']} {_secs(adapt)}; "
                    f"recommended: {winner['label']}, which has more accuracy margin "
                    f"({_margin_text(winner)})")
        elif cheap is adapt:
            outcome, winner = "adaptive", adapt
            text = (f"adaptive stepping pays off here: {adapt['label']} takes {_secs(adapt)}, {ratio:.3g}x "
                    f"less than the best fixed step ({fixed['label']}, {_secs(fixed)})")
        else:
            outcome, winner = "fixed", fixed
            text = (f"adaptive stepping does not pay off: fixed step dt = {fixed['dt_ms']:g} ms "
                    f"({fixed['label']}) takes {_secs(fixed)}, {ratio:.3g}x less than the best adaptive "
                    f"setting ({adapt['label']}, {_secs(adapt)})")
    if winner is not None and winner.get("tied_with"):
        text += (f"; within its strategy it ties (within {TIE_FRACTION:.0%}) with "
                 f"{', '.join(winner['tied_with'])} and has the most accuracy margin")
    if winner is not None:
        text += (f". Measured on this profile's network ({n_cells} cells, {duration_ms:g} ms), one thread "
                 f"per run; `spikegauge advise` extrapolates to the production run")
    return dict(outcome=outcome, ratio=ratio, work_ratio=work_ratio, text=text,
                reason=_reason(rows, best, n_cells),
                recommended=_brief(winner) if winner is not None else None,
                cheapest={k: _brief(v) for k, v in best.items()})


def _margin_text(row: dict) -> str:
    m = row["margin"]
    return "no error at all" if math.isinf(m) else f"{m:.3g}x better than the target"


def _reason(rows, best, n_cells) -> str:
    ok = rows[rows["status"] == "ok"]
    if not len(ok):
        return "no point ran to the end"
    events_per_ms = float(ok["arrivals_per_ms"].median())
    parts = [f"the network receives {events_per_ms:.3g} synaptic events per ms "
             f"({events_per_ms / n_cells:.3g} per cell), and every one ends a global adaptive step"]
    for s in STRATEGY_ORDER:
        if s in best:
            b = best[s]
            parts.append(f"{s} at the target: {b['steps_per_cell_ms']:.3g} steps per cell per ms, "
                         f"{b['cpu_s']:.3g} s, {b['work']:.4g} work units, "
                         f"{_per_step(b):.3g} µs per cell-step")
    for s in STRATEGY_ORDER:
        mine = rows[rows["strategy"] == s]
        if s in best or not len(mine):
            continue
        counts = mine["status"].value_counts()
        held = [f"{counts[k]} {k}" for k in ("stopped", "skipped", "diverged", "failed") if k in counts]
        parts.append(f"{s}: no setting met the target ({', '.join(held) or 'all ran and missed it'}"
                     f"{'; stopped and skipped settings would have passed the work limit' if held else ''})")
    ranked_s = sorted(best.values(), key=lambda r: (r["cpu_s"], r["point"]))
    ranked_w = sorted(best.values(), key=lambda r: (r["work"], r["point"]))
    if len(ranked_s) > 1 and ranked_s[0]["strategy"] != ranked_w[0]["strategy"] \
            and not tied(ranked_s[0]["cpu_s"], ranked_s[1]["cpu_s"]):
        s, w = ranked_s[0], ranked_w[0]
        parts.append(f"work alone would rank {w['strategy']} first ({w['work']:.4g} against "
                     f"{s['work']:.4g} work units), but each of its cell-steps costs {_per_step(w):.3g} µs "
                     f"against {_per_step(s):.3g} µs for {s['strategy']} (error control, dense output, "
                     f"crossing search and event handling are not counted as work)")
    return "; ".join(parts)


def _per_step(row: dict) -> float:
    """CPU microseconds per cell-step."""
    return 1e6 * row["cpu_s"] / row["steps"] if row["steps"] else math.nan


def conclusions(table: pd.DataFrame, doc: dict) -> dict:
    """Fronts, fitted orders and verdict of a profile (added to ``profile.json``)."""
    n_cells = doc["scenario"]["n_cells"]
    duration = doc["scenario"]["duration_ms"]
    target = doc["target"]
    seeds = doc["seeds"]
    per_seed = []
    for seed in seeds:
        rows = table[table["seed"] == seed]
        v = seed_verdict(rows, n_cells, duration, target["jitter_ms"], target["mismatch_frac"])
        v["seed"] = seed
        per_seed.append(v)
    head = per_seed[0]
    held = sum(v["outcome"] == head["outcome"] for v in per_seed)
    verdict = dict(head)
    verdict["seeds_held"] = held
    verdict["seeds"] = len(seeds)
    if len(seeds) > 1:
        verdict["text"] += f" (the outcome held for {held} of {len(seeds)} seeds)"
    first = table[table["seed"] == seeds[0]]
    statistical = None
    if "statistics_pass" in first and doc.get("yardstick"):
        by_stats = first.assign(meets_target=first["statistics_pass"].astype(bool) & (first["status"] == "ok"))
        statistical = seed_verdict(by_stats, n_cells, duration, target["jitter_ms"], target["mismatch_frac"])
        statistical["text"] = ("statistics indistinguishable from the reference's (rates, irregularity, "
                               "synchrony, spectrum and ISI distributions within the spread of "
                               f"{doc['yardstick']['k']} reference runs): " + statistical["text"])
    fronts = {cost: {err: strategy_fronts(first, err, cost) for err in ERROR_MEASURES}
              for cost in ("cpu", "work")}
    ref_unc = doc["references"][0]["uncertainty"].get("shift_rms_ms")
    ref_unc = math.nan if ref_unc is None else float(ref_unc)
    verdict["target"] = "per-spike: RMS jitter and (missed + extra) per reference spike"
    return dict(verdict=verdict, verdict_per_seed=per_seed, verdict_statistics=statistical, fronts=fronts,
                fits=fitted_orders(first, reference_rms_ms=ref_unc))
