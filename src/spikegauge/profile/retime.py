"""Check a profile's verdict against an independent re-timing (``spikegauge bench --profile DIR``).

Every setting of the profile's first seed that met the target is run again
in this process, on one thread, ``reps`` times after a run that compiles its
kernels; its cost is the process CPU time of the whole
:func:`spikegauge.simulate` call (setup included, so not the profile's own
measurement), the least of the repetitions kept. The check then says how
far the recommended setting is from the fastest re-timed one, and whether
the verdict's outcome (adaptive, fixed or a tie) agrees with the re-timed
best setting of each strategy.
"""
from __future__ import annotations

import dataclasses
import math
import time

import pandas as pd

from ..errors import InputError
from .verdict import TIE_FRACTION, tied


def _settings(row) -> dict:
    keys = ("strategy", "stepper", "dt_ms", "crossing", "delivery", "rtol", "atol")
    return {k: row[k] for k in keys if k in row and not pd.isna(row[k])}


def retime_profile(profile_dir, reps: int = 3, log=None) -> dict:
    """Re-time the settings of a profile that met the target (see the module docstring).

    Returns
    -------
    dict
        ``table`` (DataFrame: label, strategy, profile_cpu_s, retimed_cpu_s),
        ``recommended`` (label), ``recommended_over_fastest`` (ratio of re-timed
        seconds), ``outcome`` (the verdict's), ``retimed_outcome`` and ``agrees``.
    """
    from ..network import build_network
    from ..simulation import simulate
    from .advice import _profile_scenario
    from .results import load_results

    if int(reps) < 1:
        raise InputError(f"--reps: must be at least 1, got {reps}")
    table, doc = load_results(profile_dir)
    v = doc["verdict"]
    if v.get("recommended") is None:
        raise InputError(f"{profile_dir}: the profile recommends no setting; nothing to re-time")
    seed = doc["seeds"][0]
    rows = table[(table["seed"] == seed) & table["meets_target"].astype(bool)]
    scenario = _profile_scenario(profile_dir, doc)
    net = build_network(dataclasses.replace(scenario, seed=int(seed)))
    out = []
    for _, row in rows.iterrows():
        s = _settings(row)
        simulate(net, threads=1, **s)  # compiles or loads its kernels
        best = math.inf
        for _ in range(int(reps)):
            tic = time.process_time()
            simulate(net, threads=1, **s)
            best = min(best, time.process_time() - tic)
        out.append(dict(label=row["label"], strategy=row["strategy"], profile_cpu_s=float(row["cpu_s"]),
                        retimed_cpu_s=best))
        if log is not None:
            log(f"re-timed {row['label']}: {best:.4g} s (profile: {float(row['cpu_s']):.4g} s)")
    t = pd.DataFrame(out).sort_values("retimed_cpu_s", kind="stable").reset_index(drop=True)
    rec = v["recommended"]["label"]
    fastest = float(t["retimed_cpu_s"].iloc[0])
    rec_s = float(t.loc[t["label"] == rec, "retimed_cpu_s"].iloc[0])
    best = t.groupby("strategy")["retimed_cpu_s"].min()
    fixed = best.get("fixed")
    adaptive = min((best[s] for s in ("global-adaptive", "local-adaptive") if s in best), default=None)
    if fixed is None or adaptive is None:
        retimed = "fixed" if adaptive is None else "adaptive"
    elif tied(fixed, adaptive):
        retimed = "tie"
    else:
        retimed = "fixed" if fixed < adaptive else "adaptive"
    outcome = v["outcome"]
    # a tie on either side agrees with anything within the tie margin
    agrees = outcome == retimed or "tie" in (outcome, retimed)
    return dict(table=t, recommended=rec, recommended_over_fastest=rec_s / fastest if fastest > 0 else math.inf,
                outcome=outcome, retimed_outcome=retimed, agrees=bool(agrees), tie_fraction=TIE_FRACTION,
                reps=int(reps))


def format_retime(res: dict) -> str:
    """The re-timing as text: the table, then the two figures of the check."""
    t = res["table"]
    lines = [f"{'setting':<44} {'profile s':>10} {'re-timed s':>10}"]
    for _, r in t.iterrows():
        mark = "  <- recommended" if r["label"] == res["recommended"] else ""
        lines.append(f"{r['label']:<44} {r['profile_cpu_s']:>10.4g} {r['retimed_cpu_s']:>10.4g}{mark}")
    lines.append(f"recommended / fastest re-timed: {res['recommended_over_fastest']:.3g}x "
                 f"(best of {res['reps']}, one thread, process CPU time)")
    lines.append(f"verdict outcome: {res['outcome']}; re-timed best of each strategy says: "
                 f"{res['retimed_outcome']} ({'agrees' if res['agrees'] else 'DISAGREES'}; "
                 f"within {res['tie_fraction']:.0%} is a tie)")
    return "\n".join(lines)
