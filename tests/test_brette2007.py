"""The bundled networks of Brette et al. 2007 (J Comput Neurosci 23:349-398, Appendix), benchmarks 1 and 2.

The scenarios load with the published sizes and the rules their comments state, the profiled
short copies are the same networks, a small copy built by the same rules runs and spikes, and
the current-based benchmark's cells fire alone at the closed-form LIF interval.
"""
from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest

from spikegauge import simulate
from spikegauge.scenario import load_scenario, parse_scenario

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
NETWORKS = ("brette2007-lif-conductance", "brette2007-lif-current")
FILES = [f"{name}{suffix}.toml" for name in NETWORKS for suffix in ("", "-short")]


def _text(name: str) -> str:
    return (SCENARIOS / f"{name}.toml").read_text(encoding="utf-8")


def _replace_once(text: str, old: str, new: str) -> str:
    assert text.count(old) == 1, f"expected one {old!r} in the scenario"
    return text.replace(old, new)


def _scaled(name: str, n_exc: int, n_inh: int, duration_ms: float, *, connected: bool = True) -> str:
    """The bundled scenario's text with other group sizes and duration (and without pathways)."""
    text = _replace_once(_text(name), "duration_ms = 1000.0", f"duration_ms = {duration_ms}")
    text = _replace_once(text, "size = 3200", f"size = {n_exc}")
    text = _replace_once(text, "size = 800", f"size = {n_inh}")
    return text if connected else text[:text.index("[[pathway]]")]


@pytest.mark.parametrize("name", FILES)
def test_bundled_scenario_loads_with_the_published_sizes_and_our_stated_rules(name):
    sc = load_scenario(SCENARIOS / name)
    # Brette et al. 2007, Appendix: 4000 cells, 3200 excitatory and 800 inhibitory.
    assert [(g.name, g.size) for g in sc.groups] == [("exc", 3200), ("inh", 800)]
    # Our stated choices: every ordered pair of groups connected with p = 0.02, every delay 1.0 ms.
    assert sorted((p.source, p.target) for p in sc.pathways) == [
        ("exc", "exc"), ("exc", "inh"), ("inh", "exc"), ("inh", "inh")]
    rng = np.random.default_rng(0)
    for p in sc.pathways:
        assert p.connect == "random" and p.p_connect == 0.02 and not p.self_connections
        assert p.delay_ms.sample(rng, 3).tolist() == [1.0, 1.0, 1.0]
        assert p.receptor == ("excitatory" if p.source == "exc" else "inhibitory")
    assert not sc.drives
    # The full networks run the stated 1000 ms; the short copies less.
    assert sc.duration_ms < 1000.0 if name.endswith("-short.toml") else sc.duration_ms == 1000.0


SHORT_COPIES = sorted(p.name.removesuffix("-short.toml") for p in SCENARIOS.glob("*-short.toml"))


def test_every_profiled_network_has_a_short_copy():
    assert {"brette2007-lif-conductance", "brette2007-lif-current", "brette2007-hh", "brette2007-lif-jump",
            "izhikevich-network"} <= set(SHORT_COPIES)


@pytest.mark.parametrize("name", SHORT_COPIES)
def test_short_copy_differs_from_the_full_network_only_in_name_and_duration(name):
    full = tomllib.loads(_text(name))
    short = tomllib.loads(_text(f"{name}-short"))
    assert short["scenario"].pop("name") == f"{name}-short"
    assert short["scenario"].pop("duration_ms") < full["scenario"].pop("duration_ms")
    full["scenario"].pop("name")
    assert short == full


@pytest.mark.parametrize("name", NETWORKS)
def test_small_copy_by_the_same_rules_runs_and_spikes(name):
    # 200 cells in the published 4:1 ratio over 100 ms; fixed RK2 at 0.1 ms with linear crossing.
    sc = parse_scenario(_scaled(name, 160, 40, 100.0))
    run = simulate(sc, strategy="fixed", stepper="rk2", dt_ms=0.1, crossing="linear", delivery="grid")
    assert run.status == "ok" and run.t_stop_ms == 100.0
    cells = run.spikes["cell"].to_numpy()
    # Both groups fire: in benchmark 1 from the initial conductances, in benchmark 2 by themselves.
    assert (cells < 160).any() and (cells >= 160).any()


def test_current_based_cells_fire_alone_at_the_closed_form_lif_interval():
    # The bundled benchmark 2 groups' own parameters, disconnected: with no input, each cell
    # relaxes towards V_inf = E_L = -49 mV, above threshold, so it fires periodically with
    # ISI = t_ref + tau_m ln((V_inf - V_reset) / (V_inf - V_th))  (textbook closed form of the
    # LIF under constant drive).
    sc = parse_scenario(_scaled("brette2007-lif-current", 4, 2, 400.0, connected=False))
    assert not sc.pathways
    run = simulate(sc, strategy="exact")
    assert run.status == "ok"
    for g in sc.groups:
        p = g.parameters
        v_inf, v_th, v_reset, t_ref, tau_m = (
            p[k].value for k in ("e_l_mv", "v_th_mv", "v_reset_mv", "t_ref_ms", "tau_m_ms"))
        assert v_inf > v_th
        isi = t_ref + tau_m * math.log((v_inf - v_reset) / (v_inf - v_th))
        first = int(run.group_first[sc.groups.index(g)])
        for cell in range(first, first + g.size):
            times = run.spikes.loc[run.spikes["cell"] == cell, "time_ms"].to_numpy()
            assert len(times) >= 6     # 400 ms / 53 ms, less the first interval from V0
            np.testing.assert_allclose(np.diff(times), isi, rtol=0, atol=1e-9)
