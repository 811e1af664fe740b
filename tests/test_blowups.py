"""Numerical blow-ups are results, not crashes: one test per stepper family.

* explicit fixed step (euler too large a step on Hodgkin–Huxley): "diverged at
  t" with the spikes up to then;
* backward Euler and the trapezoidal rule: a failed Newton iteration;
* adaptive explicit (dp54, bs32) and Rosenbrock (rodas3): the minimum step or
  the maximum step count, naming the cell and the time;
* bdf: a Newton failure the step reduction cannot cure.

The adaptive limits are the kernels' own parameters (``min_step_ms``,
``max_steps``); ``simulate`` uses their defaults, so the tests put a kernel
with tighter limits in its place to reach them in a short run.

Every diverged run must: say "diverged", give t and a cell id in the message,
stop at that t, keep only finite spikes up to t, be savable and loadable, and
agree spike for spike with a healthy run of the same setting stopped earlier.
"""
from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

import spikegauge
import spikegauge.simulation as simulation
from spikegauge.scenario import parse_scenario
from spikegauge.integrate import adaptive

HH = "scenarios/demo-hh.toml"          # 40 Hodgkin–Huxley squid-axon cells
MESSAGE = re.compile(r"diverged at t = (?P<t>[0-9.e+-]+) ms \(cell (?P<cell>\d+): (?P<why>.+)\)$")


def _check_diverged(run, why: str, family: str, tmp_path=None):
    """The common contract of a diverged run; returns (t, cell)."""
    assert run.status == "diverged", (run.status, run.message)
    m = MESSAGE.match(run.message)
    assert m, run.message
    t, cell = float(m["t"]), int(m["cell"])
    assert why in m["why"], run.message
    assert 0 <= cell < run.n_cells
    assert run.t_stop_ms == pytest.approx(t, rel=1e-5)        # the message rounds to 6 digits
    times = run.spikes["time_ms"].to_numpy()
    assert np.isfinite(times).all() and (times <= run.t_stop_ms).all()
    if tmp_path is not None:
        back = spikegauge.load_run(run.save(tmp_path / family))
        assert back.status == "diverged" and back.message == run.message
        np.testing.assert_array_equal(back.spikes["time_ms"], run.spikes["time_ms"])
    return t, cell


def _prefix_agrees(run, healthy_until_ms: float, **settings):
    """Spikes before ``healthy_until_ms`` equal those of the same setting run only that far."""
    short = spikegauge.simulate(HH, t_stop_ms=healthy_until_ms, **settings)
    assert short.status == "ok"
    before = run.spikes[run.spikes["time_ms"] < healthy_until_ms]
    np.testing.assert_array_equal(before["cell"].to_numpy(), short.spikes["cell"].to_numpy())
    np.testing.assert_array_equal(before["time_ms"].to_numpy(), short.spikes["time_ms"].to_numpy())
    return len(before)


@pytest.fixture
def kernel_limits(monkeypatch):
    """Replace simulate's adaptive kernel by one with the given limits."""
    def install(**limits):
        def make(network, settings, auto_scale=False, record_steps=None):
            cls = (adaptive.LocalAdaptiveKernel if settings["strategy"] == "local-adaptive"
                   else adaptive.GlobalAdaptiveKernel)
            return cls(network, settings["stepper"], settings["rtol"], settings["atol"],
                       auto_scale=auto_scale, record_steps=record_steps, **limits)
        monkeypatch.setattr(simulation, "make_kernel", make)
    return install


@pytest.mark.parametrize("dt_ms", [0.2, 0.1])
def test_explicit_fixed_step_too_large_diverges_with_spikes_until_then(tmp_path, dt_ms):
    # Forward Euler on HH: stable up to a step near 0.05 ms here; 0.1 and 0.2 ms blow up
    # within a few ms (common practice: explicit HH needs dt of a few hundredths of a ms).
    settings = dict(strategy="fixed", stepper="euler", dt_ms=dt_ms, crossing="linear", delivery="exact")
    run = spikegauge.simulate(HH, t_stop_ms=100.0, **settings)
    t, cell = _check_diverged(run, "non-finite or left its model's bounds", "explicit fixed", tmp_path)
    assert t < 100.0
    # The spikes up to then are the network's own: the same setting stopped one window
    # (d_min = 1 ms) earlier gives them exactly.
    n = _prefix_agrees(run, float(np.floor(t)) - 1.0 if t > 2 else t / 2, **settings)
    assert len(run.spikes) >= n and len(run.spikes) > 0


