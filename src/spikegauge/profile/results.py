"""Turn stored runs into ``results.csv`` and ``profile.json``.

Every sweep point is compared with its seed's reference twice: over the whole
run (every figure of :func:`spikegauge.analysis.compare`, including the
population statistics that still mean something past the sensitivity
horizon) and over the judged window, from the start to the median horizon of
the target-sized probe, where per-spike figures are meaningful; those carry
the prefix ``target_``. Its open-loop twin is compared over the whole run
(:mod:`.open_loop`). A point meets the target when its status is ok and its
RMS jitter and (missed + extra) per reference spike are at most the target's
both ways: closed loop within the evaluation window, open loop over the whole
run.

``results.csv`` columns (one row per point, in sweep order, seed by seed):
``point, seed, label, strategy, stepper, dt_ms, crossing, delivery, rtol,
atol, digest, status, message, t_reached_ms``; cost ``steps, rhs_evals,
newton_iters, arrivals, rejected_steps, jacobian_evals, spikes, cpu_s (CPU seconds of the run on one
thread, compilation excluded, the least of its repeats), cpu_spread ((largest - least) /
least over the repeats), cpu_repeats, wall_s (the integration loop's wall time),
compile_s, work (rhs_evals + newton_iters + jacobian_evals), steps_per_cell_ms, arrivals_per_ms``; target ``target_window_ms,
target_shift_rms_ms, target_shift_max_abs_ms, target_mismatch_fraction,
target_missed_fraction, target_extra_fraction``; open loop over the whole run
(the point's twin replaying the reference's raster as recurrent input:
:func:`spikegauge.simulate` ``open_loop``) ``open_loop_status, open_loop_shift_rms_ms,
open_loop_shift_max_abs_ms, open_loop_mismatch_fraction, meets_closed_loop,
meets_open_loop, meets_target`` (both); the statistical target
``statistics_pass, statistics_failed, statistics_min_holm_p`` (:mod:`.statistics`);
the sweep's rounds ``origin, round, work_limit, predicted_work``; then every
key of the comparison summary (see :func:`spikegauge.analysis.compare`).
Only the time columns (:data:`TIME_COLUMNS`, and ``timing`` in ``profile.json``)
depend on the machine.
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import pandas as pd

from .. import __version__
from ..analysis import compare
from ..analysis.comparison import jsonable
from ..runs import atomic_path
from .reference import ladder_summary, probe_horizon, reference_uncertainty
from .sweep import setting_label
from .front import REFERENCE_FLOOR_FACTOR
from .open_loop import open_loop_findings
from .statistics import judge_point, yardstick_doc
from .verdict import conclusions

COMPARE_OPTIONS = dict(match_window_ms=2.0, tau_ms=5.0)
"""Options of every comparison of a profile (match window and van Rossum time constant, ms)."""
TIME_COLUMNS = ("cpu_s", "cpu_spread", "cpu_repeats", "wall_s", "compile_s")
"""Columns that depend on the machine and the executor."""
COST_KEYS = ("steps", "rhs_evals", "newton_iters", "arrivals", "rejected_steps", "jacobian_evals",
             "spikes")
SETTING_COLUMNS = ("strategy", "stepper", "dt_ms", "crossing", "delivery", "rtol", "atol")
TARGET_KEYS = ("shift_rms_ms", "shift_max_abs_ms", "mismatch_fraction", "missed_fraction",
               "extra_fraction")
MIN_JUDGED_MS = 50.0
"""Shortest judged window (ms), one agreement window of the horizon analysis, so a
network that loses agreement at once still has a window to judge jitter in."""


def judged_window_ms(ladder: dict, duration_ms: float) -> float:
    """End of the window per-spike targets are judged over (ms from the start)."""
    if "shift" not in ladder or ladder["shift"]["median_censored"]:
        return float(duration_ms)
    return float(min(duration_ms, max(ladder["shift"]["median_horizon_ms"], MIN_JUDGED_MS)))


def _comparison_doc(store, digest, run, ref, ref_digest, window, options):
    key = dict(options, judged_window_ms=window, reference=ref_digest)
    if run.status == "skipped":  # never run, nothing stored
        return dict(options=key, comparison=None, target=None)
    cached = store.read_comparison(digest)
    if cached is not None and cached.get("options") == json.loads(json.dumps(key)):
        return cached
    if run.status == "failed":
        doc = dict(options=key, comparison=None, target=None)
    else:
        full = compare(ref, run, t_stop_ms=ref.t_stop_ms, **options)
        judged = full if window >= ref.t_stop_ms - ref.t_start_ms else \
            compare(ref, run, t_stop_ms=ref.t_start_ms + window, **options)
        s = judged.summary
        target = {k: s[k] for k in TARGET_KEYS}
        target["n_ref"] = s["n_ref"]
        doc = jsonable(dict(options=key, comparison=full.to_dict(), target=target))
    store.write_comparison(digest, doc)
    return doc


def _nan(v):
    return math.nan if v is None else v


def meets_target(run, doc, spec) -> bool:
    """Whether a point meets the target: status ok and, within the evaluation window, RMS
    jitter and (missed + extra) per reference spike at most the target's."""
    target = doc["target"] or {}
    jitter, mism = _nan(target.get("shift_rms_ms")), _nan(target.get("mismatch_fraction"))
    no_spikes = target.get("n_ref") == 0 and mism == 0
    return bool(run.status == "ok" and mism <= spec.target_mismatch_frac
                and (jitter <= spec.target_jitter_ms or no_spikes))


