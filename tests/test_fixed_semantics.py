"""Event semantics of the fixed-step driver at the edges (DESIGN.md, "Event semantics").

Each case compares with the exact event-driven reference (Rotter & Diesmann 1999
propagator, tested against brentq in test_exact_reference.py) or with a plain
count of what the scenario asks for.
"""
import numpy as np
import pytest

import spikegauge
from spikegauge.integrate.engine import run_windows
from spikegauge.integrate.fixed import FixedStepKernel
from spikegauge.bench import SINGLE_HH_TOML
from spikegauge.simulation import simulate

from _netutil import RECEPTOR_EXC, lif_network, lif_params

FIXED = dict(strategy="fixed", stepper="rk4", crossing="hermite", delivery="exact")


def test_time_step_longer_than_smallest_delay_is_refused_for_both_deliveries():
    # A window is at least one step; a delay shorter than it would reach a cell inside a
    # window it has already integrated (the arrival would act late).
    p = lif_params(2, i_bias_pa=np.array([4650.0, 0.0]), t_ref_ms=1000.0)
    net = lif_network(p, np.zeros((2, 3)) + [-65.0, 0, 0], 10.0,
                      synapses=[(0, 1, 0.05, 5000.0, RECEPTOR_EXC)])
    for delivery in ("grid", "exact"):
        with pytest.raises(spikegauge.InputError, match="smallest delay"):
            simulate(net, strategy="fixed", stepper="rk4", crossing="linear", delivery=delivery,
                     dt_ms=0.1)


def test_exact_delivery_windows_never_outgrow_the_smallest_delay():
    p = lif_params(2, i_bias_pa=np.array([4650.0, 0.0]), t_ref_ms=1000.0)
    net = lif_network(p, np.zeros((2, 3)) + [-65.0, 0, 0], 10.0,
                      synapses=[(0, 1, 0.35, 5000.0, RECEPTOR_EXC)])
    kernel = FixedStepKernel(net, 0.1, "rk4", "hermite", "exact")
    assert np.max(np.diff(kernel.boundaries(10.0))) <= net.d_min_ms
    # and the one-spike relay lands where the exact reference puts it
    ref = simulate(net, strategy="exact")
    fix = simulate(net, dt_ms=0.01, **FIXED)
    np.testing.assert_allclose(fix.spikes["time_ms"], ref.spikes["time_ms"], atol=1e-8)


def test_last_step_is_cut_at_a_stop_time_off_the_grid():
    # One cell that would reach threshold at about 1.05 ms, run to 1.01 ms with dt 0.1:
    # no spike, and the run reports reaching 1.01 ms, not 1.1 ms.
    p = lif_params(1, i_bias_pa=3650.0)
    net = lif_network(p, np.array([[-65.0, 0, 0]]), 1.01)
    ref = simulate(net, strategy="exact")
    fix = simulate(net, dt_ms=0.1, **FIXED)
    assert len(ref.spikes) == 0 and len(fix.spikes) == 0
    assert fix.t_stop_ms == pytest.approx(1.01, abs=1e-12)
    longer = lif_network(p, np.array([[-65.0, 0, 0]]), 1.2)
    t_ref = simulate(longer, strategy="exact").spikes["time_ms"].to_numpy()
    t_fix = simulate(longer, dt_ms=0.1, t_stop_ms=1.17, **FIXED).spikes["time_ms"].to_numpy()
    assert t_ref.size == t_fix.size == 1 and abs(t_fix[0] - t_ref[0]) < 1e-5


def test_many_arrivals_inside_one_step_are_not_a_divergence():
    # 10,001 tiny inputs inside one 0.1 ms step: every split is bounded by an arrival.
    p = lif_params(1, i_bias_pa=0.0)
    times = np.linspace(0.5, 0.59, 10001)
    events = [(float(t), 0, RECEPTOR_EXC, 0.001) for t in times]
    net = lif_network(p, np.array([[-65.0, 0, 0]]), 2.0, events=events)
    run = simulate(net, dt_ms=0.1, **FIXED)
    assert run.status == "ok", run.message
    assert run.cost["arrivals"] == 10001




@pytest.mark.parametrize("dt_ms", [1.0, 3.0])
def test_backward_euler_blow_up_is_a_status_not_a_crash(tmp_path, dt_ms):
    # Huge implicit steps on HH: the Newton iterate blows up (at 3 ms the Jacobian turns
    # non-finite, which LAPACK refuses); either way the run reports it, naming Newton.
    path = tmp_path / "hh.toml"
    path.write_text(SINGLE_HH_TOML.format(duration=100.0))
    run = simulate(path, strategy="fixed", stepper="backward-euler", dt_ms=dt_ms,
                   crossing="linear", delivery="exact")
    assert run.status == "diverged"
    assert "Newton" in run.message and "cell 0" in run.message


def test_trace_samples_are_not_duplicated_near_window_edges(tmp_path):
    # Sampling every 0.1 ms with windows of the smallest delay (0.7 ms): 30 samples in 3 ms.
    p = lif_params(2, i_bias_pa=np.array([400.0, 100.0]))
    net = lif_network(p, np.zeros((2, 3)) + [-65.0, 0, 0], 3.0,
                      synapses=[(0, 1, 0.7, 50.0, RECEPTOR_EXC)])
    run = simulate(net, strategy="exact", record_cells=[0, 1], record_interval_ms=0.1)
    assert len(run.traces) == 2 * 30
    assert not run.traces.duplicated(["cell", "time_ms"]).any()


def test_late_arrivals_are_refused_by_the_engine():
    # A kernel whose windows are longer than the smallest delay must not run silently.
    p = lif_params(2, i_bias_pa=np.array([4650.0, 0.0]), t_ref_ms=1000.0)
    net = lif_network(p, np.zeros((2, 3)) + [-65.0, 0, 0], 5.0,
                      synapses=[(0, 1, 0.35, 5000.0, RECEPTOR_EXC)])
    kernel = FixedStepKernel(net, 0.1, "rk4", "hermite", "exact")
    kernel.steps_per_window = 20          # 2 ms windows, far longer than the 0.35 ms delay
    with pytest.raises(spikegauge.ComputationError, match="smallest delay"):
        run_windows(net, kernel, 5.0)
