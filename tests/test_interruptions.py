"""Interruptions lose nothing: ``spikegauge profile`` killed and restarted.

A profile of a small scenario is run once without interruption. A second
profile of the same scenario is killed (SIGKILL, no chance to clean up)
twice, each time after some more points have finished, and restarted; the
finished points must not be computed again (their files stay untouched and
the final run reports how many it computed), every stored file must load,
and the final ``results.csv`` must equal the uninterrupted run's in every
column but wall time. A third profile is stopped with SIGINT (Ctrl-C): it
must stop without a traceback, keep its finished points and say how to
resume.
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from spikegauge.runs import load_run
from spikegauge.profile.results import TIME_COLUMNS  # the only machine-dependent columns

SCENARIO = """
[scenario]
name = "interrupt-me"
duration_ms = 300.0
seed = 5

[[group]]
name = "exc"
size = 32
model = "lif-current"
[group.parameters]
i_bias_pa = { distribution = "uniform", low = 120.0, high = 180.0 }
[group.initial]
v_mv = { distribution = "uniform", low = -65.0, high = -52.0 }

[[group]]
name = "inh"
size = 8
model = "lif-current"
[group.parameters]
tau_m_ms = 10.0
i_bias_pa = 200.0

[[pathway]]
source = "exc"
target = "exc"
connect = "sources-per-target"
sources_per_target = 6
receptor = "excitatory"
weight_pa = 40.0
delay_ms = { distribution = "uniform", low = 1.0, high = 2.0 }

[[pathway]]
source = "exc"
target = "inh"
connect = "sources-per-target"
sources_per_target = 6
receptor = "excitatory"
weight_pa = 60.0
delay_ms = 1.0

[[pathway]]
source = "inh"
target = "exc"
connect = "sources-per-target"
sources_per_target = 4
receptor = "inhibitory"
weight_pa = 100.0
delay_ms = 1.0

[[drive]]
target = "exc"
kind = "poisson"
rate_hz = 800.0
receptor = "excitatory"
weight_pa = 30.0
"""

# The command line as a user runs it: what the spikegauge console script calls, run by
# this interpreter so the test does not depend on PATH.
COMMAND = [sys.executable, "-c", "from spikegauge.cli import main; main()"]
TIMEOUT_S = 300


def _env():
    env = dict(os.environ)
    # One numba thread: the profile runs alone, and results do not depend on the count.
    env["NUMBA_NUM_THREADS"] = "1"
    return env


def _profile(scenario, out, **popen):
    # A shell without job control starts a background job (`pytest ... &`) with SIGINT ignored,
    # and an ignored signal stays ignored in every child: the profile would never see Ctrl-C.
    # With a handler installed here, the child starts with the default, as under a terminal.
    previous = signal.signal(signal.SIGINT, signal.default_int_handler)
    try:
        return subprocess.Popen(COMMAND + ["profile", str(scenario), "--quick", "--quiet", "--out", str(out)],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_env(),
                                **popen)
    finally:
        signal.signal(signal.SIGINT, previous)


def _finished(out: Path) -> dict:
    """Finished points: digest -> (inode, mtime_ns) of their run.json."""
    points = out / "points"
    done = {}
    if points.is_dir():
        for d in points.iterdir():
            f = d / "run.json"
            if not d.name.startswith(".") and f.is_file():
                st = f.stat()
                done[d.name] = (st.st_ino, st.st_mtime_ns)
    return done


def _wait_for_points(proc, out: Path, n: int) -> None:
    deadline = time.monotonic() + TIMEOUT_S
    while len(_finished(out)) < n:
        if proc.poll() is not None:
            pytest.fail(f"the profile ended before {n} points were stored: {proc.stderr.read()}")
        if time.monotonic() > deadline:
            proc.kill()
            pytest.fail(f"fewer than {n} points after {TIMEOUT_S} s")
        time.sleep(0.02)


def _all_stored_files_load(out: Path) -> int:
    n = 0
    for d in (out / "points").iterdir():
        if d.name.startswith("."):
            continue        # a point being written when the process died: never read as a point
        run = load_run(d)
        assert run.status in ("ok", "diverged", "failed")
        for f in d.iterdir():
            assert f.stat().st_size > 0, f
            if f.suffix == ".json":
                json.loads(f.read_text())
            elif f.suffix == ".npz":
                with np.load(f, allow_pickle=False) as z:
                    for k in z.files:
                        z[k]
            elif f.suffix == ".csv":
                pd.read_csv(f)
        n += 1
    return n


def _results(out: Path) -> pd.DataFrame:
    return pd.read_csv(out / "results.csv").drop(columns=list(TIME_COLUMNS))


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    path = tmp_path_factory.mktemp("interrupt") / "small.toml"
    path.write_text(SCENARIO)
    return path


@pytest.fixture(scope="module")
def uninterrupted(scenario):
    out = scenario.parent / "whole"
    proc = _profile(scenario, out)
    _, err = proc.communicate(timeout=TIMEOUT_S)
    assert proc.returncode == 0, err
    return out


def test_sigkill_and_restart_recomputes_nothing_and_changes_nothing(scenario, uninterrupted):
    total = len(_finished(uninterrupted))
    assert total >= 20          # reference, ladder probes and the 8 quick-sweep points
    out = scenario.parent / "killed"
    kept = {}
    trials = 0
    for extra in (4, 6):
        proc = _profile(scenario, out)
        _wait_for_points(proc, out, len(kept) + extra)
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
        trials += 1
        now = _finished(out)
        # Points finished before this run are untouched by it: same file, same time.
        assert {d: now[d] for d in kept} == kept
        kept = now
        assert 0 < len(kept) < total, "kill the profile before it finishes"
        assert _all_stored_files_load(out) == len(kept)

    proc = _profile(scenario, out)
    _, err = proc.communicate(timeout=TIMEOUT_S)
    assert proc.returncode == 0, err
    final = _finished(out)
    assert {d: final[d] for d in kept} == kept            # not recomputed (files untouched)
    assert set(final) == set(_finished(uninterrupted))     # the same points, by digest
    doc = json.loads((out / "profile.json").read_text())
    assert doc["timing"]["points_computed"] == total - len(kept)
    assert _all_stored_files_load(out) == total
    pd.testing.assert_frame_equal(_results(out), _results(uninterrupted), check_exact=True)
    print(f"interruption: {trials} SIGKILL trials, {len(kept)} of {total} points kept and not recomputed")


def test_sigint_stops_cleanly_keeps_points_and_says_how_to_resume(scenario, uninterrupted):
    out = scenario.parent / "interrupted"
    proc = _profile(scenario, out)
    _wait_for_points(proc, out, 4)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode != 0
    assert "Traceback" not in err, err
    assert "resume" in err.lower() and str(out) in err, err
    kept = _finished(out)
    assert 0 < len(kept) < len(_finished(uninterrupted))
    assert _all_stored_files_load(out) == len(kept)