OPEN_LOOP_KEYS = ("shift_rms_ms", "shift_max_abs_ms", "mismatch_fraction")
"""Open-loop figures of a point, over the whole run (columns ``open_loop_*``)."""


def point_row(k, task, run, doc, window, spec, entry=None, open_run=None, open_doc=None) -> dict:
    """One row of ``results.csv`` (``entry``: the point's :class:`.rounds.Entry`; ``open_run``
    and ``open_doc``: its open-loop run and comparison)."""
    s = task["settings"]
    row = dict(point=k, seed=task["seed"], label=setting_label(s))
    row.update({c: s.get(c) for c in SETTING_COLUMNS})
    row.update(digest=task["digest"], status=run.status, message=run.message,
               t_reached_ms=run.t_stop_ms)
    if entry is not None:
        row.update(origin=entry.origin, round=entry.round,
                   work_limit=math.nan if entry.work_limit is None else entry.work_limit,
                   predicted_work=entry.predicted_work)
    no_cost = run.status in ("failed", "skipped")
    for c in COST_KEYS + TIME_COLUMNS:
        row[c] = math.nan if no_cost else run.cost.get(c, math.nan)
    # machine-independent work: a Newton iteration or Rosenbrock linear solve of a point
    # neuron (2-6 states), and a hand-written Jacobian of one, each cost about one right-hand
    # side (common practice); runs stored before the Jacobian count have none
    row["work"] = row["rhs_evals"] + row["newton_iters"] + run.cost.get("jacobian_evals", 0)
    span = run.t_stop_ms - run.t_start_ms
    row["steps_per_cell_ms"] = row["steps"] / (run.n_cells * span) if span > 0 and not no_cost else math.nan
    row["arrivals_per_ms"] = row["arrivals"] / span if span > 0 and not no_cost else math.nan
    row["target_window_ms"] = window
    target = doc["target"] or {}
    for key in TARGET_KEYS:
        row[f"target_{key}"] = _nan(target.get(key))
    row["meets_target"] = meets_target(run, doc, spec)
    if open_run is not None:
        target = open_doc["target"] or {}
        row["open_loop_status"] = open_run.status
        for key in OPEN_LOOP_KEYS:
            row[f"open_loop_{key}"] = _nan(target.get(key))
        # the per-spike target holds both ways: closed loop before the divergence time,
        # open loop over the whole run
        row["meets_closed_loop"] = row["meets_target"]
        row["meets_open_loop"] = meets_target(open_run, open_doc, spec)
        row["meets_target"] = row["meets_closed_loop"] and row["meets_open_loop"]
    summary = (doc["comparison"] or {}).get("summary", {})
    for key, v in summary.items():
        if key not in ("n_cells", "t_start_ms", "t_stop_ms") and key not in row:
            row[key] = _nan(v) if not isinstance(v, (str, bool)) else v
    return row


def _strip_times(cost: dict) -> dict:
    return {k: v for k, v in cost.items() if k not in TIME_COLUMNS and k != "cell_steps_per_s"}


def reference_doc(spec, seed, ref_tasks, ref_runs, check_run=None) -> dict:
    """The reference of one seed and its uncertainty (``profile.json``'s ``references``);
    ``check_run``: the looser reference setting replaying the reference's raster, or None."""
    runs = ref_runs[seed]
    ref = runs[-1]
    unc = reference_uncertainty(runs, spec.target_jitter_ms, spec.target_mismatch_frac,
                                open_loop_run=check_run, **COMPARE_OPTIONS)
    return dict(seed=seed, settings=[t["settings"] for t in ref_tasks[seed]],
                digests=[t["digest"] for t in ref_tasks[seed]], status=ref.status,
                message=ref.message, spikes=int(len(ref.spikes)), mean_rate_hz=ref.mean_rate_hz,
                cost=[_strip_times(r.cost) for r in runs], uncertainty=unc)


