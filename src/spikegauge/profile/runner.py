"""Run a profile: reference, sensitivity ladder and sweep, then the results table.

:func:`run_profile` is what ``spikegauge profile`` calls. Every batch of
runs is handed to an executor (serial, local processes or Dask;
:mod:`.executors`) and kept in the point store (:mod:`.store`), so an
interrupted profile resumes where it stopped:

1. the reference runs of every seed (:mod:`.reference`);
2. the ladder probes (they perturb the reference's spikes) together with the
   first round of the sweep; then the sweep's further rounds, each planned
   from the comparisons of the earlier ones (:mod:`.rounds`: cheap points
   first, the edges extended, hopeless runs stopped or skipped);
3. comparisons of every point with its seed's reference, over the whole run
   and over the evaluation window (the target-sized probe's median horizon),
   written to ``results.csv`` and ``profile.json`` (:mod:`.results`).

Only time columns depend on the machine, the executor or on how often a
profile was interrupted: everything else is a deterministic function of the
scenario, the settings, the seeds and the package version.
"""
from __future__ import annotations

import dataclasses
import math
import time
from pathlib import Path

from .. import __version__
from ..errors import InputError
from ..network import build_network
from ..scenario import parse_scenario
from .cost import COST_METHOD, THREADS
from .executors import make_executor, skipped_run
from .results import COMPARE_OPTIONS
from .rounds import WORK_LIMIT_FACTOR, SweepPlan
from .reference import ladder_probes, reference_settings, yardstick_probes
from .statistics import make_yardstick
from .store import PointStore, point_digest
from .sweep import default_sweep, load_sweep_file, parse_sweep, quick_sweep, setting_label, split_sweep_table

N_PROBES_EXPECTED = 15
"""Ladder probes of a seed (three kinds on five cells), for the first progress total."""
N_STEP_TRACE_CELLS = 12
"""Cells whose adaptive steps are recorded (step-size traces, steps against firing rate)."""


@dataclasses.dataclass
class ProfileSpec:
    """What a profile runs: the scenario, its sweep, seeds and target."""

    scenario: object
    scenario_text: str
    scenario_digest: str
    sweep: list
    sweep_source: str
    seeds: list
    target_jitter_ms: float
    target_mismatch_frac: float

    @property
    def model_names(self):
        return sorted({g.model for g in self.scenario.groups})


def prepare(scenario_path, *, sweep_file=None, quick=False, seeds=1, target_jitter_ms=0.1,
            target_mismatch_frac=0.01) -> ProfileSpec:
    """Read the scenario and choose the sweep (``--sweep`` file, ``--quick``,
    the scenario's ``[sweep]`` table, else the default)."""

    path = Path(scenario_path)
    try:
        full = path.read_text()
    except FileNotFoundError:
        raise InputError(f"{path}: file not found") from None
    text, table = split_sweep_table(full, str(path))
    scen = parse_scenario(text, source=path)
    if int(seeds) < 1:
        raise InputError(f"--seeds: must be at least 1, got {seeds}")
    for name, v in (("--target-jitter-ms", target_jitter_ms), ("--target-mismatch-frac", target_mismatch_frac)):
        if not (v > 0 and math.isfinite(v)):
            raise InputError(f"{name}: must be a positive number, got {v}")
    d_min = build_network(scen).d_min_ms
    if sweep_file is not None:
        sweep, source = load_sweep_file(sweep_file), str(sweep_file)
    elif quick:
        sweep, source = quick_sweep(scen, d_min), "quick"
    elif table is not None:
        sweep, source = parse_sweep(table, str(path)), f"{path.name} [sweep]"
    else:
        sweep, source = default_sweep(scen, d_min), "default"
    return ProfileSpec(scenario=scen, scenario_text=text,
                       scenario_digest=scen.digest, sweep=sweep,  # the model files it uses included
                       sweep_source=source, seeds=[scen.seed + k for k in range(int(seeds))],
                       target_jitter_ms=float(target_jitter_ms),
                       target_mismatch_frac=float(target_mismatch_frac))


