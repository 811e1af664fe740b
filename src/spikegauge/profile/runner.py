"""Run a profile: reference, sensitivity ladder and sweep, then the results table.

:func:`run_profile` is what ``spikegauge profile`` calls. It works in three
stages, each a batch of points handed to an executor (serial, local
processes or Dask; :mod:`.executors`) and kept in the point store
(:mod:`.store`), so an interrupted profile resumes where it stopped:

1. the reference runs of every seed (:mod:`.reference`);
2. the ladder probes (they perturb the reference's spikes) and the sweep
   points of every seed;
3. comparisons of every point with its seed's reference, over the whole run
   and over the judged window (the target-sized probe's median horizon),
   written to ``results.csv`` and ``profile.json`` (:mod:`.results`).

Only wall-time columns depend on the machine, the executor or on how often a
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
from .executors import make_executor
from .reference import ladder_probes, reference_settings
from .store import PointStore, point_digest
from .sweep import default_sweep, load_sweep_file, parse_sweep, quick_sweep, setting_label, split_sweep_table

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
    import hashlib

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
                       scenario_digest=hashlib.sha256(text.encode()).hexdigest(), sweep=sweep,
                       sweep_source=source, seeds=[scen.seed + k for k in range(int(seeds))],
                       target_jitter_ms=float(target_jitter_ms),
                       target_mismatch_frac=float(target_mismatch_frac))


def _task(spec: ProfileSpec, seed: int, settings: dict, probe=None, record_steps=None, timed=False):
    t = dict(scenario_text=spec.scenario_text, scenario_source=str(spec.scenario.path or ""),
             scenario_digest=spec.scenario_digest, scenario_name=spec.scenario.name, seed=int(seed),
             settings=dict(settings), probe=probe, record_steps=record_steps, version=__version__,
             threads=THREADS, timing=COST_METHOD if timed else None, timed=timed)
    if not t["scenario_source"]:
        t["scenario_source"] = None
    t["digest"] = point_digest(t)
    return t


def _label(task) -> str:
    if task["probe"]:
        p = task["probe"]
        return f"seed {task['seed']} reference perturbed ({p['kind']}, cell {p['cell']})"
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

    def run(self, tasks):
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
                progress=None, executor=None) -> dict:
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
        Local worker processes.
    scheduler : str, optional
        Address of a Dask scheduler.
    target_jitter_ms, target_mismatch_frac : float
        Accuracy target: RMS jitter (ms) and missed + extra fraction.
    fresh : bool
        Recompute points already stored.
    progress : object, optional
        ``progress.total(n)`` and ``progress.step(label)`` are called as points finish.
    executor : optional
        An executor object (tests); overrides ``jobs`` and ``scheduler``.

    Returns
    -------
    dict
        The profile document written to ``profile.json``.
    """
    from .results import evaluate

    t_start = time.perf_counter()
    spec = prepare(scenario_path, sweep_file=sweep_file, quick=quick, seeds=seeds,
                   target_jitter_ms=target_jitter_ms, target_mismatch_frac=target_mismatch_frac)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    store = PointStore(out)
    own = executor is None
    executor = make_executor(jobs, scheduler) if own else executor
    networks = {s: build_network(dataclasses.replace(spec.scenario, seed=s)) for s in spec.seeds}
    ref_settings = reference_settings(spec.model_names)
    n_probes_guess = 15
    total = len(spec.seeds) * (len(ref_settings) + n_probes_guess + len(spec.sweep))
    prog_total = getattr(progress, "total", lambda n: None)
    prog_step = getattr(progress, "step", lambda label: None)
    prog_total(total)
    batch = _Batch(store, executor, fresh, prog_step)
    try:
        ref_tasks = {s: [_task(spec, s, rs) for rs in ref_settings] for s in spec.seeds}
        flat = [t for s in spec.seeds for t in ref_tasks[s]]
        runs = batch.run(flat)
        ref_runs = {s: runs[i * len(ref_settings):(i + 1) * len(ref_settings)] for i, s in enumerate(spec.seeds)}
        probes = {s: ladder_probes(networks[s], ref_runs[s][-1], spec.target_jitter_ms)
                  if ref_runs[s][-1].status == "ok" else [] for s in spec.seeds}
        probe_tasks = {s: [_task(spec, s, ref_settings[-1], probe=p) for p in probes[s]]
                       for s in spec.seeds}
        point_tasks = {s: [_task(spec, s, st, timed=True,
                                 record_steps=step_trace_cells(networks[s].n_cells)
                                 if st["strategy"] != "fixed" else None)
                           for st in spec.sweep] for s in spec.seeds}
        prog_total(len(flat) + sum(len(probe_tasks[s]) + len(point_tasks[s]) for s in spec.seeds))
        flat2 = [t for s in spec.seeds for t in probe_tasks[s] + point_tasks[s]]
        runs2 = batch.run(flat2)
    finally:
        if own:
            executor.close()
    by_digest = {t["digest"]: r for t, r in zip(flat2, runs2)}
    doc = evaluate(spec, store, networks, ref_tasks, ref_runs, probe_tasks, point_tasks, by_digest, out)
    doc["timing"] = dict(wall_s=time.perf_counter() - t_start, points_computed=batch.computed,
                         failed_points_retried=batch.retried,
                         executor=executor.description)
    from .results import write_profile_json

    write_profile_json(out, doc)
    return doc
