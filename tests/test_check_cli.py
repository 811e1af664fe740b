"""``spikegauge check``: summaries of the bundled scenarios, exit status 2 on bad files."""
from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

import spikegauge.cli.check  # noqa: F401  (registers the command)
from spikegauge.cli.main import cli

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
BUNDLED = sorted(p.name for p in SCENARIOS.glob("*.toml"))


def test_every_bundled_scenario_is_listed():
    assert {"demo-lif.toml", "demo-lif-conductance.toml", "demo-hh.toml", "bench-lif.toml",
            "bench-hh.toml"} <= set(BUNDLED)


@pytest.mark.parametrize("name", BUNDLED)
def test_check_prints_a_summary(name):
    result = CliRunner().invoke(cli, ["check", str(SCENARIOS / name)])
    assert result.exit_code == 0, result.output
    for part in ("cells:", "connections:", "minimum delay:", "drive events:", "estimated memory:"):
        assert part in result.output


def test_check_json_counts_bench_lif():
    result = CliRunner().invoke(cli, ["check", "--json", str(SCENARIOS / "bench-lif.toml")])
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    # Sizes and in-degrees of ../shared/limit/SPEC.md bench-lif: 5000 cells x (80 + 20) inputs.
    assert data["cells"] == 5000 and data["connections"] == 500_000
    assert [g["size"] for g in data["groups"]] == [4000, 1000]
    assert [p["connections"] for p in data["pathways"]] == [320_000, 80_000, 80_000, 20_000]
    assert 1.0 <= data["min_delay_ms"] < 1.01


def test_check_demo_drive_rate():
    data = json.loads(CliRunner().invoke(cli, ["check", "--json", str(SCENARIOS / "demo-lif.toml")]).output)
    # demo-lif: 80 cells at 800 Hz plus 20 cells at 400 Hz, all run long.
    assert data["drive_events_per_s"] == pytest.approx(80 * 800 + 20 * 400)


GOOD = """\
[scenario]
name = "x"
duration_ms = 50.0
seed = 1

[[group]]
name = "a"
size = 10
model = "lif-current"

[[pathway]]
source = "a"
target = "a"
connect = "sources-per-target"
sources_per_target = 3
receptor = "excitatory"
weight_pa = 5.0
delay_ms = 1.0
"""


@pytest.mark.parametrize("old, new, expected", [
    ("sources_per_target = 3", "sources_per_target_ = 3",
     ["pathway[0].sources_per_target_", "did you mean 'sources_per_target'"]),
    ("size = 10", "size = -10", ["group[0].size", "must be positive"]),
    ("delay_ms = 1.0", "delay_ms = 0", ["pathway[0].delay_ms", "must be positive"]),
    ("seed = 1\n", "seed = 1\n[[group\n", ["line 5", "invalid TOML"]),
], ids=["unknown-key", "negative-size", "zero-delay", "broken-toml"])
def test_malformed_scenario_exit_status_2_one_line(tmp_path, old, new, expected):
    path = tmp_path / "bad.toml"
    path.write_text(GOOD.replace(old, new))
    result = CliRunner().invoke(cli, ["check", str(path)])
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {path}:")
    for part in expected:
        assert part in lines[0]
    assert "Traceback" not in result.output


def test_memory_limit_option(tmp_path):
    path = tmp_path / "ok.toml"
    path.write_text(GOOD)
    assert CliRunner().invoke(cli, ["check", str(path)]).exit_code == 0
    result = CliRunner().invoke(cli, ["check", "--max-memory-gb", "1e-9", str(path)])
    assert result.exit_code == 2
    assert "GB" in result.stderr and "max_memory_gb" in result.stderr


def test_missing_file_is_an_input_error(tmp_path):
    result = CliRunner().invoke(cli, ["check", str(tmp_path / "nope.toml")])
    assert result.exit_code == 2 and "file not found" in result.stderr
