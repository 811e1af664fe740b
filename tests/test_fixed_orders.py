"""Spike-time accuracy and convergence orders of the fixed-step strategy.

Outside references:

* The textbook closed form of a LIF cell's spike times under constant current.
* Published spike-time error orders with interpolated threshold crossings and
  the reset carried through the rest of the step (Hansel, Mato, Meunier &
  Neltner 1998, Neural Comput 10:467-483; Shelley & Tao 2001, J Comput
  Neurosci 11:111-119): euler + linear 1, rk2 + linear 2, rk4 + linear 2
  (the interpolation caps the order), rk4 + hermite 4; without interpolation
  the error is quantised to the grid.
* The implicit trapezoidal rule is second order (textbook); with Hermite
  crossing (third-order interpolation, Hansel et al. 1998) its spike times
  are second order.
* On a network, the exact event-driven reference (Rotter & Diesmann 1999
  propagator; itself checked against a scipy brentq twin in
  test_exact_reference.py).

Orders are measured: RMS spike-time error over dt = 0.05..0.8 ms, slope of
log error on log dt, fitted over errors above 1e-10 ms (round-off floor).
"""
from __future__ import annotations

import math

import numba
import numpy as np
import pytest

import spikegauge
from _netutil import RECEPTOR_EXC, RECEPTOR_INH, lif_network, lif_params, poisson_drive
from spikegauge.models import lif_current as P
from spikegauge.models.base import P_TREF, P_VRESET, P_VTH

DTS = (0.05, 0.1, 0.2, 0.4, 0.8)
ROUND_OFF_FLOOR_MS = 1e-10
ORDER_TOL = 0.3
# (stepper, crossing, published order: Hansel et al. 1998; Shelley & Tao 2001; the
# trapezoidal rule's order 2 is textbook)
ORDERS = [("euler", "linear", 1.0), ("rk2", "linear", 2.0), ("rk4", "linear", 2.0),
          ("rk4", "hermite", 4.0), ("trapezoidal", "hermite", 2.0)]


@pytest.fixture(scope="module", autouse=True)
def one_thread():
    """Run on one thread: results do not depend on the thread count (DESIGN.md, checked
    by the determinism tests), and these many short runs would otherwise pay a parallel
    launch per window, which is slow on a loaded machine."""
    before = numba.get_num_threads()
    numba.set_num_threads(1)
    yield
    numba.set_num_threads(before)


def trains(run, n_cells):
    """Spike times of every cell, each sorted."""
    df = run.spikes
    return [np.sort(df.time_ms[df.cell == c].to_numpy()) for c in range(n_cells)]


def matched_horizon(ref, test):
    """Time before which every spike of ``test`` pairs, by index, with the reference.

    Per cell, spike k of the test train pairs with reference spike k while it lies
    closer to it than half the gap to either neighbouring reference spike; the
    first spike that fails (or has no partner: a count mismatch) ends the span.
    """
    horizon = math.inf
    for r, u in zip(ref, test):
        for k in range(max(r.size, u.size)):
            if k >= min(r.size, u.size):
                horizon = min(horizon, (u if k < u.size else r)[k])
                break
            gap_lo = r[k] - r[k - 1] if k > 0 else math.inf
            gap_hi = r[k + 1] - r[k] if k + 1 < r.size else math.inf
            if not abs(u[k] - r[k]) < 0.5 * min(gap_lo, gap_hi):
                horizon = min(horizon, u[k], r[k])
                break
    return horizon


def rms_error(ref, test, horizon):
    """RMS time error (ms) over reference spikes before ``horizon``, paired by index."""
    d = [u[:np.count_nonzero(r < horizon)] - r[r < horizon] for r, u in zip(ref, test)]
    d = np.concatenate(d)
    return float(np.sqrt(np.mean(d ** 2))), d.size


def fitted_order(dts, errors):
    dts, errors = np.asarray(dts), np.asarray(errors)
    keep = errors > ROUND_OFF_FLOOR_MS
    assert keep.sum() >= 3, errors
    return float(np.polyfit(np.log(dts[keep]), np.log(errors[keep]), 1)[0])


def fixed(net, stepper, crossing, dt, delivery="exact"):
    run = spikegauge.simulate(net, strategy="fixed", stepper=stepper, crossing=crossing,
                              delivery=delivery, dt_ms=dt)
    assert run.status == "ok", run.message
    return run


# ---------------------------------------------------------------------------
# Single LIF cell under constant current (textbook closed form)

CELL_T_MS = 200.0
CELL_I_PA = 400.0