def _task(spec: ProfileSpec, seed: int, settings: dict, probe=None, record_steps=None, timed=False,
          work_limit=None, t_stop_ms=None, open_loop=None):
    t = dict(scenario_text=spec.scenario_text, scenario_source=str(spec.scenario.path or ""),
             scenario_digest=spec.scenario_digest, scenario_name=spec.scenario.name, seed=int(seed),
             settings=dict(settings), probe=probe, record_steps=record_steps, version=__version__,
             threads=THREADS, timing=COST_METHOD if timed else None, timed=timed,
             work_limit=None if work_limit is None else float(work_limit),
             t_stop_ms=None if t_stop_ms is None else float(t_stop_ms),
             open_loop=None if open_loop is None else open_loop[0])
    if open_loop is not None:  # the reference's digest identifies the point; its spikes travel along
        t["open_loop_raster"] = dict(cell=open_loop[1].spikes["cell"].tolist(),
                                     time_ms=open_loop[1].spikes["time_ms"].tolist())
    if not t["scenario_source"]:
        t["scenario_source"] = None
    t["digest"] = point_digest(t)
    return t


def _label(task) -> str:
    if task["probe"]:
        p = task["probe"]
        if p["kind"] == "yardstick":
            return f"seed {task['seed']} reference, yardstick run {p['index']}"
        return f"seed {task['seed']} reference perturbed ({p['kind']}, cell {p['cell']})"
    if task.get("t_stop_ms") is not None:
        return f"seed {task['seed']} {setting_label(task['settings'])} (pilot, {task['t_stop_ms']:g} ms)"
    if task.get("open_loop") is not None:
        return f"seed {task['seed']} {setting_label(task['settings'])} (open loop)"
    return f"seed {task['seed']} {setting_label(task['settings'])}"


def step_trace_cells(n_cells: int, n: int = N_STEP_TRACE_CELLS) -> list[int]:
    """Cells spread evenly over the network whose adaptive steps are recorded."""
    import numpy as np

    return sorted({int(c) for c in np.round(np.linspace(0, n_cells - 1, min(n, n_cells)))})


class _Batch:
    """Runs the unfinished tasks of a batch and stores them; reports progress."""

    def __init__(self, store: PointStore, executor, fresh: bool, progress):
        self.store, self.executor, self.fresh, self.progress = store, executor, fresh, progress
        self.computed = 0
        self.retried = 0
        self.total_runs = 0

    def run(self, tasks):
        self.total_runs += len(tasks)
        todo, retry = [], set()
        for t in tasks:
            if self.fresh or not self.store.has(t["digest"]):
                todo.append(t)
            elif self.store.failed(t["digest"]):
                # an error may have come from the environment (a file, memory), so a
                # failed point is tried again; a setting that cannot run fails again at once
                todo.append(t)
                retry.add(t["digest"])
            else:
                self.progress(_label(t) + " (stored)")
        for i, run in self.executor.run(todo):
            self.store.save(todo[i]["digest"], run)
            if todo[i]["digest"] in retry:
                self.retried += 1
            else:
                self.computed += 1
            self.progress(_label(todo[i]))
        return [self.store.load(t["digest"]) for t in tasks]


