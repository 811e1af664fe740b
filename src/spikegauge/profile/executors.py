"""Where the points of a profile run: in this process, in local processes, or on Dask.

Every executor runs :func:`execute_task` on plain-dict tasks and yields
``(index, Run)`` as runs finish, in any order; the caller stores them and
sorts its table by index, so the order of completion never shows in a
result. A task carries the scenario text, not a path to shared state, so a
Dask cluster needs no shared file system (files the scenario itself names
must be readable on the workers).

Compilation happens once per worker process: kernels are cached on disk
(``cache=True``) and each process keeps its compiled dispatchers, and the
engine reports compilation time apart from ``wall_s``.
"""
from __future__ import annotations

import dataclasses
import os
import re
import threading
from functools import partial
from concurrent.futures import ProcessPoolExecutor, as_completed
from multiprocessing import get_context

import numpy as np
import pandas as pd

from ..errors import InputError
from ..runs import Run
from .cost import timed_run

_NETWORKS: dict = {}
# numba's default threading layer does not allow parallel kernels launched from two
# threads at once (a Dask worker with several threads would do that), and a point's CPU
# time must be its own: one run at a time per process, on one numba thread.
_RUN_LOCK = threading.Lock()


def _network(task: dict):
    from ..network import build_network
    from ..scenario import parse_scenario

    key = (task["scenario_digest"], task["seed"])
    if key not in _NETWORKS:
        scen = parse_scenario(task["scenario_text"], source=task["scenario_source"])
        _NETWORKS.clear()  # one scenario and seed at a time is what a profile needs
        _NETWORKS[key] = build_network(dataclasses.replace(scen, seed=int(task["seed"])))
    return _NETWORKS[key]


def execute_task(task: dict) -> Run:
    """Run one point. An error inside the run is a ``failed`` run, never an exception.

    Parameters
    ----------
    task : dict
        ``scenario_text``, ``scenario_source``, ``scenario_digest``, ``seed``,
        ``settings`` (resolved), ``probe`` (dict or None), ``record_steps``
        (list of cells or None), ``threads`` (int or None), ``timed`` (repeat
        the run until its CPU time is known, :func:`.cost.timed_run`), ``work_limit``
        and ``t_stop_ms`` (None or a number, passed to ``simulate``), ``open_loop`` (the
        reference's digest) with ``open_loop_raster`` (its ``cell`` and ``time_ms``
        lists): an open-loop run replaying them.
    """
    from ..simulation import simulate
    from .reference import apply_probe

    with _RUN_LOCK:
        net = None
        try:
            net = _network(task)
            if task.get("probe"):
                net = apply_probe(net, task["probe"])
            s = task["settings"]
            run_once = partial(simulate, net, strategy=s["strategy"], stepper=s.get("stepper"),
                               dt_ms=s.get("dt_ms"), crossing=s.get("crossing"), delivery=s.get("delivery"),
                               rtol=s.get("rtol"), atol=s.get("atol"), threads=task.get("threads"),
                               record_steps=task.get("record_steps"), work_limit=task.get("work_limit"),
                               t_stop_ms=task.get("t_stop_ms"), open_loop=_replayed(task))
            run = timed_run(run_once) if task.get("timed") else run_once()
        except Exception as exc:  # a failing point is a row, not a crash of the sweep
            run = failed_run(net, task, error_message(exc))
    run.meta.update(scenario_digest=task["scenario_digest"], scenario_text=task["scenario_text"],
                    seed=int(task["seed"]),
                    probe=task.get("probe"), scenario_name=task.get("scenario_name"))
    return run


def _replayed(task: dict):
    """The (cell, time_ms) arrays an open-loop point replays, or None."""
    raster = task.get("open_loop_raster")
    if raster is None:
        return None
    return np.asarray(raster["cell"], dtype=np.int64), np.asarray(raster["time_ms"], dtype=np.float64)


_ANSI = re.compile(r"\x1b\[[0-9;]*m")
MAX_MESSAGE = 400


def error_message(exc: BaseException) -> str:
    """One line naming the error: its type and first line, and the innermost error
    line when the text nests several (numba's typing errors do)."""
    lines = [ln.strip() for ln in _ANSI.sub("", str(exc)).splitlines() if ln.strip()]
    msg = f"{type(exc).__name__}: {lines[0] if lines else ''}"
    inner = [ln for ln in lines[1:] if re.match(r"^[A-Za-z]\w*(Error|Exception): ", ln)]
    if inner:
        msg += f" ({inner[0]})"
    return msg[:MAX_MESSAGE]


