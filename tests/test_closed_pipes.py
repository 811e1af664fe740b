"""A closed standard output or error ends the command line quietly with status 141.

``spikegauge simulate ... | head -1`` or ``spikegauge check ... 2>&1 | head -c 10``:
once the reader has gone, a write raises BrokenPipeError (Python ignores
SIGPIPE). The program must then end with 128 + SIGPIPE = 141, what a shell
reports for any writer whose reader left, with nothing on the terminal, never
"internal error" and never status 1, and the files it wrote must stay.

The pipes here are real: each command's stdout (and/or stderr) is the write end
of an ``os.pipe`` whose read end is closed before the child starts, so its first
write fails every time (a reader that leaves *after* reading, as ``head`` does,
races with the writer; whether that write fails is up to the scheduler, which a
test must not depend on). Each case runs several times.
"""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from spikegauge.cli.main import CLOSED_PIPE_STATUS, cli
from spikegauge.runs import load_run

COMMAND = [sys.executable, "-c", "from spikegauge.cli import main; main()"]
SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
REPEATS = 2
TIMEOUT_S = 300

BAD = """
[scenario]
name = "bad"
duration_ms = 10.0

[[group]]
name = "cells"
size = -4
model = "lif-current"
"""


def _closed_pipe():
    """The write end of a pipe that has no reader any more."""
    r, w = os.pipe()
    os.close(r)
    return w


def _run(args, close_stdout=True, close_stderr=False):
    """Run the command line with the chosen streams closed; returns (status, stderr text)."""
    out = _closed_pipe() if close_stdout else subprocess.DEVNULL
    err = _closed_pipe() if close_stderr else subprocess.PIPE
    try:
        proc = subprocess.run(COMMAND + [str(a) for a in args], stdout=out, stderr=err,
                              timeout=TIMEOUT_S)
    finally:
        for fd in (out, err):
            if isinstance(fd, int) and fd >= 0:
                os.close(fd)
    return proc.returncode, (proc.stderr or b"").decode()


def test_closed_stdout_after_simulate_keeps_the_run_and_exits_141(tmp_path):
    for k in range(REPEATS):
        out = tmp_path / f"run{k}"
        status, err = _run(["simulate", SCENARIOS / "demo-lif.toml", "--quiet", "--out", out])
        assert status == CLOSED_PIPE_STATUS, err
        assert err == ""
        run = load_run(out)                       # written before the summary was printed
        assert run.status == "ok" and len(run.spikes) > 0


@pytest.mark.parametrize("args", [["check", SCENARIOS / "demo-lif.toml", "--json"], ["--help"]])
def test_closed_stdout_exits_141_quietly(args):
    for _ in range(REPEATS):
        status, err = _run(args)
        assert (status, err) == (CLOSED_PIPE_STATUS, "")


def test_closed_stdout_and_stderr_exit_141(tmp_path):
    # `spikegauge check ... 2>&1 | head -c 10`: both streams lose their reader.
    bad = tmp_path / "bad.toml"
    bad.write_text(BAD)
    for args in (["check", SCENARIOS / "demo-lif.toml"], ["check", bad]):
        for _ in range(REPEATS):
            status, _ = _run(args, close_stderr=True)
            assert status == CLOSED_PIPE_STATUS, args


def test_closed_stderr_alone_exits_141(tmp_path):
    # The one-line error message (bad input, a usage error) cannot be written.
    bad = tmp_path / "bad.toml"
    bad.write_text(BAD)
    for args in (["check", bad], ["check", "--no-such-option"]):
        for _ in range(REPEATS):
            status, _ = _run(args, close_stdout=False, close_stderr=True)
            assert status == CLOSED_PIPE_STATUS, args


def test_open_streams_keep_their_statuses(tmp_path):
    # The same commands with a reader present: the usual statuses, not 141.
    bad = tmp_path / "bad.toml"
    bad.write_text(BAD)
    status, err = _run(["check", bad], close_stdout=False)
    assert status == 2 and err.startswith("error: ")
    status, err = _run(["check", SCENARIOS / "demo-lif.toml"], close_stdout=False)
    assert status == 0 and err == ""


def test_a_broken_pipe_of_our_own_is_still_an_internal_error(monkeypatch, tmp_path):
    # A BrokenPipeError from a pipe that is not stdout or stderr (a worker process that died)
    # is a bug to report, not a reader that left.
    import spikegauge.summary

    def broken(*_args, **_kwargs):
        raise BrokenPipeError(32, "Broken pipe")

    monkeypatch.setattr(spikegauge.summary, "summarize", broken)
    res = CliRunner().invoke(cli, ["check", str(SCENARIOS / "demo-lif.toml")])
    assert res.exit_code == 1
    assert res.output.startswith("internal error: BrokenPipeError")
