"""Scenario files: loading, validation messages, value specifications, memory check."""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from spikegauge.distributions import Constant, FileValues, LogNormal, Normal, Uniform, parse_value_spec
from spikegauge.errors import InputError
from spikegauge.scenario import estimate_memory_bytes, load_scenario, parse_scenario

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"

BASE = """\
[scenario]
name = "t"
duration_ms = 100.0
seed = 5

[integration]
strategy = "fixed"
stepper = "rk4"
dt_ms = 0.1

[[group]]
name = "exc"
size = 20
model = "lif-current"
[group.parameters]
tau_m_ms = 15.0
[group.initial]
v_mv = { distribution = "uniform", low = -65.0, high = -55.0 }

[[group]]
name = "hh"
size = 5
model = "hh-squid"

[[pathway]]
source = "exc"
target = "exc"
connect = "sources-per-target"
sources_per_target = 4
receptor = "excitatory"
weight_pa = 10.0
delay_ms = { distribution = "uniform", low = 1.0, high = 2.0 }

[[pathway]]
source = "exc"
target = "hh"
connect = "random"
p_connect = 0.3
receptor = "inhibitory"
weight_msiemens_per_cm2 = 0.1
delay_ms = 1.5

[[drive]]
target = "exc"
kind = "poisson"
rate_hz = 100.0
receptor = "excitatory"
weight_pa = 5.0
"""


def load_text(tmp_path: Path, text: str, **kw):
    path = tmp_path / "demo.toml"
    path.write_text(text)
    return load_scenario(path, **kw)


def error_of(tmp_path: Path, text: str, **kw) -> str:
    with pytest.raises(InputError) as info:
        load_text(tmp_path, text, **kw)
    msg = str(info.value)
    assert "\n" not in msg, "errors are one line"
    assert msg.startswith(str(tmp_path / "demo.toml") + ":"), "errors start with the file name"
    return msg


def test_base_scenario_loads(tmp_path):
    sc = load_text(tmp_path, BASE)
    assert sc.name == "t" and sc.duration_ms == 100.0 and sc.seed == 5
    assert sc.integration.as_dict() == {"strategy": "fixed", "stepper": "rk4", "dt_ms": 0.1}
    assert [g.size for g in sc.groups] == [20, 5]
    assert sc.groups[0].parameters["tau_m_ms"] == Constant(15.0)
    assert sc.groups[0].initial["v_mv"] == Uniform(-65.0, -55.0)
    assert sc.pathways[1].target_index == 1 and sc.pathways[1].weight == Constant(0.1)
    assert sc.drives[0].stop_ms == 100.0, "a Poisson drive runs to the end by default"
    assert list(sc.group_first) == [0, 20, 25]
    # sources-per-target 4 * 20 targets + expected 0.3 * 20 * 5 (exact arithmetic)
    assert sc.expected_synapses() == pytest.approx(80 + 30)


@pytest.mark.parametrize("name", sorted(p.name for p in SCENARIOS.glob("*.toml")))
def test_bundled_scenarios_load(name):
    sc = load_scenario(SCENARIOS / name)
    assert sc.n_cells > 0


def test_bundled_benchmarks_match_spec():
    # Values from ../shared/limit/SPEC.md (bench-lif and bench-hh tables).
    lif = load_scenario(SCENARIOS / "bench-lif.toml")
    assert [(g.name, g.size, g.model) for g in lif.groups] == [("exc", 4000, "lif-conductance"),
                                                               ("inh", 1000, "lif-conductance")]
    assert lif.integration.as_dict() == dict(strategy="fixed", stepper="euler", dt_ms=0.1,
                                             crossing="step", delivery="grid")
    assert lif.duration_ms == 1000.0
    assert [p.sources_per_target for p in lif.pathways] == [80, 80, 20, 20]
    assert all(p.delay_ms == Uniform(1.0, 3.0) and not p.self_connections for p in lif.pathways)
    assert [p.weight for p in lif.pathways] == [Constant(1.5), Constant(1.5), Constant(15.0), Constant(15.0)]
    assert lif.groups[0].parameters["i_bias_pa"] == Uniform(200.0, 300.0)
    assert lif.groups[0].parameters["t_ref_ms"] == Constant(2.0)
    hh = load_scenario(SCENARIOS / "bench-hh.toml")
    assert [(g.size, g.model) for g in hh.groups] == [(800, "hh-squid"), (200, "hh-squid")]
    assert hh.integration.as_dict() == dict(strategy="fixed", stepper="rk4", dt_ms=0.01,
                                            crossing="linear", delivery="grid")
    assert hh.duration_ms == 200.0
    assert [p.sources_per_target for p in hh.pathways] == [40, 40, 10, 10]
    assert [p.weight for p in hh.pathways] == [Constant(0.015), Constant(0.015), Constant(0.1), Constant(0.1)]
    assert hh.groups[1].parameters["i_bias_ua_per_cm2"] == Uniform(0.0, 10.0)
    assert hh.groups[1].initial["v_mv"] == Uniform(-70.0, -60.0)