def failed_run(network, task: dict, message: str) -> Run:
    """An empty run with status ``failed`` and the error message."""
    n = int(network.n_cells) if network is not None else 0
    first = np.asarray(network.group_first) if network is not None else np.zeros(1, np.int64)
    names = tuple(network.group_names) if network is not None else ()
    return Run(spikes=pd.DataFrame({"cell": np.empty(0, np.int64), "time_ms": np.empty(0)}),
               n_cells=n, t_start_ms=0.0, t_stop_ms=0.0, group_names=names, group_first=first,
               settings=dict(task["settings"]), status="failed", message=message, cost={})


def skipped_run(network, task: dict, message: str) -> Run:
    """The row of a setting the sweep decided not to run (status ``skipped``)."""
    run = failed_run(network, task, message)
    run.status = "skipped"
    return run


class SerialExecutor:
    """Runs every task in this process, one after the other."""

    description = "serial"

    def run(self, tasks):
        for i, task in enumerate(tasks):
            yield i, execute_task(task)

    def close(self):
        pass


class ProcessExecutor:
    """Runs tasks in ``jobs`` local worker processes (``--jobs N``).

    Each worker runs one point at a time on one numba thread (the task says
    so), so ``jobs`` workers keep ``jobs`` cores busy. Workers are started
    with ``spawn``: numba's thread pool is not safe to fork.
    """

    def __init__(self, jobs: int):
        if int(jobs) < 1:
            raise InputError(f"--jobs: must be at least 1, got {jobs}")
        self.jobs = int(jobs)
        self.description = f"{self.jobs} local processes"
        self._pool = None

    def run(self, tasks):
        if self._pool is None:
            self._pool = ProcessPoolExecutor(max_workers=self.jobs, mp_context=get_context("spawn"))
        futures = {self._pool.submit(execute_task, t): i for i, t in enumerate(tasks)}
        try:
            for fut in as_completed(futures):
                yield futures[fut], fut.result()
        finally:
            for fut in futures:
                fut.cancel()

    def close(self):
        if self._pool is not None:
            self._pool.shutdown(cancel_futures=True)
            self._pool = None


DASK_EXTRA = "distributed"
"""The optional extra that installs what ``--scheduler`` needs (pyproject.toml)."""

CONNECT_TIMEOUT_S = 10
"""Seconds to wait for the scheduler before giving up: a scheduler on a reachable host
answers within a second; what does not answer in 10 s is a wrong address or a firewall."""


class DaskExecutor:
    """Runs tasks on a Dask distributed cluster (``--scheduler ADDRESS``).

    Parameters
    ----------
    address : str
        The scheduler's address, e.g. ``tcp://10.0.0.5:8786``.

    Raises
    ------
    InputError
        Dask's ``distributed`` package is not installed (the message names the
        extra to install), or the scheduler cannot be reached within
        :data:`CONNECT_TIMEOUT_S` (a closed port, a wrong host, a malformed address).
    """

    def __init__(self, address: str):
        try:
            from distributed import Client
        except ImportError:
            raise InputError(f"--scheduler: needs Dask's distributed scheduler, which is not installed; "
                             f"install it with: pip install \"spikegauge[{DASK_EXTRA}]\"") from None
        try:
            self._client = Client(address, timeout=f"{CONNECT_TIMEOUT_S}s")
        except Exception as exc:  # refused, timed out, unknown scheme, bad host: all a wrong address
            why = " ".join(str(exc).split()) or type(exc).__name__
            raise InputError(f"--scheduler: cannot reach the Dask scheduler at {address}: {why}") from None
        self.description = f"Dask scheduler {address}"

    def run(self, tasks):
        from distributed import as_completed as dask_completed

        futures = [self._client.submit(execute_task, t, pure=False) for t in tasks]
        index = {f.key: i for i, f in enumerate(futures)}
        try:
            for fut, run in dask_completed(futures, with_results=True):
                yield index[fut.key], run
        finally:
            for f in futures:
                f.cancel()

    def close(self):
        self._client.close()


def default_jobs() -> int:
    """Worker processes when ``--jobs`` is not given: the cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not every platform has affinity masks
        return max(1, os.cpu_count() or 1)


def make_executor(jobs: int | None = None, scheduler: str | None = None):
    """The executor for ``--jobs`` / ``--scheduler``: Dask, local processes (default:
    one per core), or this process alone (``--jobs 1``)."""
    if jobs is not None and scheduler is not None:
        raise InputError("--jobs and --scheduler: give one or the other")
    if scheduler is not None:
        return DaskExecutor(scheduler)
    jobs = default_jobs() if jobs is None else jobs
    if int(jobs) < 1:
        raise InputError(f"--jobs: must be at least 1, got {jobs}")
    if int(jobs) > 1:
        return ProcessExecutor(jobs)
    return SerialExecutor()