@pytest.mark.parametrize("stepper,crossing", [("backward-euler", "linear"), ("trapezoidal", "hermite")])
def test_implicit_fixed_step_reports_failed_newton(tmp_path, stepper, crossing):
    # At dt 1 ms the Newton iteration of backward Euler and of the trapezoidal rule on HH
    # does not converge in its iteration budget: a result naming the implicit stepper, not an
    # exception.
    settings = dict(strategy="fixed", stepper=stepper, dt_ms=1.0, crossing=crossing, delivery="exact")
    run = spikegauge.simulate(HH, t_stop_ms=50.0, **settings)
    _check_diverged(run, "Newton iteration of the implicit stepper failed", stepper, tmp_path)


@pytest.mark.parametrize("strategy", ["global-adaptive", "local-adaptive"])
@pytest.mark.parametrize("stepper", ["dp54", "bs32"])
def test_adaptive_explicit_reports_minimum_step(tmp_path, kernel_limits, strategy, stepper):
    # HH spikes need steps far below 0.05 ms at rtol 1e-6: the controller hits the floor.
    kernel_limits(min_step_ms=0.05)
    run = spikegauge.simulate(HH, strategy=strategy, stepper=stepper, rtol=1e-6, t_stop_ms=100.0)
    _check_diverged(run, "step size fell below the minimum step", "adaptive explicit", tmp_path)


@pytest.mark.parametrize("strategy", ["global-adaptive", "local-adaptive"])
def test_adaptive_explicit_reports_maximum_step_count(tmp_path, kernel_limits, strategy):
    kernel_limits(max_steps=1000)
    settings = dict(strategy=strategy, stepper="bs32", rtol=1e-6)
    run = spikegauge.simulate(HH, t_stop_ms=100.0, **settings)
    t, _ = _check_diverged(run, "maximum number of steps was exceeded", "adaptive explicit", tmp_path)
    assert len(run.spikes) > 0
    # The steps made before the limit was hit were counted, and there were not more of them.
    assert 0 < run.cost["steps"] + run.cost["rejected_steps"] <= 1000 * run.n_cells


@pytest.mark.parametrize("strategy", ["global-adaptive", "local-adaptive"])
@pytest.mark.parametrize("limit", [dict(min_step_ms=0.05), dict(max_steps=1000)])
def test_rosenbrock_reports_minimum_step_or_step_count(tmp_path, kernel_limits, strategy, limit):
    kernel_limits(**limit)
    run = spikegauge.simulate(HH, strategy=strategy, stepper="rodas3", rtol=1e-6, t_stop_ms=100.0)
    why = "minimum step" if "min_step_ms" in limit else "maximum number of steps"
    _check_diverged(run, why, "Rosenbrock", tmp_path)


@pytest.mark.parametrize("strategy", ["global-adaptive", "local-adaptive"])
def test_bdf_reports_failed_newton(tmp_path, kernel_limits, strategy):
    # BDF halves its step when Newton fails with a fresh Jacobian; a failure that halving
    # cannot cure before the minimum step (0.2 ms here, far above what an HH spike needs) ends
    # the run as diverged, naming the implicit stepper's Newton iteration.
    kernel_limits(min_step_ms=0.2)
    run = spikegauge.simulate(HH, strategy=strategy, stepper="bdf", rtol=0.1, t_stop_ms=100.0)
    _check_diverged(run, "Newton iteration of the implicit stepper failed", "bdf", tmp_path)


