"""Profiles on a Dask cluster as a user starts one: ``dask scheduler`` and ``dask worker``.

The other Dask tests use an in-process cluster. Here the scheduler and the
workers are separate processes started with Dask's own command-line tools on
127.0.0.1 (ports chosen by the system, the address passed through a
scheduler file), one thread per worker and no nanny, so a SIGKILL really
kills the worker. The worker is killed while the profile runs, another is
started, and the profile must finish with the table of a serial run (time
columns aside) and every point computed once. Also: ``--scheduler`` without
Dask installed, and an address where no scheduler listens.

Every wait is bounded, and every process started here is killed at the end.
"""
from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner

import spikegauge.cli.profile  # noqa: F401  (registers the command)
from spikegauge.cli.main import cli
from spikegauge.profile import run_profile
from spikegauge.profile.executors import DASK_EXTRA

from test_interruptions import SCENARIO

COMMAND = [sys.executable, "-c", "from spikegauge.cli import main; main()"]
DASK = [sys.executable, "-m", "dask"]
START_TIMEOUT_S = 120
PROFILE_TIMEOUT_S = 400


def _time_free(table: pd.DataFrame) -> pd.DataFrame:
    """Drop the columns that depend on the machine's speed (names with wall, cpu, compile, per_s)."""
    timed = [c for c in table.columns if any(w in c for w in ("wall", "cpu", "compile", "per_s"))]
    return table.drop(columns=timed)


def _env():
    env = dict(os.environ)
    env["NUMBA_NUM_THREADS"] = "1"      # one thread per worker process, as --nthreads 1
    return env


def _points(out: Path) -> list[str]:
    d = out / "points"
    return sorted(p.name for p in d.iterdir() if not p.name.startswith(".")
                  and (p / "run.json").is_file()) if d.is_dir() else []


def _wait(predicate, what: str, procs=(), timeout=START_TIMEOUT_S):
    deadline = time.monotonic() + timeout
    while not predicate():
        for p in procs:
            if p.poll() is not None:
                pytest.fail(f"{what}: a process ended early (status {p.returncode}): "
                            f"{_tail(p)}")
        if time.monotonic() > deadline:
            pytest.fail(f"{what}: not within {timeout} s")
        time.sleep(0.05)


def _tail(proc) -> str:
    path = getattr(proc, "log_path", None)
    return path.read_text()[-2000:] if path is not None and path.exists() else ""


class _Processes:
    """Processes started by a test, all killed when it ends."""

    def __init__(self, folder: Path):
        self.folder, self.procs = folder, []

    def start(self, name: str, args, **kw):
        log = self.folder / f"{name}.log"
        with open(log, "wb") as fh:
            proc = subprocess.Popen(args, stdout=fh, stderr=subprocess.STDOUT, env=_env(),
                                    cwd=self.folder, **kw)
        proc.log_path = log
        self.procs.append(proc)
        return proc

    def close(self):
        for p in self.procs:
            if p.poll() is None:
                p.kill()
        for p in self.procs:
            try:
                p.wait(timeout=30)
            except subprocess.TimeoutExpired:
                pass


def _worker(procs: _Processes, name: str, scheduler_file: Path):
    return procs.start(name, DASK + ["worker", "--scheduler-file", str(scheduler_file), "--nthreads", "1",
                                     "--no-nanny", "--no-dashboard", "--name", name,
                                     "--local-directory", str(procs.folder / name)])


def _workers(scheduler_file: Path) -> int:
    """Workers the scheduler knows (asked through a short-lived client)."""
    from distributed import Client

    with Client(scheduler_file=str(scheduler_file), timeout="10s") as client:
        return len(client.scheduler_info(n_workers=-1)["workers"])


def test_profile_survives_a_killed_worker_on_a_real_cluster(tmp_path):
    scen = tmp_path / "small.toml"
    scen.write_text(SCENARIO)
    serial = tmp_path / "serial"
    run_profile(scen, serial, quick=True)
    n_points = len(_points(serial))

    procs = _Processes(tmp_path)
    try:
        sched_file = tmp_path / "scheduler.json"
        scheduler = procs.start("scheduler", DASK + ["scheduler", "--host", "127.0.0.1", "--port", "0",
                                                     "--no-dashboard", "--scheduler-file", str(sched_file)])
        _wait(lambda: sched_file.is_file() and sched_file.stat().st_size > 0, "scheduler file", [scheduler])
        address = json.loads(sched_file.read_text())["address"]
        assert address.startswith("tcp://127.0.0.1:")
        first = _worker(procs, "first", sched_file)
        _wait(lambda: _workers(sched_file) == 1, "first worker", [scheduler, first])

        out = tmp_path / "cluster"
        profile = procs.start("profile", COMMAND + ["profile", str(scen), "--quick", "--quiet", "--out", str(out),
                                                    "--scheduler", address])
        # Mid-profile: some points stored, most still to come.
        _wait(lambda: len(_points(out)) >= 2, "first points", [scheduler, first, profile],
              timeout=PROFILE_TIMEOUT_S)
        first.send_signal(signal.SIGKILL)
        first.wait(timeout=30)
        stored_at_kill = len(_points(out))
        assert stored_at_kill < n_points, "the worker must die before the profile ends"
        assert profile.poll() is None
        second = _worker(procs, "second", sched_file)
        _wait(lambda: profile.poll() is not None, "profile after the second worker started",
              [scheduler, second], timeout=PROFILE_TIMEOUT_S)
        assert profile.returncode == 0, _tail(profile)
    finally:
        procs.close()

    # The same table as the serial run, every point computed once.
    pd.testing.assert_frame_equal(_time_free(pd.read_csv(out / "results.csv")),
                                  _time_free(pd.read_csv(serial / "results.csv")), check_exact=True)
    assert _points(out) == _points(serial)
    timing = json.loads((out / "profile.json").read_text())["timing"]
    assert timing["points_computed"] == n_points          # one save per point: none computed twice
    assert not [p for p in (out / "points").iterdir() if p.name.startswith(".")]   # no half-written point
    print(f"real cluster: worker killed with {stored_at_kill} of {n_points} points stored")


def test_scheduler_without_dask_names_the_extra(tmp_path, monkeypatch):
    from test_profile import TINY

    scen = tmp_path / "tiny.toml"
    scen.write_text(TINY)
    monkeypatch.setitem(sys.modules, "distributed", None)        # `import distributed` fails
    res = CliRunner().invoke(cli, ["profile", str(scen), "--quick", "--quiet", "--out", str(tmp_path / "p"),
                                   "--scheduler", "tcp://127.0.0.1:8786"])
    assert res.exit_code == 2, res.output
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: --scheduler:"), res.stderr
    assert f'pip install "spikegauge[{DASK_EXTRA}]"' in lines[0]


def test_unreachable_scheduler_is_one_line_and_status_2(tmp_path):
    from test_profile import TINY

    scen = tmp_path / "tiny.toml"
    scen.write_text(TINY)
    with socket.socket() as s:          # a loopback port nobody listens on once closed
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    address = f"tcp://127.0.0.1:{port}"
    res = subprocess.run(COMMAND + ["profile", str(scen), "--quick", "--quiet", "--out", str(tmp_path / "p"),
                                    "--scheduler", address], capture_output=True, text=True,
                         timeout=PROFILE_TIMEOUT_S, env=_env())
    assert res.returncode == 2, res.stderr
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, res.stderr
    assert lines[0].startswith(f"error: --scheduler: cannot reach the Dask scheduler at {address}")
    assert "Traceback" not in res.stdout + res.stderr