def run_profile(scenario_path, out_dir, *, sweep_file=None, quick=False, seeds=1, jobs=None,
                scheduler=None, target_jitter_ms=0.1, target_mismatch_frac=0.01, fresh=False,
                progress=None, executor=None, work_limit_factor=WORK_LIMIT_FACTOR) -> dict:
    """Profile a scenario into ``out_dir`` (see the module docstring).

    Parameters
    ----------
    scenario_path : path
        Scenario file (its ``[sweep]`` table, if any, chooses the sweep).
    out_dir : path
        Profile folder; created if needed.
    sweep_file : path, optional
        A sweep file (a ``[sweep]`` table) overriding the scenario's and the default.
    quick : bool
        The small sweep of :func:`.sweep.quick_sweep`.
    seeds : int
        Number of network and drive realisations (seeds ``seed, seed+1, ...``).
    jobs : int, optional
        Local worker processes (default: one per core).
    scheduler : str, optional
        Address of a Dask scheduler.
    target_jitter_ms, target_mismatch_frac : float
        Accuracy target: RMS jitter (ms) and missed + extra fraction.
    fresh : bool
        Recompute points already stored.
    progress : object, optional
        ``progress.total(n)`` and ``progress.step(label)`` are called as runs finish.
    executor : optional
        An executor object (tests); overrides ``jobs`` and ``scheduler``.
    work_limit_factor : float
        A run is stopped once its work passes this many times the least work of a
        point of an earlier round that met the target (:mod:`.rounds`); above 1.

    Returns
    -------
    dict
        The profile document written to ``profile.json``.
    """
    from .results import evaluate, ladder_doc, meets_target, write_profile_json, _comparison_doc

    t_start = time.perf_counter()
    if not (work_limit_factor > 1 and math.isfinite(work_limit_factor)):
        raise InputError(f"--work-limit-factor: must be a number above 1, got {work_limit_factor}")
    spec = prepare(scenario_path, sweep_file=sweep_file, quick=quick, seeds=seeds,
                   target_jitter_ms=target_jitter_ms, target_mismatch_frac=target_mismatch_frac)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    store = PointStore(out)
    own = executor is None
    executor = make_executor(jobs, scheduler) if own else executor
    networks = {s: build_network(dataclasses.replace(spec.scenario, seed=s)) for s in spec.seeds}
    plans = {s: SweepPlan(spec.sweep, networks[s].d_min_ms, spec.scenario.duration_ms, work_limit_factor)
             for s in spec.seeds}
    ref_settings = reference_settings(spec.model_names)
    progress = _Progress(progress)
    progress.add(len(spec.seeds) * (len(ref_settings) + N_PROBES_EXPECTED + len(spec.sweep)))
    batch = _Batch(store, executor, fresh, progress.step)
    points = {s: {} for s in spec.seeds}   # seed -> {id(entry): (task, open-loop task)}
    pilots = {s: [] for s in spec.seeds}   # seed -> [(pilot, task)]
    by_digest = {}
    try:
        ref_tasks = {s: [_task(spec, s, rs) for rs in ref_settings] for s in spec.seeds}
        flat = [t for s in spec.seeds for t in ref_tasks[s]]
        runs = batch.run(flat)
        ref_runs = {s: runs[i * len(ref_settings):(i + 1) * len(ref_settings)] for i, s in enumerate(spec.seeds)}
        check_tasks = {s: _task(spec, s, ref_settings[0], open_loop=(ref_tasks[s][-1]["digest"], ref_runs[s][-1]))
                       for s in spec.seeds if len(ref_settings) > 1 and ref_runs[s][-1].status == "ok"}
        progress.add(len(check_tasks))
        ref_checks = dict(zip(check_tasks, batch.run(list(check_tasks.values()))))
        probes = {s: ladder_probes(networks[s], ref_runs[s][-1], spec.target_jitter_ms)
                  if ref_runs[s][-1].status == "ok" else [] for s in spec.seeds}
        probe_tasks = {s: [_task(spec, s, ref_settings[-1], probe=p) for p in probes[s]]
                       for s in spec.seeds}
        yard_tasks = {s: [_task(spec, s, ref_settings[-1], probe=p) for p in yardstick_probes(networks[s])]
                      if ref_runs[s][-1].status == "ok" else [] for s in spec.seeds}
        progress.add(sum(len(probe_tasks[s]) + len(yard_tasks[s]) for s in spec.seeds)
                     - len(spec.seeds) * N_PROBES_EXPECTED)
        ladders = None
        while True:
            todo = [] if ladders is not None else \
                [t for s in spec.seeds for t in probe_tasks[s] + yard_tasks[s]]
            round_entries = []
            for s in spec.seeds:
                entries, new_pilots = plans[s].next_round()
                for pilot in new_pilots:
                    task = _task(spec, s, pilot.settings, t_stop_ms=pilot.t_stop_ms)
                    pilots[s].append((pilot, task))
                    todo.append(task)
                reference = (ref_tasks[s][-1]["digest"], ref_runs[s][-1])
                for e in entries:
                    task = _task(spec, s, e.settings, timed=True, work_limit=e.work_limit,
                                 record_steps=step_trace_cells(networks[s].n_cells)
                                 if e.settings["strategy"] != "fixed" else None)
                    twin = _task(spec, s, e.settings, work_limit=e.work_limit, open_loop=reference)
                    points[s][id(e)] = (task, twin)
                    round_entries.append((s, e, task, twin))
                    todo += [task, twin]
            if not todo:
                break
            progress.grow_to(progress.done + len(todo) + _unscheduled(plans))
            for task, run in zip(todo, batch.run(todo)):
                by_digest[task["digest"]] = run
            if ladders is None:
                ladders = {s: ladder_doc(ref_runs[s][-1], probe_tasks[s], by_digest, s) for s in spec.seeds}
                yardsticks = {s: make_yardstick(ref_runs[s][-1], [by_digest[t["digest"]] for t in yard_tasks[s]])
                              for s in spec.seeds}
            for s in spec.seeds:
                for pilot, task in pilots[s]:
                    if pilot.status == "pending":
                        run = by_digest[task["digest"]]
                        pilot.status, pilot.t_reached_ms = run.status, run.t_stop_ms
                        pilot.work = _work(run)
            for s, e, task, twin in round_entries:
                ref, ref_digest = ref_runs[s][-1], ref_tasks[s][-1]["digest"]
                run, open_run = by_digest[task["digest"]], by_digest[twin["digest"]]
                doc = _comparison_doc(store, task["digest"], run, ref, ref_digest,
                                      ladders[s]["judged_window_ms"], COMPARE_OPTIONS)
                open_doc = _comparison_doc(store, twin["digest"], open_run, ref, ref_digest,
                                           ref.t_stop_ms - ref.t_start_ms, COMPARE_OPTIONS)
                plans[s].record(e, run.status, _work(run),
                                meets_target(run, doc, spec) and meets_target(open_run, open_doc, spec))
            for s in spec.seeds:
                plans[s].close_round()
    finally:
        if own:
            executor.close()
    table_points = {}
    for s in spec.seeds:
        rows = []
        for e in plans[s].entries:
            pair = points[s].get(id(e))
            if pair is None:  # skipped: never run, its prediction is the row
                task = _task(spec, s, e.settings, timed=True, work_limit=e.work_limit)
                twin = _task(spec, s, e.settings, work_limit=e.work_limit,
                             open_loop=(ref_tasks[s][-1]["digest"], ref_runs[s][-1]))
                for t in (task, twin):
                    by_digest[t["digest"]] = skipped_run(networks[s], t, e.message)
                pair = (task, twin)
            rows.append((e, *pair))
        table_points[s] = rows
    n_runs = batch.total_runs
    extra = dict(pilots=[dict(seed=s, label=setting_label(p.settings), t_stop_ms=p.t_stop_ms,
                              status=p.status, work=p.work, t_reached_ms=p.t_reached_ms,
                              predicted_work=p.predicted_work(spec.scenario.duration_ms))
                         for s in spec.seeds for p, _ in pilots[s]],
                 work_limit_factor=float(work_limit_factor))
    doc = evaluate(spec, store, ref_tasks, ref_runs, ladders, table_points, by_digest, out, extra,
                   yardsticks=yardsticks, ref_checks=ref_checks)
    doc["sweep"]["n_runs"] = n_runs
    this = dict(wall_s=time.perf_counter() - t_start, points_computed=batch.computed,
                failed_points_retried=batch.retried, executor=executor.description)
    doc.update(_timings(out, this, fresh))
    write_profile_json(out, doc)
    return doc