def test_diverged_run_through_the_command_line(tmp_path):
    # The command line reports a blow-up as a result: status 0, the run folder written,
    # the message printed, no traceback.
    from click.testing import CliRunner

    from spikegauge.cli.main import cli
    out = tmp_path / "run"
    res = CliRunner().invoke(cli, ["simulate", HH, "--stepper", "euler", "--dt-ms", "0.2", "--crossing",
                                   "linear", "--delivery", "exact", "--quiet", "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert res.output.startswith("diverged:") and "diverged at t =" in res.output
    assert spikegauge.load_run(out).status == "diverged"


@pytest.mark.parametrize("dt_ms", [3.0, 10.0])
def test_backward_euler_with_a_non_finite_newton_system_is_a_diverged_run(dt_ms):
    # At steps of several ms the Newton iterates of backward Euler on HH leave the finite
    # numbers before the iteration gives up; the linear solve used to raise inside the
    # kernel (SystemError; bugs-reliability.md R8). Delays of 10 ms allow such steps.
    text = re.sub(r'delay_ms = \{ distribution = "uniform", low = 1.0, high = [23].0 \}', "delay_ms = 10.0",
                  Path(HH).read_text())
    run = spikegauge.simulate(parse_scenario(text, source=Path(HH)), strategy="fixed",
                              stepper="backward-euler", dt_ms=dt_ms, crossing="linear", delivery="exact",
                              t_stop_ms=100.0)
    _check_diverged(run, "Newton iteration of the implicit stepper failed", "backward-euler")


HH_SMALL = """
[scenario]
name = "hh-blowups"
duration_ms = 50.0
seed = 3

[[group]]
name = "cells"
size = 6
model = "hh-squid"
[group.parameters]
i_bias_ua_per_cm2 = { distribution = "uniform", low = 8.0, high = 12.0 }
[group.initial]
v_mv = { distribution = "uniform", low = -70.0, high = -60.0 }

[[pathway]]
source = "cells"
target = "cells"
connect = "sources-per-target"
sources_per_target = 2
receptor = "excitatory"
weight_msiemens_per_cm2 = 0.02
delay_ms = 5.0
"""

SWEEP = """
[[sweep.grid]]
strategy = "fixed"
stepper = "euler"
dt_ms = [0.2, 0.01]
crossing = "linear"
delivery = "exact"

[[sweep.grid]]
strategy = "fixed"
stepper = "backward-euler"
dt_ms = [1.0, 3.0]
crossing = "linear"
delivery = "exact"

[[sweep.grid]]
strategy = "fixed"
stepper = "rk4"
dt_ms = 0.02
crossing = "hermite"
delivery = "exact"
"""


def test_a_sweep_with_blowups_completes_and_shows_them_as_failed(tmp_path):
    import pandas as pd

    from spikegauge.profile import run_profile
    scen, sweep = tmp_path / "hh.toml", tmp_path / "sweep.toml"
    scen.write_text(HH_SMALL)
    sweep.write_text(SWEEP)
    doc = run_profile(scen, tmp_path / "profile", sweep_file=sweep)
    table = pd.read_csv(tmp_path / "profile" / "results.csv")
    swept = table["origin"] == "sweep"
    assert swept.sum() == 5
    blown = table["status"].isin(["diverged", "failed"])
    assert set(table.loc[swept & blown, "dt_ms"]) == {0.2, 1.0, 3.0}, table[["label", "status"]]
    # the rk4 point met the target, so coarser ones were added until one missed it or blew up
    assert (table.loc[~swept, "stepper"] == "rk4").all() and (table.loc[~swept, "dt_ms"] > 0.02).all()
    # A blow-up is never reported as accurate: it misses the target, sits on no front,
    # and is not the recommendation.
    assert not table.loc[blown, "meets_target"].astype(bool).any()
    blown_points = set(table.loc[blown, "point"])
    for by_cost in doc["fronts"].values():
        for by_metric in by_cost.values():
            for points in by_metric.values():
                assert not blown_points & set(points), doc["fronts"]
    assert doc["verdict"]["recommended"]["point"] not in blown_points
    messages = table.loc[blown, "message"].tolist()
    assert all(isinstance(m, str) and m for m in messages), messages
