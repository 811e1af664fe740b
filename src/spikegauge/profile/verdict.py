"""The verdict: is adaptive stepping worth it here, and which setting meets the target.

For each seed, the cheapest setting of each strategy that meets the target
(status ok; within the judged window RMS jitter and missed + extra fraction at
most the target's) is found by machine-independent work (right-hand-side
evaluations plus Newton / linear-solve iterations, ``work``), wall seconds
shown beside it. The verdict compares the best
adaptive with the best fixed setting and states the reason in numbers: the
arrivals per ms the whole network receives (each ends a global adaptive step)
and the steps per cell and ms each strategy took. With several seeds it says
in how many the first seed's verdict held.
"""
from __future__ import annotations

import math

import pandas as pd

from .front import ERROR_MEASURES, fitted_orders, strategy_fronts

STRATEGY_ORDER = ("fixed", "global-adaptive", "local-adaptive")


def cheapest_meeting(rows: pd.DataFrame) -> dict:
    """Per strategy, the row (as dict) with the fewest rhs evaluations that meets the target."""
    out = {}
    good = rows[rows["meets_target"].astype(bool)]
    for strategy in STRATEGY_ORDER:
        r = good[good["strategy"] == strategy]
        if len(r):
            best = r.sort_values(["work", "point"], kind="stable").iloc[0]
            out[strategy] = best.to_dict()
    return out


def _brief(row: dict) -> dict:
    keys = ("point", "label", "strategy", "stepper", "dt_ms", "crossing", "delivery", "rtol", "work",
            "rhs_evals", "steps", "arrivals", "wall_s", "steps_per_cell_ms", "arrivals_per_ms",
            "target_shift_rms_ms", "target_mismatch_fraction")
    return {k: row.get(k) for k in keys}


def seed_verdict(rows: pd.DataFrame, n_cells: int) -> dict:
    """Verdict of one seed's rows: ``outcome`` ("adaptive", "fixed", "none"),
    ``ratio`` (rhs evaluations of the loser over the winner), ``text``, ``reason``
    and the cheapest setting of each strategy."""
    best = cheapest_meeting(rows)
    fixed = best.get("fixed")
    adaptive = [best[s] for s in ("global-adaptive", "local-adaptive") if s in best]
    adapt = min(adaptive, key=lambda r: (r["work"], r["point"])) if adaptive else None
    if fixed is None and adapt is None:
        outcome, ratio, winner = "none", math.nan, None
        text = "no setting of the sweep meets the target; extend the sweep to smaller steps or tolerances"
    elif adapt is not None and (fixed is None or adapt["work"] < fixed["work"]):
        outcome, winner = "adaptive", adapt
        if fixed is None:
            ratio = math.nan
            text = (f"adaptive stepping pays off here: {adapt['label']} meets the target and no "
                    f"fixed step of the sweep does")
        else:
            ratio = fixed["work"] / adapt["work"]
            text = (f"adaptive stepping pays off here: {adapt['label']} is {ratio:.3g}x cheaper than "
                    f"the best fixed step ({fixed['label']})")
    else:
        outcome, winner = "fixed", fixed
        if adapt is None:
            ratio = math.nan
            text = (f"adaptive stepping does not pay off: no adaptive setting meets the target; fixed "
                    f"step dt = {fixed['dt_ms']:g} ms ({fixed['label']}) does")
        else:
            ratio = adapt["work"] / fixed["work"]
            text = (f"adaptive stepping does not pay off: fixed step dt = {fixed['dt_ms']:g} ms "
                    f"({fixed['label']}) is {ratio:.3g}x cheaper than the best adaptive setting "
                    f"({adapt['label']})")
    reason = _reason(rows, best, n_cells)
    wall_ratio = math.nan
    if fixed is not None and adapt is not None:
        loser = fixed if winner is adapt else adapt
        wall_ratio = loser["wall_s"] / winner["wall_s"] if winner["wall_s"] > 0 else math.nan
    return dict(outcome=outcome, ratio=ratio, text=text, reason=reason, wall_ratio=wall_ratio,
                recommended=_brief(winner) if winner is not None else None,
                cheapest={k: _brief(v) for k, v in best.items()})


def _reason(rows, best, n_cells) -> str:
    ok = rows[rows["status"] == "ok"]
    if not len(ok):
        return "no point ran to the end"
    arrivals_per_ms = float(ok["arrivals_per_ms"].median())
    parts = [f"the network receives {arrivals_per_ms:.3g} arrivals per ms "
             f"({arrivals_per_ms / n_cells:.3g} per cell), and every arrival ends a global adaptive step"]
    for s in STRATEGY_ORDER:
        if s in best:
            b = best[s]
            parts.append(f"{s} at the target: {b['steps_per_cell_ms']:.3g} steps per cell and ms, "
                         f"{b['work']:.4g} work units (rhs evaluations + Newton iterations)")
    return "; ".join(parts)


def conclusions(table: pd.DataFrame, doc: dict) -> dict:
    """Fronts, fitted orders and verdict of a profile (added to ``profile.json``)."""
    n_cells = doc["scenario"]["n_cells"]
    seeds = doc["seeds"]
    per_seed = []
    for seed in seeds:
        rows = table[table["seed"] == seed]
        v = seed_verdict(rows, n_cells)
        v["seed"] = seed
        per_seed.append(v)
    head = per_seed[0]
    held = sum(v["outcome"] == head["outcome"] for v in per_seed)
    verdict = dict(head)
    verdict["seeds_held"] = held
    verdict["seeds"] = len(seeds)
    if len(seeds) > 1:
        verdict["text"] += f" (the verdict held for {held} of {len(seeds)} seeds)"
    first = table[table["seed"] == seeds[0]]
    fronts = {cost: {err: strategy_fronts(first, err, cost) for err in ERROR_MEASURES}
              for cost in ("work", "wall")}
    return dict(verdict=verdict, verdict_per_seed=per_seed, fronts=fronts,
                fits=fitted_orders(first))
