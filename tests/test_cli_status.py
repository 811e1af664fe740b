"""Exit status and error output of the command line.

Contract (issue 8, errors.py): 0 on success; 2 with a one-line message for a
usage or input error; 1 for a computation that could not be carried out; a
traceback only with ``--debug``. A scenario too large for the machine is
refused before anything is allocated, with the estimate and the option that
overrides the check.
"""
from __future__ import annotations

import resource
import subprocess
import sys

import pytest
from click.testing import CliRunner

from spikegauge.cli.main import cli
from spikegauge.errors import ComputationError, InputError
from spikegauge.scenario import load_scenario

SMALL = """
[scenario]
name = "small"
duration_ms = 20.0
seed = 1

[[group]]
name = "cells"
size = 4
model = "lif-current"
[group.parameters]
i_bias_pa = 400.0
"""

# 10^6 cells with 2000 inputs each: 2e9 synapses, far beyond any test machine.
HUGE = """
[scenario]
name = "huge"
duration_ms = 10.0
seed = 1

[[group]]
name = "cells"
size = 1000000
model = "lif-current"

[[pathway]]
source = "cells"
target = "cells"
connect = "sources-per-target"
sources_per_target = 2000
receptor = "excitatory"
weight_pa = 1.0
delay_ms = 1.0
"""


@pytest.fixture
def files(tmp_path):
    small = tmp_path / "small.toml"
    small.write_text(SMALL)
    bad = tmp_path / "bad.toml"
    bad.write_text(SMALL.replace("size = 4", "size = -4"))
    huge = tmp_path / "huge.toml"
    huge.write_text(HUGE)
    return dict(small=small, bad=bad, huge=huge, dir=tmp_path)