def _work(run) -> float:
    """Right-hand-side evaluations, Newton iterations and Jacobian evaluations of a run (NaN for
    a failed one)."""
    return (run.cost.get("rhs_evals", math.nan) + run.cost.get("newton_iters", 0)
            + run.cost.get("jacobian_evals", 0))


def _timings(out: Path, this: dict, fresh: bool) -> dict:
    """``timing`` of the run that first wrote the profile, and ``reruns``: every later run's own
    (a rerun that finds its points stored must not pass its seconds off as the profile's)."""
    import json

    try:
        old = json.loads((out / "profile.json").read_text())
    except (OSError, ValueError):
        old = {}
    if fresh or "timing" not in old:
        return dict(timing=this, reruns=[])
    return dict(timing=old["timing"], reruns=list(old.get("reruns", [])) + [this])


def _unscheduled(plans) -> int:
    """Entries of every seed still pending (a guess of the runs to come, for progress)."""
    return sum(1 for p in plans.values() for e in p.entries if e.status == "pending")


class _Progress:
    """The caller's progress object (``total(n)``, ``step(label)``), both optional; the total
    grows as the sweep adds rounds and settings, and never falls below what is done."""

    def __init__(self, target):
        self._total = getattr(target, "total", lambda n: None)
        self._step = getattr(target, "step", lambda label: None)
        self.n = 0
        self.done = 0

    def add(self, k: int) -> None:
        self.n = max(self.done, self.n + k)
        self._total(self.n)

    def grow_to(self, n: int) -> None:
        self.n = max(n, self.done)
        self._total(self.n)

    def step(self, label: str) -> None:
        self.done += 1
        self._step(label)