# Each case: (text replacement old -> new, substrings the one-line message must contain).
MALFORMED = [
    pytest.param(("tau_m_ms = 15.0", "tau_mm_ms = 15.0"),
                 ["group[0].parameters.tau_mm_ms", "did you mean 'tau_m_ms'"], id="unknown-key"),
    pytest.param(("[scenario]", "[scenaro]"), ["scenaro", "did you mean 'scenario'"], id="unknown-section"),
    pytest.param(("size = 20", "size = -20"), ["group[0].size", "must be positive, got -20"], id="negative-size"),
    pytest.param(("size = 20", "size = 20.5"), ["group[0].size", "must be an integer"], id="fractional-size"),
    pytest.param(("delay_ms = 1.5", "delay_ms = 0.0"), ["pathway[1].delay_ms", "must be positive, got 0"],
                 id="zero-delay"),
    pytest.param(("low = 1.0, high = 2.0", "low = -1.0, high = 2.0"),
                 ["pathway[0].delay_ms", "must be positive", "-1"], id="negative-delay-range"),
    pytest.param(("delay_ms = 1.5", 'delay_ms = { distribution = "normal", mean = 1.5, std = 0.2 }'),
                 ["pathway[1].delay_ms", "give 'low'"], id="unbounded-normal-delay"),
    pytest.param(("seed = 5\n", "seed = 5\nbroken line\n"), ["line 5", "invalid TOML"], id="broken-toml"),
    pytest.param(("duration_ms = 100.0", "duration_ms = 0"), ["scenario.duration_ms", "must be positive"],
                 id="zero-duration"),
    pytest.param(("duration_ms = 100.0", "duration_ms = nan"), ["scenario.duration_ms", "finite"], id="nan"),
    pytest.param(("weight_pa = 10.0", "weight_pa = inf"), ["pathway[0].weight_pa", "finite"], id="inf"),
    pytest.param(("rate_hz = 100.0", "rate_hz = -3.0"), ["drive[0].rate_hz", "must not be negative"],
                 id="negative-rate"),
    pytest.param(('seed = 5', 'seed = "five"'), ["scenario.seed", "must be an integer", "string"], id="wrong-type"),
    pytest.param(('name = "t"\n', ''), ["scenario", "missing key 'name'"], id="missing-key"),
    pytest.param(('target = "hh"', 'target = "hhh"'), ["pathway[1].target", "no group named 'hhh'",
                                                        "did you mean 'hh'"], id="unknown-group"),
    pytest.param(("sources_per_target = 4", "sources_per_target = 20"),
                 ["pathway[0].sources_per_target", "only 19 are available", "minus the target cell itself"],
                 id="sources-per-target-too-large"),
    pytest.param(("weight_msiemens_per_cm2 = 0.1", "weight_nsiemens = 0.1"),
                 ["pathway[1].weight_nsiemens", "weight_msiemens_per_cm2", "hh-squid"], id="weight-wrong-units"),
    pytest.param(("tau_m_ms = 15.0", "g_na_msiemens_per_cm2 = 100.0"),
                 ["group[0].parameters.g_na_msiemens_per_cm2", "belongs to hh-squid", "lif-current takes:", "tau_m_ms"],
                 id="parameter-wrong-model"),
    pytest.param(("tau_m_ms = 15.0", "tau_m_ms = -3"),
                 ["group[0].parameters.tau_m_ms: must be positive, got -3"], id="negative-parameter"),
    pytest.param(('model = "hh-squid"', 'model = "hh-squid"\n[group.parameters]\nt_ref_ms = 1.0'),
                 ["group[1].parameters.t_ref_ms", "fixed in hh-squid"], id="fixed-parameter"),
    pytest.param(('model = "hh-squid"', 'model = "hh-squid"\n[group.initial]\nm = -0.1'),
                 ["group[1].initial.m", "must not be negative"], id="negative-gate"),
    pytest.param(('model = "hh-squid"', 'model = "hh-squid"\n[group.initial]\nv_mv = 500.0'),
                 ["group[1].initial.v_mv", "within [-200, 200]"], id="voltage-out-of-bounds"),
    pytest.param(('model = "hh-squid"', 'model = "hh-sqiud"'), ["group[1].model", "did you mean 'hh-squid'"],
                 id="unknown-model"),
    pytest.param(('connect = "random"', 'connect = "random"\nsources_per_target = 3'),
                 ["pathway[1].sources_per_target", "only used with connect = \"sources-per-target\""],
                 id="key-of-other-connect"),
    pytest.param(('connect = "random"', 'rule = "random"'), ["pathway[1].rule: unknown key", "connect"],
                 id="no-rule-key"),
    pytest.param(('connect = "random"', 'connect = "fixed-probability"'),
                 ["pathway[1].connect", "sources-per-target, random, one-to-one, all-to-all, edge-list"],
                 id="unknown-connect"),
    pytest.param(("p_connect = 0.3", "p_connect = 1.3"), ["pathway[1].p_connect", "[0, 1]"],
                 id="probability-above-one"),
    pytest.param(('strategy = "fixed"', 'strategy = "fixd"'), ["integration.strategy", "did you mean 'fixed'"],
                 id="unknown-strategy"),
    pytest.param(('dt_ms = 0.1', 'dt_ms = 0.1\nrtol = 1e-4'), ["integration.rtol", "does not apply", "fixed"],
                 id="tolerance-with-fixed-strategy"),
    pytest.param(('dt_ms = 0.1', 'dt_ms = 0.1\ncrossing = "dense"'), ["integration.crossing", "adaptive"],
                 id="dense-crossing-with-fixed-strategy"),
    pytest.param(('stepper = "rk4"', 'stepper = "rk5"'), ["integration.stepper", "did you mean 'rk4'"],
                 id="unknown-stepper"),
    pytest.param(('stepper = "rk4"', 'stepper = "dp54"'), ["integration.stepper", "choose one of: euler"],
                 id="adaptive-stepper-with-fixed-strategy"),
    pytest.param(('weight_pa = 5.0', 'weight_pa = 5.0\nstop_ms = 200.0\nstart_ms = 300.0'),
                 ["drive[0].stop_ms", "after start_ms"], id="stop-before-start"),
    pytest.param(('[[group]]\nname = "hh"', '[[group]]\nname = "exc"'),
                 ["group[1].name", "already the name of group[0]"], id="duplicate-group"),
    pytest.param(('weight_pa = 10.0', 'weight_pa = { distribution = "uniform", low = -1.0, high = 1.0 }'),
                 ["pathway[0].weight_pa", "must not be negative"], id="negative-weight"),
    pytest.param(('high = -55.0 }', 'high = -55.0, mode = 2 }'), ["group[0].initial.v_mv.mode", "unknown key"],
                 id="unknown-distribution-key"),
]