def invoke(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def _lines(text: str) -> list[str]:
    return [line for line in text.splitlines() if line.strip()]


def test_success_exits_0(files):
    res = invoke("check", files["small"])
    assert res.exit_code == 0, res.output
    assert "Traceback" not in res.output


@pytest.mark.parametrize("case", ["bad-value", "missing-file", "bad-toml", "bad-option-value",
                                  "adaptive-option-for-fixed", "bad-spike-file"])
def test_input_errors_exit_2_with_one_line(files, case):
    d = files["dir"]
    (d / "broken.toml").write_text("[scenario\nname = 1\n")
    (d / "ref.csv").write_text("cell,time_ms\n0,1.0\n")
    (d / "bad.csv").write_text("cell,time_ms\n0,1.0\n-3,2.0\n")
    args = {
        "bad-value": ["check", files["bad"]],
        "missing-file": ["check", d / "nowhere.toml"],
        "bad-toml": ["check", d / "broken.toml"],
        "bad-option-value": ["check", files["small"], "--max-memory-gb", "-1"],
        "adaptive-option-for-fixed": ["simulate", files["small"], "--strategy", "fixed", "--rtol", "1e-3",
                                      "--out", d / "run"],
        "bad-spike-file": ["compare", d / "ref.csv", d / "bad.csv", "--t-stop-ms", "10", "--out", d / "o"],
    }[case]
    res = invoke(*args)
    assert res.exit_code == 2, (res.output, res.exception)
    lines = _lines(res.output)
    assert len(lines) == 1, res.output
    assert lines[0].startswith("error: ") and "Traceback" not in res.output
    # The message names what is wrong: the file (and key or line), or the option.
    named = {"bad-value": "group[0].size", "missing-file": "nowhere.toml", "bad-toml": "line 1",
             "bad-option-value": "max_memory_gb", "adaptive-option-for-fixed": "rtol",
             "bad-spike-file": "bad.csv: line 3"}[case]
    assert named in lines[0], lines[0]


def test_usage_errors_exit_2_without_traceback(files):
    for args in (["check"], ["check", files["small"], "--no-such-option"], ["no-such-command"],
                 ["simulate", files["small"], "--strategy", "sideways", "--out", files["dir"] / "r"]):
        res = invoke(*args)
        assert res.exit_code == 2, (args, res.output)
        assert "Traceback" not in res.output
        # click's usage text may precede it, but the error itself is one line.
        errors = [line for line in _lines(res.output) if line.startswith("Error:")]
        assert len(errors) == 1, res.output


def test_failed_computation_exits_1_with_one_line(files, monkeypatch):
    # ComputationError is the library's "could not be carried out" (errors.py);
    # the command line must turn it into status 1 and one line wherever it comes from.
    import spikegauge.network

    def fail(scenario):
        raise ComputationError("no resting state found for hh-squid with these parameters")

    monkeypatch.setattr(spikegauge.network, "build_network", fail)
    res = invoke("check", files["small"])
    assert res.exit_code == 1, res.output
    assert _lines(res.output) == ["failed: no resting state found for hh-squid with these parameters"]


def test_an_unexpected_error_is_one_line_and_a_traceback_only_with_debug(files, monkeypatch):
    # A bug of ours (any other exception) must not reach the user as a raw traceback.
    import spikegauge.network

    def crash(scenario):
        raise ZeroDivisionError("float division by zero")

    monkeypatch.setattr(spikegauge.network, "build_network", crash)
    res = invoke("check", files["small"])
    assert res.exit_code == 1
    lines = _lines(res.output)
    assert len(lines) == 1 and "ZeroDivisionError" in lines[0] and "--debug" in lines[0], res.output
    res = invoke("--debug", "check", files["small"])
    assert isinstance(res.exception, ZeroDivisionError)


def test_a_traceback_only_with_debug(files):
    res = invoke("--debug", "check", files["bad"])
    # With --debug the exception is let through (CliRunner catches it; a shell shows its traceback).
    assert isinstance(res.exception, InputError) and res.exit_code == 1
    res = invoke("check", files["bad"])
    assert res.exit_code == 2 and (res.exception is None or isinstance(res.exception, SystemExit))


def test_real_console_script(files):
    """The installed ``spikegauge`` script itself: status codes and stderr, no CliRunner."""
    exe = [sys.executable, "-c", "from spikegauge.cli import main; main()"]

    ok = subprocess.run(exe + ["check", str(files["small"])], capture_output=True, text=True, timeout=120)
    assert ok.returncode == 0, ok.stderr
    bad = subprocess.run(exe + ["check", str(files["bad"])], capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2
    assert _lines(bad.stderr) == [f"error: {files['bad']}: group[0].size: must be positive, got -4"]
    assert "Traceback" not in bad.stdout + bad.stderr
    dbg = subprocess.run(exe + ["--debug", "check", str(files["bad"])], capture_output=True, text=True,
                         timeout=120)
    assert dbg.returncode != 0 and "Traceback (most recent call last)" in dbg.stderr
    assert "InputError" in dbg.stderr


def test_console_script_entry_point_is_installed(files):
    # The same through the entry point pip installed (pyproject [project.scripts]).
    import shutil
    script = shutil.which("spikegauge")
    assert script is not None, "the spikegauge console script is not on PATH (pip install -e .)"
    res = subprocess.run([script, "check", str(files["huge"])], capture_output=True, text=True, timeout=120)
    assert res.returncode == 2 and "Traceback" not in res.stderr
    assert len(_lines(res.stderr)) == 1


def test_too_large_a_scenario_is_refused_before_allocation(files):
    peak_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss     # KiB on Linux
    with pytest.raises(InputError) as info:
        load_scenario(files["huge"])
    msg = str(info.value)
    # The estimate (2e9 synapses at tens of bytes each: over 100 GB) and the override.
    assert msg.startswith(f"{files['huge']}: the network needs about ")
    gb = float(msg.split("needs about ")[1].split(" GB")[0])
    assert gb > 100
    assert "max_memory_gb" in msg and "--max-memory-gb" in msg
    # Nothing was allocated: the process's peak memory grew by less than 100 MB.
    assert resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - peak_before < 100_000

    res = invoke("check", files["huge"])
    assert res.exit_code == 2 and len(_lines(res.output)) == 1 and "needs about" in res.output
    # The override is honoured by the check itself: a larger allowance lets it pass
    # validation (load only; building 2e9 synapses is not attempted here).
    assert load_scenario(files["huge"], max_memory_gb=1e6).n_cells == 1_000_000


# 200,000 LIF cells driven far above threshold (refractory period 2 ms, so up to 500 Hz)
# for one hour: up to 3.6e11 spikes, terabytes at 16 bytes per spike (id and time).
MANY_SPIKES = """
[scenario]
name = "too-many-spikes"
duration_ms = 3600000.0
seed = 1

[[group]]
name = "cells"
size = 200000
model = "lif-current"
[group.parameters]
t_ref_ms = 2.0
i_bias_pa = 5000.0
"""


def test_too_many_expected_spikes_are_refused_before_the_run(tmp_path):
    path = tmp_path / "many.toml"
    path.write_text(MANY_SPIKES)
    res = invoke("simulate", path, "--quiet", "--out", tmp_path / "run")
    assert res.exit_code == 2, res.output
    lines = _lines(res.output)
    assert len(lines) == 1 and "spikes" in lines[0] and " GB" in lines[0], res.output
    assert "--max-memory-gb" in lines[0]
    # Refused up front, not after integrating: nothing of the run was written.
    assert not (tmp_path / "run").exists()
