"""The block loop of fixed-step grid delivery against the cell-by-cell window loop.

The window loop (``run_windows`` with the fixed-step kernel) advances each
cell on its own through ``_fixed_cell`` and applies arrivals one by one; it is
the slow, obvious twin of ``fixed_block``. The two sum a step's arrivals in a
different order, so spike times may differ in the last bits; every spike must
match within 1e-9 ms. Bit-identity across thread counts and block sizes is
checked on a network spread over several blocks.
"""
from __future__ import annotations

import numpy as np
import pytest

from _netutil import assert_block_loop_identical
from spikegauge.integrate.engine import CellState, run_windows
from spikegauge.integrate.fixed import FixedStepKernel
from spikegauge.integrate.fixed_block import run_grid
from spikegauge.network import build_network
from spikegauge.scenario import load_scenario, parse_scenario

SCENARIOS = {
    "lif-current": "scenarios/demo-lif.toml",
    "lif-conductance": "scenarios/demo-lif-conductance.toml",  # Poisson, current step, spike file
    "hh-squid": "scenarios/demo-hh.toml",
}
SETTINGS = [
    ("euler", "step", 0.1),
    ("rk2", "linear", 0.1),
    ("rk4", "hermite", 0.05),
    ("expeuler", "linear", 0.1),      # no block form: every cell through the single-cell step
    ("backward-euler", "step", 0.1),
    ("trapezoidal", "hermite", 0.1),  # implicit, no block form
]
T_STOP_MS = 60.0


def _networks():
    return {name: build_network(load_scenario(path)) for name, path in SCENARIOS.items()}


NETWORKS = _networks()


def _by_cell(cells, times):
    order = np.lexsort((times, cells))
    return cells[order], times[order]


def _both(net, stepper, crossing, dt, t_stop=T_STOP_MS, **kw):
    kernel = FixedStepKernel(net, dt, stepper, crossing, "grid")
    block = run_grid(kernel, net, t_stop, CellState.initial(net), **kw)
    window = run_windows(net, kernel, t_stop, state=CellState.initial(net))
    return block, window


@pytest.mark.parametrize("model", sorted(SCENARIOS))
@pytest.mark.parametrize("stepper,crossing,dt", SETTINGS)
def test_block_loop_matches_the_cell_by_cell_loop(model, stepper, crossing, dt):
    net = NETWORKS[model]
    if model == "hh-squid":
        dt /= 4                       # explicit steppers on HH need short steps
    block, window = _both(net, stepper, crossing, dt)
    assert block.status == window.status == "ok"
    assert window.cell.size > 20, "the check needs spikes"
    bc, bt = _by_cell(block.cell, block.time_ms)
    wc, wt = _by_cell(window.cell, window.time_ms)
    np.testing.assert_array_equal(bc, wc)
    np.testing.assert_allclose(bt, wt, rtol=0, atol=1e-9)
    # Same work: every cell-step, every arrival (right-hand-side counts differ: the
    # cell-by-cell loop reuses f at the end of a step for the next, the block loop does not).
    assert block.counters["steps"] == window.counters["steps"]
    assert block.counters["arrivals"] == window.counters["arrivals"]


def test_interpolated_reset_and_a_refractory_period_ending_inside_a_step():
    # t_ref = 1.05 ms on a 0.1 ms grid: every refractory period ends inside a step, and
    # every spike is reset at its interpolated time: both go through the single-cell step.
    text = _two_group_text(t_ref_ms=1.05)
    net = build_network(parse_scenario(text, source="inline.toml"))
    block, window = _both(net, "rk2", "linear", 0.1, t_stop=100.0)
    assert block.status == window.status == "ok"
    assert window.cell.size > 50
    np.testing.assert_array_equal(*(np.sort(x.cell) for x in (block, window)))
    np.testing.assert_allclose(np.sort(block.time_ms), np.sort(window.time_ms), rtol=0, atol=1e-9)


def test_several_spikes_in_one_step_without_refractory_period():
    # No refractory period, a strong drive and a long step: cells fire more than once per step.
    text = _two_group_text(t_ref_ms=0.0, bias=10000.0)
    net = build_network(parse_scenario(text, source="inline.toml"))
    block, window = _both(net, "rk2", "linear", 1.0, t_stop=40.0)
    assert block.status == window.status == "ok"
    per_step = np.bincount((window.time_ms // 1.0).astype(int) * net.n_cells + window.cell)
    assert per_step.max() >= 2
    np.testing.assert_allclose(np.sort(block.time_ms), np.sort(window.time_ms), rtol=0, atol=1e-9)


def test_blow_up_inside_the_block_loop_is_a_status_with_its_time():
    net = NETWORKS["hh-squid"]
    block, window = _both(net, "euler", "linear", 0.2)   # explicit Euler on HH at 0.2 ms blows up
    assert block.status == window.status == "diverged"
    assert block.t_reached_ms == pytest.approx(window.t_reached_ms, abs=1e-12)
    assert block.t_reached_ms < T_STOP_MS


def test_stop_time_off_the_grid_cuts_the_last_step():
    net = NETWORKS["lif-conductance"]
    block, window = _both(net, "rk4", "linear", 0.1, t_stop=30.04)
    assert block.counters["steps"] == window.counters["steps"]
    np.testing.assert_allclose(np.sort(block.time_ms), np.sort(window.time_ms), rtol=0, atol=1e-9)
    assert block.time_ms.max() <= 30.04


@pytest.mark.parametrize("stepper,crossing", [("euler", "step"), ("rk4", "linear"), ("rk2", "hermite"),
                                              ("trapezoidal", "hermite")])
def test_bit_identical_for_any_thread_count_and_block_size(stepper, crossing):
    net = build_network(parse_scenario(_two_group_text(t_ref_ms=2.0, size=150), source="inline.toml"))
    kernel = FixedStepKernel(net, 0.1, stepper, crossing, "grid")
    assert_block_loop_identical(kernel, net, 80.0, ((1, 256), (2, 16), (2, 7), (1, 7)))


def test_traces_and_progress_see_every_piece():
    net = NETWORKS["lif-conductance"]
    kernel = FixedStepKernel(net, 0.1, "euler", "step", "grid")
    seen, reached = [], []
    state = CellState.initial(net)
    edges = np.array([5.0, 10.0, 12.5])
    run_grid(kernel, net, 20.0, state, progress=reached.append,
             on_window=lambda t0, t1, st: seen.append((t1, st.y[0, 0])), extra_edges=edges)
    assert reached[-1] == 20.0
    ends = [t for t, _ in seen]
    assert all(any(abs(e - t) < 1e-12 for t in ends) for e in edges)
    assert len(set(v for _, v in seen)) > 1   # the state is written back before each call


def _two_group_text(t_ref_ms, bias=400.0, size=40):
    return f"""
[scenario]
name = "block-check"
duration_ms = 200.0
seed = 5

[[group]]
name = "e"
size = {size}
model = "lif-conductance"
[group.parameters]
t_ref_ms = {t_ref_ms}
i_bias_pa = {{ distribution = "uniform", low = {bias * 0.5}, high = {bias} }}
[group.initial]
v_mv = {{ distribution = "uniform", low = -65.0, high = -50.0 }}

[[pathway]]
source = "e"
target = "e"
connect = "sources-per-target"
sources_per_target = 10
receptor = "inhibitory"
weight_nsiemens = 2.0
delay_ms = {{ distribution = "uniform", low = 1.0, high = 2.0 }}
"""