@pytest.mark.parametrize("edit, expected", MALFORMED)
def test_malformed_scenarios_give_one_line_errors(tmp_path, edit, expected):
    old, new = edit
    assert old in BASE
    msg = error_of(tmp_path, BASE.replace(old, new, 1))
    for part in expected:
        assert part in msg, f"{part!r} not in {msg!r}"


def test_broken_toml_names_line_and_column(tmp_path):
    # tomllib reports the position; the line counted here by hand: line 3 holds the bad value.
    msg = error_of(tmp_path, "[scenario]\nname = 't'\nduration_ms = = 3\n")
    assert "line 3, column" in msg


def test_memory_estimate_over_limit_names_estimate_and_option(tmp_path):
    msg = error_of(tmp_path, BASE, max_memory_gb=1e-9)
    assert "GB" in msg and "max_memory_gb" in msg
    text = BASE.replace("seed = 5", "seed = 5\nmax_memory_gb = 1e-9")
    assert "scenario.max_memory_gb" in error_of(tmp_path, text)
    # The argument overrides the scenario key.
    assert load_text(tmp_path, text, max_memory_gb=1.0).max_memory_gb == 1e-9


def test_memory_estimate_counts_synapses(tmp_path):
    small = load_text(tmp_path, BASE)
    big = load_text(tmp_path, BASE.replace("sources_per_target = 4", "sources_per_target = 19"))
    # 15 more synapses per target for 20 targets, at the documented build cost per synapse.
    from spikegauge.scenario import BUILD_BYTES_PER_SYNAPSE
    assert estimate_memory_bytes(big) - estimate_memory_bytes(small) == 15 * 20 * BUILD_BYTES_PER_SYNAPSE