@pytest.fixture(scope="module")
def cell():
    prm = lif_params(1, i_bias_pa=CELL_I_PA, tau_m_ms=20.0)[0]
    net = lif_network(prm[None, :], [[prm[P_VRESET], 0.0, 0.0]], CELL_T_MS)
    # Textbook closed form: V_inf = E_L + R I (R = tau_m / C); from V_reset the voltage
    # reaches V_th after tau_m ln((V_inf - V_reset) / (V_inf - V_th)); ISI adds t_ref.
    v_inf = prm[P.P_E_L] + prm[P.P_TAU_M] / prm[P.P_C_M] * CELL_I_PA
    rise = prm[P.P_TAU_M] * math.log((v_inf - prm[P_VRESET]) / (v_inf - prm[P_VTH]))
    isi = prm[P_TREF] + rise
    exact = rise + isi * np.arange(math.floor((CELL_T_MS - rise) / isi) + 1)
    return net, exact, isi


@pytest.mark.parametrize("stepper,crossing,order", ORDERS)
def test_single_cell_spike_time_order(cell, stepper, crossing, order):
    net, exact, _ = cell
    errors = []
    for dt in DTS:
        got = trains(fixed(net, stepper, crossing, dt), 1)
        horizon = matched_horizon([exact], got)
        err, n = rms_error([exact], got, horizon)
        assert n >= 5, (dt, horizon)
        errors.append(err)
    p = fitted_order(DTS, errors)
    assert abs(p - order) <= ORDER_TOL, (p, errors)


def test_rk4_hermite_fine_step_matches_closed_form(cell):
    net, exact, isi = cell
    got = trains(fixed(net, "rk4", "hermite", 0.01), 1)[0]
    assert got.size == exact.size
    # Closed-form ISI (textbook) within 1e-9 ms, and each spike time too.
    assert np.max(np.abs(np.diff(got) - isi)) <= 1e-9
    assert np.max(np.abs(got - exact)) <= 1e-9


@pytest.mark.parametrize("dt", DTS)
def test_step_crossing_isi_is_off_by_at_most_one_step(cell, dt):
    # Without interpolation the spike sits at the end of the step that crossed:
    # every inter-spike interval is quantised and off by less than one step (Hansel et
    # al. 1998). rk4 keeps the stepper's own error far below dt.
    net, exact, isi = cell
    got = trains(fixed(net, "rk4", "step", dt), 1)[0]
    assert got.size >= exact.size - 1
    assert np.all(np.abs(np.diff(got) - isi) <= dt)
    assert abs(got[0] - exact[0]) <= dt


# ---------------------------------------------------------------------------
# A small lif-current network against the exact reference

NET_CELLS = 20
NET_T_MS = 200.0


@pytest.fixture(scope="module")
def network():
    """20 mean-driven cells with Poisson input and sparse recurrent connections.

    Mean-driven (V_inf 7-15 mV above threshold) with moderate input keeps every
    crossing steep, so small time errors do not turn into missed spikes at the
    largest step over most of the run.
    """
    rng = np.random.default_rng(7)  # the test's own network draw
    n = NET_CELLS
    params = lif_params(n, i_bias_pa=rng.uniform(400.0, 500.0, n))
    y0 = np.column_stack([rng.uniform(-65.0, -52.0, n), np.zeros(n), np.zeros(n)])
    synapses = []
    for tgt in range(n):
        for src in rng.choice([c for c in range(n) if c != tgt], 4, replace=False):
            exc = src < 16
            synapses.append((int(src), tgt, float(rng.uniform(1.0, 3.0)), 30.0 if exc else 60.0,
                             RECEPTOR_EXC if exc else RECEPTOR_INH))
    drives = [poisson_drive(0, np.arange(n), 200.0, 100.0, RECEPTOR_EXC),
              poisson_drive(1, np.arange(n), 100.0, 50.0, RECEPTOR_INH)]
    net = lif_network(params, y0, NET_T_MS, synapses=synapses, poisson=drives, seed=11)
    ref = spikegauge.simulate(net, strategy="exact")
    assert ref.status == "ok", ref.message
    ref_trains = trains(ref, n)
    assert sum(r.size for r in ref_trains) >= 200
    return net, ref_trains


@pytest.mark.parametrize("stepper,crossing,order", ORDERS)
def test_network_spike_time_order_against_exact_reference(network, stepper, crossing, order):
    net, ref = network
    runs = [trains(fixed(net, stepper, crossing, dt), NET_CELLS) for dt in DTS]
    # One span for the whole dt sweep, so every point of the fit measures the same spikes.
    horizon = min(matched_horizon(ref, got) for got in runs)
    assert horizon >= 0.5 * NET_T_MS
    errors = []
    for got in runs:
        err, n = rms_error(ref, got, horizon)
        assert n >= 100
        errors.append(err)
    p = fitted_order(DTS, errors)
    assert abs(p - order) <= ORDER_TOL, (p, errors)
