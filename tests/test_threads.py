"""The default thread count and the threading set-up (threads.py, _numba.py).

How fast a thread count runs is the benchmark's business (no timing here);
these check the rules: one thread below 2 * CELLS_PER_THREAD cells, never
more than numba allows or than the cores other programs leave free, and the
OpenMP wait policy passive unless the user chose one. That results do not
depend on the thread count is checked in test_reproducibility.py.
"""
from __future__ import annotations

import os
import subprocess
import sys

import numba
import pytest

import spikegauge.threads as threads
from spikegauge import simulate
from spikegauge.threads import CELLS_PER_THREAD, default_threads, usable_cores

TEN_CELLS = """
[scenario]
name = "ten"
duration_ms = 5.0
seed = 1

[[group]]
name = "cells"
size = 10
model = "lif-current"
[group.parameters]
i_bias_pa = 400.0
"""


def test_small_networks_run_on_one_thread(monkeypatch):
    monkeypatch.setattr(threads, "usable_cores", lambda: 64)
    for n in (0, 1, CELLS_PER_THREAD, 2 * CELLS_PER_THREAD - 1):
        assert default_threads(n) == 1


def test_the_default_never_exceeds_numba_threads_or_free_cores(monkeypatch):
    big = 1000 * CELLS_PER_THREAD
    monkeypatch.setattr(threads, "usable_cores", lambda: 1)
    assert default_threads(big) == 1                        # the other cores are busy
    monkeypatch.setattr(threads, "usable_cores", lambda: 64)
    assert default_threads(big) == numba.get_num_threads()  # all numba allows
    assert default_threads(3 * CELLS_PER_THREAD) == min(3, numba.get_num_threads())
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)                            # the caller's limit holds
        assert default_threads(big) == 1
    finally:
        numba.set_num_threads(before)


def test_usable_cores_count_what_other_programs_leave(monkeypatch):
    n = usable_cores()
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:
        cores = os.cpu_count()
    assert 1 <= n <= cores
    monkeypatch.setattr(threads, "_busy_elsewhere", lambda: cores + 5)
    assert usable_cores() == 1                              # never fewer than one
    monkeypatch.setattr(threads, "_busy_elsewhere", lambda: 0)
    assert usable_cores() == cores


def test_a_run_records_the_threads_it_used(tmp_path):
    path = tmp_path / "ten.toml"
    path.write_text(TEN_CELLS)
    assert simulate(path).settings["threads"] == 1          # 10 cells: one thread
    if numba.config.NUMBA_NUM_THREADS >= 2:
        assert simulate(path, threads=2).settings["threads"] == 2   # asked for: given


@pytest.mark.parametrize("user, expected", [(None, "PASSIVE"), ("ACTIVE", "ACTIVE")])
def test_openmp_wait_policy_is_passive_unless_chosen(user, expected):
    env = {k: v for k, v in os.environ.items() if k != "OMP_WAIT_POLICY"}
    if user is not None:
        env["OMP_WAIT_POLICY"] = user
    code = "import os, spikegauge._numba; print(os.environ['OMP_WAIT_POLICY'])"
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == expected
