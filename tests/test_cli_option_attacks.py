"""R17, R18, R19: option values of `spikegauge simulate` that crash, lie or hang.

Each run is a real subprocess with a time limit (a hang inside a numba kernel cannot be
interrupted from Python).
"""
import subprocess
import sys

import pytest

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


@pytest.mark.parametrize("options", [
    ["--dt-ms", "1e-300"],                                   # R17: OverflowError
    ["--dt-ms", "1e308"],                                    # R18: 0 steps reported as ok
    ["--strategy", "global-adaptive", "--rtol", "1e-300"],   # R19: hang
    ["--strategy", "local-adaptive", "--rtol", "1e-300"],    # R19: hang
])
def test_absurd_step_options_are_refused_or_give_a_real_result(tmp_path, options):
    path = tmp_path / "small.toml"
    path.write_text(SMALL)
    out = tmp_path / "run"
    cmd = [sys.executable, "-c", "from spikegauge.cli import main; main()", "simulate", str(path),
           "--quiet", "--out", str(out), *options]
    try:
        res = subprocess.run(cmd, capture_output=True, text=True, timeout=60)
    except subprocess.TimeoutExpired:
        raise AssertionError(f"simulate {' '.join(options)} still running after 60 s") from None
    assert "internal error" not in res.stderr, res.stderr
    if res.returncode == 2:
        assert len([x for x in res.stderr.splitlines() if x.strip()]) == 1, res.stderr
        return
    assert res.returncode == 0, res.stderr
    first = res.stdout.splitlines()[0]
    if first.startswith("ok:"):
        # The four cells fire every few ms at 400 pA: an "ok" run must contain their spikes.
        assert " 0 spikes" not in first, res.stdout
    else:
        assert first.startswith("diverged:"), res.stdout