def ladder_doc(ref, probe_tasks, by_digest, seed) -> dict:
    """The sensitivity ladder of one seed and the evaluation window it sets."""
    probes = [t["probe"] for t in probe_tasks]
    horizons = [probe_horizon(ref, by_digest[t["digest"]], t["probe"], **COMPARE_OPTIONS)
                for t in probe_tasks]
    ladder = ladder_summary(probes, horizons)
    return dict(seed=seed, probes=ladder,
                judged_window_ms=judged_window_ms(ladder, ref.t_stop_ms - ref.t_start_ms))


def evaluate(spec, store, ref_tasks, ref_runs, ladders, points, by_digest, out_dir, extra=None,
             yardsticks=None, ref_checks=None) -> dict:
    """Compare every point with its reference; write ``results.csv``; return the profile document.

    ``points[seed]`` lists ``(entry, task, open_loop_task)`` of the seed's sweep in table order;
    ``ladders[seed]`` is :func:`ladder_doc`'s; ``extra`` is merged into the document.
    """
    references, rows, listed = [], [], []
    k = 0
    for seed in spec.seeds:
        ref, ref_digest = ref_runs[seed][-1], ref_tasks[seed][-1]["digest"]
        references.append(reference_doc(spec, seed, ref_tasks, ref_runs, (ref_checks or {}).get(seed)))
        window = ladders[seed]["judged_window_ms"]
        for entry, task, twin in points[seed]:
            run, open_run = by_digest[task["digest"]], by_digest[twin["digest"]]
            doc = _comparison_doc(store, task["digest"], run, ref, ref_digest, window, COMPARE_OPTIONS)
            open_doc = _comparison_doc(store, twin["digest"], open_run, ref, ref_digest,
                                       ref.t_stop_ms - ref.t_start_ms, COMPARE_OPTIONS)
            rows.append(point_row(k, task, run, doc, window, spec, entry, open_run, open_doc))
            rows[-1]["open_loop_digest"] = twin["digest"]
            rows[-1].update(judge_point((yardsticks or {}).get(seed), run))
            listed.append(dict(point=k, seed=seed, label=setting_label(task["settings"]),
                               digest=task["digest"], status=run.status, message=run.message))
            k += 1
    table = pd.DataFrame(rows)
    write_results_csv(out_dir, table)
    seed0 = spec.seeds[0]
    open_runs = {row["point"]: by_digest[twin["digest"]]
                 for row, (_, _, twin) in zip(rows, points[seed0])}
    findings = open_loop_findings(table[table["seed"] == seed0], open_runs, ref_runs[seed0][-1],
                                  references[0]["uncertainty"]["shift_rms_ms"], REFERENCE_FLOOR_FACTOR,
                                  **COMPARE_OPTIONS)
    scen = spec.scenario
    n_settings = len(points[spec.seeds[0]])
    doc = dict(
        spikegauge_version=__version__,
        scenario=dict(name=scen.name, path=str(scen.path) if scen.path else None,
                      digest=spec.scenario_digest, n_cells=scen.n_cells, duration_ms=scen.duration_ms,
                      seed=scen.seed, models=spec.model_names),
        target=dict(jitter_ms=spec.target_jitter_ms, mismatch_frac=spec.target_mismatch_frac),
        compare_options=COMPARE_OPTIONS,
        sweep=dict(source=spec.sweep_source, n_settings=n_settings, n_points=len(rows)),
        seeds=spec.seeds,
        references=references,
        ladder=[ladders[s] for s in spec.seeds],
        points=listed,
        open_loop=findings,
        yardstick=yardstick_doc((yardsticks or {}).get(seed0)),
    )
    doc.update(extra or {})
    doc.update(conclusions(table, doc))
    return jsonable(doc)


def write_results_csv(out_dir, table: pd.DataFrame) -> Path:
    path = Path(out_dir) / "results.csv"
    with atomic_path(path) as tmp:
        table.to_csv(tmp, index=False)
    return path


def write_profile_json(out_dir, doc: dict) -> Path:
    path = Path(out_dir) / "profile.json"
    with atomic_path(path) as tmp:
        Path(tmp).write_text(json.dumps(jsonable(doc), indent=1, allow_nan=False))
    return path


def load_results(profile_dir) -> tuple[pd.DataFrame, dict]:
    """Read ``results.csv`` and ``profile.json`` of a profile folder."""
    from ..errors import InputError

    d = Path(profile_dir)
    try:
        table = pd.read_csv(d / "results.csv", keep_default_na=True)
        doc = json.loads((d / "profile.json").read_text())
    except FileNotFoundError as exc:
        raise InputError(f"{d}: not a profile folder (missing {Path(exc.filename).name}); "
                         f"run `spikegauge profile` first") from None
    return table, doc
