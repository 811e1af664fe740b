"""``spikegauge models`` and the catalog behind it: every model, its keys, the units rule."""
from __future__ import annotations

import math

import pytest
from click.testing import CliRunner

from spikegauge.catalog import describe_model, model_table, unit_of
from spikegauge.cli import main  # noqa: F401  (registers every command)
from spikegauge.cli.main import cli
from spikegauge.models import BUILT_IN, MODELS
from spikegauge.scenario import parse_scenario


def test_list_names_every_model_with_its_unit_system():
    table = model_table()
    assert list(table["name"]) == list(BUILT_IN)
    assert str(table["name"].dtype) == "string"
    res = CliRunner().invoke(cli, ["models"])
    assert res.exit_code == 0, res.output
    lines = res.output.splitlines()
    for name in BUILT_IN:
        spec = MODELS[name]
        row = next(line for line in lines if line.startswith(name + " "))
        assert spec.unit_system in row and spec.doc.strip().splitlines()[0] in row


@pytest.mark.parametrize("name", list(BUILT_IN))
def test_model_details_print_every_key(name):
    spec = MODELS[name]
    res = CliRunner().invoke(cli, ["models", name])
    assert res.exit_code == 0, res.output
    for key in (*spec.state_names, *spec.param_keys(), spec.weight_key, spec.current_key):
        assert key in res.output, key
    assert spec.source and spec.source in res.output


@pytest.mark.parametrize("name", list(BUILT_IN))
def test_listed_keys_and_defaults_are_what_a_scenario_accepts(name):
    # The listing and the validator must agree: a group that sets every settable
    # parameter to its listed default and every state to its listed initial
    # value, fed by a pathway with the listed weight key and a step drive with the
    # listed current key, loads and holds exactly those values.
    info = describe_model(name)
    params = info.parameters[~info.parameters["fixed"]]
    lines = ["[scenario]", 'name = "m"', "duration_ms = 10.0", "seed = 1",
             "[[group]]", 'name = "g"', "size = 2", f'model = "{name}"', "[group.parameters]"]
    lines += [f"{k} = {v!r}" for k, v in zip(params["key"], params["default"])]
    lines += ["[group.initial]"] + [f"{k} = {v!r}" for k, v in zip(info.states["key"], info.states["initial"])]
    lines += ["[[pathway]]", 'source = "g"', 'target = "g"', 'connect = "all-to-all"', 'receptor = "excitatory"',
              f"{info.weight_key} = 0.1", "delay_ms = 1.0",
              "[[drive]]", 'target = "g"', 'kind = "step"', "start_ms = 1.0", "stop_ms = 2.0",
              f"{info.current_key} = 1.0"]
    scenario = parse_scenario("\n".join(lines) + "\n")
    group = scenario.groups[0]
    for k, v in zip(params["key"], params["default"]):
        assert group.parameters[k].value == v
    for k, v in zip(info.states["key"], info.states["initial"]):
        assert group.initial[k].value == v


def test_resting_state_of_lif_current_is_the_leak_reversal():
    # Closed form: with no input, C dV/dt = -g_L (V - E_L) vanishes at V = E_L and the
    # synaptic currents decay to 0.
    info = describe_model("lif-current")
    e_l = info.parameters.set_index("key").loc["e_l_mv", "default"]
    assert list(info.states["initial"]) == [e_l, 0.0, 0.0]
    assert info.states["initial"].dtype == "float64" and info.parameters["fixed"].dtype == bool


def test_conductance_keys_spell_siemens():
    # The units rule of the scenario files: units in key names, and a conductance
    # spells siemens, so no key reads as milli- or nanoseconds.
    for name in BUILT_IN:
        info = describe_model(name)
        keys = [*info.states["key"], *info.parameters["key"], info.weight_key, info.current_key]
        for key in keys:
            assert not key.endswith(("_ns", "_ms_per_cm2")), (name, key)
            if key.startswith(("g_", "a_")) or (key.startswith("weight_") and name != "lif-current"):
                assert key.endswith(("_nsiemens", "_msiemens_per_cm2")), (name, key)
        # Every key but the dimensionless ones (gating variables, the Wang-Buzsaki
        # rate factor phi) names a unit the catalog knows.
        for key in [*info.states["key"], *info.parameters["key"]]:
            assert unit_of(key) != "1" or key in ("m", "h", "n", "phi"), (name, key)
    assert unit_of("g_na_msiemens_per_cm2") == "mS/cm²" and unit_of("tau_m_ms") == "ms"
    assert unit_of("weight_nsiemens") == "nS" and unit_of("m") == "1"


def test_unknown_model_is_one_line_and_exit_2():
    res = CliRunner().invoke(cli, ["models", "hh-sqiud"])
    assert res.exit_code == 2
    assert res.output.count("\n") == 1
    assert "hh-sqiud" in res.output and "hh-squid" in res.output


def test_fixed_parameters_are_marked():
    info = describe_model("hh-squid")
    fixed = info.parameters.set_index("key")["fixed"]
    assert fixed["v_reset_mv"] and fixed["t_ref_ms"] and not fixed["g_na_msiemens_per_cm2"]
    assert math.isnan(info.parameters.set_index("key").loc["v_reset_mv", "default"])
