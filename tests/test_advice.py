"""The advice's cost model, checked on counts against a run twice as long and twice as large."""
from __future__ import annotations

import json
import math

import pytest
from click.testing import CliRunner

import spikegauge.cli.advise  # noqa: F401  (registers the command)
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
    # (the predicted wall seconds come from measured times: only their presence is checked)
    assert a["predicted"]["memory_bytes"] > 0 and math.isfinite(a["predicted"]["wall_s"])
    # global adaptive grows as N^2: it is never the pick for a larger run when local
    # adaptive meets the target too
    assert a["setting"]["strategy"] != "global-adaptive"
    res = CliRunner().invoke(cli, ["advise", str(profile_dir), "--target-jitter-ms", "1e-12",
                                   "--target-mismatch-frac", "0", "--duration-s", "1"])
    assert res.exit_code == 2 and "no setting of the profile meets" in res.output
