"""The advice's cost model, checked on counts against a run twice as long and twice as large."""
from __future__ import annotations

import json
import math

import pytest
from click.testing import CliRunner

import spikegauge.cli.advise  # noqa: F401  (registers the command)
from spikegauge.profile.verdict import TIE_FRACTION
import spikegauge.cli.profile  # noqa: F401
from spikegauge import simulate
from spikegauge.cli.main import cli
from spikegauge.network import build_network
from spikegauge.profile.advice import _profile_scenario, cost_model, predict, scaled_scenario
from spikegauge.profile.results import load_results

from test_profile import TINY

SWEEP = """
[[sweep.grid]]
strategy = "fixed"
stepper = "rk4"
dt_ms = 0.1
crossing = "hermite"
delivery = "exact"

[[sweep.grid]]
strategy = ["global-adaptive", "local-adaptive"]
stepper = "dp54"
rtol = 1e-4
"""


@pytest.fixture(scope="module")
def profile_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("advice")
    scen = d / "tiny.toml"
    scen.write_text(TINY + SWEEP)
    res = CliRunner().invoke(cli, ["profile", str(scen), "--out", str(d / "p"), "--quiet"],
                             catch_exceptions=False)
    assert res.exit_code == 0, res.output
    return d / "p"


def test_cost_model_predicts_counts_of_a_larger_longer_run(profile_dir):
    table, doc = load_results(profile_dir)
    scenario = _profile_scenario(profile_dir, doc)
    n2, t2 = 2 * scenario.n_cells, 2 * scenario.duration_ms
    big = build_network(scaled_scenario(scenario, n2, t2))
    assert big.n_cells == n2 and big.t_stop_ms == t2
    for _, row in table.iterrows():
        model = cost_model(row, table, scenario, profile_dir)
        pred = predict(model, scenario, n2, t2)
        s = {k: row[k] for k in ("strategy", "stepper", "dt_ms", "crossing", "delivery", "rtol")
             if isinstance(row[k], str) or row[k] == row[k]}
        run = simulate(big, **s)
        # the model's own claim, tested on machine-independent counts: within 20 %
        assert pred["arrivals"] == pytest.approx(run.cost["arrivals"], rel=0.2), row["label"]
        assert pred["steps"] == pytest.approx(run.cost["steps"], rel=0.2), row["label"]


def test_advise_command_writes_advice(profile_dir):
    res = CliRunner().invoke(cli, ["advise", str(profile_dir), "--target-jitter-ms", "0.1",
                                   "--target-mismatch-frac", "0.01", "--duration-s", "1", "--cells", "40"],
                             catch_exceptions=False)
    assert res.exit_code == 0, res.output
    a = json.loads((profile_dir / "advice.json").read_text())
    assert a["predicted"]["n_cells"] == 40 and a["run"]["duration_s"] == 1
    assert a["setting"]["strategy"] in ("fixed", "global-adaptive", "local-adaptive")
    # (predicted CPU seconds come from measured times: only their presence is checked)
    assert a["predicted"]["memory_bytes"] > 0 and math.isfinite(a["predicted"]["cpu_s"])
    assert a["predicted"]["memory_bytes"] == pytest.approx(sum(a["predicted"]["memory"].values()))
    # no alternative is predicted cheaper than the recommendation by more than the tie margin
    assert all(alt["cpu_s"] >= a["predicted"]["cpu_s"] / (1 + TIE_FRACTION) for alt in a["alternatives"])
    # global adaptive grows as N^2: it is never the pick for a larger run when local
    # adaptive meets the target too
    assert a["setting"]["strategy"] != "global-adaptive"
    res = CliRunner().invoke(cli, ["advise", str(profile_dir), "--target-jitter-ms", "1e-12",
                                   "--target-mismatch-frac", "0", "--duration-s", "1"])
    assert res.exit_code == 2 and "no setting of the profile meets" in res.output
    # the targets and the duration default to the profile's
    res = CliRunner().invoke(cli, ["advise", str(profile_dir)], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    a = json.loads((profile_dir / "advice.json").read_text())
    doc = json.loads((profile_dir / "profile.json").read_text())
    assert a["target"] == dict(jitter_ms=doc["target"]["jitter_ms"], mismatch_frac=doc["target"]["mismatch_frac"])
    assert a["run"]["duration_s"] == doc["scenario"]["duration_ms"] / 1000.0


def test_durations_and_memory_are_printed_in_units_a_person_reads():
    from spikegauge.profile.advice import format_bytes, format_duration, memory_warning

    assert format_duration(42.0) == "42 s" and format_duration(150.0) == "2.5 min"
    assert format_duration(7200.0) == "2 h" and format_duration(3 * 86400.0) == "3 days"
    assert format_bytes(76.7e9) == "76.7 GB" and format_bytes(512) == "512 bytes"
    memory = dict(network_bytes=1e9, spikes_bytes=70e9, events_in_flight_bytes=1e8)
    warning = memory_warning(memory, available=20e9)
    assert "71.1 GB" in warning and "20 GB" in warning and "spikes" in warning
    assert memory_warning(memory, available=100e9) == "" and memory_warning(memory, None) == ""