def test_per_cell_values_from_files(tmp_path):
    np.save(tmp_path / "vth.npy", np.linspace(-52, -48, 20))
    (tmp_path / "v0.csv").write_text("v_mv\n" + "\n".join(str(-60.0 - i / 10) for i in range(20)) + "\n")
    text = BASE.replace("tau_m_ms = 15.0", 'v_th_mv = { file = "vth.npy" }').replace(
        'v_mv = { distribution = "uniform", low = -65.0, high = -55.0 }', 'v_mv = { file = "v0.csv" }')
    sc = load_text(tmp_path, text)
    vth = sc.groups[0].parameters["v_th_mv"]
    assert isinstance(vth, FileValues) and np.array_equal(vth.values, np.linspace(-52, -48, 20))
    assert np.array_equal(sc.groups[0].initial["v_mv"].values, -60.0 - np.arange(20) / 10)
    np.save(tmp_path / "vth.npy", np.zeros(19))
    msg = error_of(tmp_path, text)
    assert "group[0].parameters.v_th_mv.file" in msg and "19 values, expected 20" in msg


def test_edge_file_errors(tmp_path):
    (tmp_path / "edges.csv").write_text("source,target,delay_ms\n0,1,1.0\n3,2,0.0\n")
    text = BASE.replace('connect = "random"\np_connect = 0.3', 'connect = "edge-list"\nedges = "edges.csv"').replace(
        "delay_ms = 1.5\n", "")
    msg = error_of(tmp_path, text)
    assert "pathway[1].edges" in msg and "row 1" in msg and "delay_ms must be positive" in msg
    (tmp_path / "edges.csv").write_text("source,target,delay_ms\n0,1,1.0\n3,5,2.0\n")
    msg = error_of(tmp_path, text)
    assert "target 5 is not a cell index of group 'hh' (0..4)" in msg
    (tmp_path / "edges.csv").write_text("source,target,delai_ms\n0,1,1.0\n")
    assert "did you mean 'delay_ms'" in error_of(tmp_path, text)


def test_missing_scenario_file(tmp_path):
    with pytest.raises(InputError, match="file not found"):
        load_scenario(tmp_path / "nope.toml")


def test_parse_scenario_from_text():
    sc = parse_scenario(BASE)
    assert sc.path is None and sc.digest == parse_scenario(BASE).digest


# -- value specifications ----------------------------------------------------


def test_value_spec_parsing_and_support(tmp_path):
    where = "x.toml: k"
    assert parse_value_spec(3, where, tmp_path) == Constant(3.0)
    u = parse_value_spec({"distribution": "uniform", "low": 1, "high": 3}, where, tmp_path)
    assert u == Uniform(1.0, 3.0) and u.support() == (1.0, 3.0)
    n = parse_value_spec({"distribution": "normal", "mean": 1, "std": 2, "low": 0}, where, tmp_path)
    assert n.support() == (0.0, math.inf)
    ln = parse_value_spec({"distribution": "lognormal", "mean": 2, "std": 1}, where, tmp_path)
    assert isinstance(ln, LogNormal) and ln.support()[0] > 0
    with pytest.raises(InputError, match="did you mean 'normal'"):
        parse_value_spec({"distribution": "normall", "mean": 1, "std": 1}, where, tmp_path)
    with pytest.raises(InputError, match="not allowed here"):
        parse_value_spec({"file": "a.npy"}, where, tmp_path, None)
    with pytest.raises(InputError, match="must be a number"):
        parse_value_spec(True, where, tmp_path)


def test_truncated_normal_follows_scipy_truncnorm():
    # Reference: scipy.stats.truncnorm (Kolmogorov-Smirnov test at a fixed seed).
    spec = Normal(1.0, 2.0, 0.0, 4.0)
    x = spec.sample(np.random.default_rng(1), 4000)
    assert x.min() >= 0.0 and x.max() <= 4.0
    ref = stats.truncnorm((0.0 - 1.0) / 2.0, (4.0 - 1.0) / 2.0, loc=1.0, scale=2.0)
    assert stats.kstest(x, ref.cdf).pvalue > 1e-3


def test_lognormal_has_the_stated_mean_and_std():
    # Reference: scipy.stats.lognorm with s = sigma, scale = exp(mu); its moments
    # must equal the mean and std the scenario states.
    spec = LogNormal(40.0, 20.0)
    ref = stats.lognorm(s=spec.log_sigma, scale=math.exp(spec.log_mu))
    assert ref.mean() == pytest.approx(40.0) and ref.std() == pytest.approx(20.0)
    x = spec.sample(np.random.default_rng(2), 4000)
    assert stats.kstest(x, ref.cdf).pvalue > 1e-3
