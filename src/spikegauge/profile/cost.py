"""What a setting costs, measured as users pay it: CPU seconds of one thread.

A point of a profile runs on one numba thread (points run in parallel
across worker processes instead), so its process CPU time is the time of
that one thread and does not depend on how many other points share the
machine. Compilation is left out (:class:`spikegauge.simulation.CompileTimer`).
A short run is repeated until the repeats add up to ``MIN_TOTAL_CPU_S`` or
``MAX_REPEATS`` runs were made; the minimum is kept (the least disturbed
run) and the spread recorded. A run that had to compile or load kernels
is repeated once more if it took less than ``FIRST_RUN_REPEAT_BELOW_S``: the
first run of a kernel in a process pays for more than its compilation
(about 20 ms here, loading and first-touch of its code and data). Repeats give bit-identical spikes; only the
first run is stored.

``work`` (right-hand-side evaluations, Newton iterations and Jacobian evaluations) stays beside
the seconds as the figure that carries over to another machine.
"""
from __future__ import annotations

MIN_TOTAL_CPU_S = 0.2
"""Repeat a run until its CPU seconds add up to this much (s)..."""
MAX_REPEATS = 5
"""... or until it ran this many times."""
FIRST_RUN_REPEAT_BELOW_S = 2.0
"""A first run that compiled and took less than this (s) is repeated once at least."""
THREADS = 1
"""Numba threads of every profile point."""
COST_METHOD = "cpu-1-thread-min-of-repeats"
"""Part of a timed point's digest: points measured another way are run again."""


def timed_run(run_once, min_total_s: float = MIN_TOTAL_CPU_S, max_repeats: int = MAX_REPEATS):
    """Run ``run_once()`` (returning a :class:`~spikegauge.runs.Run`) until its CPU time is known.

    Returns
    -------
    Run
        The first run, its ``cost`` updated with ``cpu_s`` (the least CPU
        seconds of the repeats), ``cpu_spread`` ((largest - least) / least)
        and ``cpu_repeats``. A run that did not end ``ok`` is not repeated.
    """
    first = run_once()
    times = [float(first.cost["cpu_s"])]
    cold = first.cost.get("compile_s", 0.0) > 0 and times[0] < FIRST_RUN_REPEAT_BELOW_S
    while first.status == "ok" and len(times) < max_repeats and (sum(times) < min_total_s or cold):
        cold = False
        times.append(float(run_once().cost["cpu_s"]))
    least = min(times)
    first.cost.update(cpu_s=least, cpu_spread=(max(times) - least) / least if least > 0 else 0.0,
                      cpu_repeats=len(times))
    return first
