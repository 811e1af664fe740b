"""The exact lif-current reference against things this project did not write.

* The textbook closed form of the inter-spike interval of a LIF cell under
  constant current.
* An independent event-driven computation written here in plain Python:
  the textbook solution of the linear ODE by undetermined coefficients
  (a different formula from the propagator the reference uses), sampled on a
  fine grid between events and refined with scipy.optimize.brentq, restarted
  at each arrival; for a network, spikes are iterated to a fixed point
  (waveform relaxation) instead of marching in min-delay windows.
"""
from __future__ import annotations

import math

import numba
import numpy as np
import pytest
from scipy.optimize import brentq

from _netutil import (RECEPTOR_CURRENT, RECEPTOR_EXC, RECEPTOR_INH, lif_network, lif_params)
from spikegauge.errors import InputError
from spikegauge.integrate.engine import run_windows
from spikegauge.integrate.reference import ExactLifKernel, _first_crossing
from spikegauge.models import lif_current
from spikegauge.models.base import P_IEXT, P_TREF, P_VRESET, P_VTH

P = lif_current


@pytest.fixture(scope="module", autouse=True)
def one_thread():
    """One thread by default (the thread-count test below sets its own): short runs
    would otherwise pay a parallel launch per window, slow on a loaded machine."""
    before = numba.get_num_threads()
    numba.set_num_threads(1)
    yield
    numba.set_num_threads(before)


def run_exact(net, t_stop):
    res = run_windows(net, ExactLifKernel(net), t_stop)
    assert res.status == "ok", res.message
    return res


def spikes_of(res, cell):
    return np.sort(res.time_ms[res.cell == cell])


# ---------------------------------------------------------------------------
# Independent event-driven twin (plain Python)

GRID_MS = 0.002
"""Sampling step of the twin's crossing search: a crossing and recrossing
shorter than this would be missed by the twin (not by the reference)."""


def textbook_voltage(s, v0, ie0, ii0, iext, prm):
    """V(s) by undetermined coefficients; needs tau_syn != tau_m (textbook ODE solution)."""
    c, tm, el = prm[P.P_C_M], prm[P.P_TAU_M], prm[P.P_E_L]
    te, ti = prm[P.P_TAU_SYN_EXC], prm[P.P_TAU_SYN_INH]
    v_inf = el + tm * iext / c
    ke = ie0 * te * tm / (c * (te - tm))
    ki = ii0 * ti * tm / (c * (ti - tm))
    return v_inf + ke * np.exp(-s / te) - ki * np.exp(-s / ti) + (v0 - v_inf - ke + ki) * np.exp(-s / tm)


def twin_cell(prm, y0, arrivals, t_stop, voltage=textbook_voltage):
    """Spike times of one cell given all its arrivals [(time, receptor, weight)], sorted."""
    v, ie, ii = y0
    iext = prm[P_IEXT]
    te, ti = prm[P.P_TAU_SYN_EXC], prm[P.P_TAU_SYN_INH]
    t, refr, k, out = 0.0, -math.inf, 0, []
    while t < t_stop:
        while k < len(arrivals) and arrivals[k][0] <= t:
            _, rec, w = arrivals[k]
            if rec == RECEPTOR_CURRENT:
                iext += w
            elif rec == RECEPTOR_EXC:
                ie += w
            else:
                ii += w
            k += 1
        t_next = arrivals[k][0] if k < len(arrivals) and arrivals[k][0] < t_stop else t_stop
        clamped = t < refr
        if clamped:
            t_next = min(t_next, refr)
        h = t_next - t
        if not clamped:
            def g(s):
                return voltage(s, v, ie, ii, iext, prm) - prm[P_VTH]
            s = np.linspace(0.0, h, max(3, int(math.ceil(h / GRID_MS)) + 1))
            gs = g(s)
            up = np.nonzero((gs[1:] >= 0.0) & (gs[:-1] < 0.0))[0]
            if up.size:
                j = up[0]
                root = s[j + 1] if gs[j + 1] == 0.0 else brentq(g, s[j], s[j + 1], xtol=1e-15,
                                                                 rtol=4 * np.finfo(float).eps)
                out.append(t + root)
                ie *= math.exp(-root / te)
                ii *= math.exp(-root / ti)
                v = prm[P_VRESET]
                refr = t + root + prm[P_TREF]
                t = t + root
                continue
            v = float(voltage(h, v, ie, ii, iext, prm))
        ie *= math.exp(-h / te)
        ii *= math.exp(-h / ti)
        t = t_next
    return out


def twin_network(params, y0, synapses, events, t_stop, max_iter=200):
    """Spikes of every cell, iterated to a fixed point of 'spikes -> arrivals -> spikes'."""
    n = len(params)
    spikes = [[] for _ in range(n)]
    for _ in range(max_iter):
        new = []
        for i in range(n):
            arr = [(t, r, w) for (t, c, r, w) in events if c == i]
            for (src, tgt, d, w, r) in synapses:
                if tgt == i:
                    arr += [(ts + d, r, w) for ts in spikes[src] if ts + d < t_stop]
            arr.sort(key=lambda a: a[0])
            new.append(twin_cell(params[i], y0[i], arr, t_stop))
        if new == spikes:
            return spikes
        spikes = new
    raise AssertionError("the twin's spike iteration did not settle")


# ---------------------------------------------------------------------------
# Checks


def test_constant_current_isi_matches_closed_form():
    # Textbook closed form: V_inf = E_L + R I with R = tau_m / C, first crossing from
    # V_reset after tau_m ln((V_inf - V_reset)/(V_inf - V_th)), every later one t_ref later.
    i_pa = 400.0
    prm = lif_params(1, i_bias_pa=i_pa, tau_m_ms=20.0)[0]
    net = lif_network(prm[None, :], [[prm[P_VRESET], 0.0, 0.0]], 500.0)
    t = spikes_of(run_exact(net, 500.0), 0)
    v_inf = prm[P.P_E_L] + prm[P.P_TAU_M] / prm[P.P_C_M] * i_pa
    rise = prm[P.P_TAU_M] * math.log((v_inf - prm[P_VRESET]) / (v_inf - prm[P_VTH]))
    isi = prm[P_TREF] + rise
    assert t.size == math.floor((500.0 - rise) / isi) + 1
    assert abs(t[0] - rise) <= 1e-11
    assert np.max(np.abs(np.diff(t) - isi)) <= 1e-11


def test_subthreshold_constant_current_never_spikes():
    # Textbook: V_inf = E_L + R I below threshold gives no spike at all.
    prm = lif_params(1, i_bias_pa=180.0)[0]   # V_inf = -65 + 20/250*180 = -50.6 mV
    net = lif_network(prm[None, :], [[-65.0, 0.0, 0.0]], 1000.0)
    assert run_exact(net, 1000.0).time_ms.size == 0


def three_cell_case():
    rng = np.random.default_rng(20260101)  # the test's own known arrivals
    params = lif_params(3, i_bias_pa=[420.0, 450.0, 400.0], tau_syn_exc_ms=[4.0, 2.5, 6.0],
                        tau_syn_inh_ms=[8.0, 10.0, 5.0], t_ref_ms=[2.0, 1.0, 3.0])
    y0 = [[-55.0, 40.0, 10.0], [-62.0, 0.0, 80.0], [-51.0, 150.0, 0.0]]
    events = []
    for cell in range(3):
        for rec, rate, w in ((RECEPTOR_EXC, 0.4, 120.0), (RECEPTOR_INH, 0.2, 120.0)):
            times = np.sort(rng.uniform(0.0, 150.0, rng.poisson(rate * 150.0)))
            events += [(float(t), cell, rec, w) for t in times]
    # Current steps (changes of the external current between events).
    events += [(40.0, 2, RECEPTOR_CURRENT, 80.0), (95.5, 2, RECEPTOR_CURRENT, -120.0),
               (60.25, 0, RECEPTOR_CURRENT, -30.0)]
    synapses = [(0, 1, 1.5, 200.0, RECEPTOR_EXC), (1, 2, 2.0, 150.0, RECEPTOR_EXC),
                (2, 0, 2.5, 150.0, RECEPTOR_INH), (0, 2, 1.7, 100.0, RECEPTOR_INH),
                (1, 0, 3.1, 90.0, RECEPTOR_EXC)]
    return params, y0, synapses, events


def test_three_cell_network_matches_event_driven_twin():
    params, y0, synapses, events = three_cell_case()
    t_stop = 150.0
    net = lif_network(params, y0, t_stop, synapses=synapses, events=events)
    res = run_exact(net, t_stop)
    twin = twin_network(params, y0, synapses, events, t_stop)
    assert min(len(s) for s in twin) >= 5        # the case is not trivially quiet
    for cell in range(3):
        ours = spikes_of(res, cell)
        assert ours.size == len(twin[cell]), cell
        # Independent event-driven computation (textbook closed form + scipy brentq).
        assert np.max(np.abs(ours - np.array(twin[cell]))) <= 1e-10, cell


def test_three_cell_network_is_thread_count_independent():
    params, y0, synapses, events = three_cell_case()
    net = lif_network(params, y0, 150.0, synapses=synapses, events=events)
    try:
        runs = []
        for n in sorted({1, numba.config.NUMBA_NUM_THREADS}):
            numba.set_num_threads(n)
            runs.append(run_exact(net, 150.0))
    finally:
        numba.set_num_threads(1)
    assert all(np.array_equal(r.time_ms, runs[0].time_ms) and np.array_equal(r.cell, runs[0].cell)
               for r in runs)


def crossing_case(margin_mv):
    """A cell at rest hit by one excitatory arrival whose voltage peak tops threshold by margin.

    Without external current V(s) = E_L + (w/C) tau_m tau_e/(tau_m - tau_e)(e^{-s/tau_m} - e^{-s/tau_e});
    its peak is at s* = ln(tau_m/tau_e) / (1/tau_e - 1/tau_m) (textbook calculus).
    """
    prm = lif_params(1, i_bias_pa=0.0)[0]
    tm, te, c = prm[P.P_TAU_M], prm[P.P_TAU_SYN_EXC], prm[P.P_C_M]
    s_peak = math.log(tm / te) / (1.0 / te - 1.0 / tm)
    shape = tm * te / (tm - te) * (math.exp(-s_peak / tm) - math.exp(-s_peak / te)) / c
    w = (prm[P_VTH] + margin_mv - prm[P.P_E_L]) / shape
    t_arr, t_next = 5.0, 45.0
    events = [(t_arr, 0, RECEPTOR_EXC, w), (t_next, 0, RECEPTOR_EXC, 0.0)]
    return prm, w, s_peak, t_arr, t_next, events


def test_crossing_and_recrossing_between_two_events_is_found():
    prm, w, s_peak, t_arr, t_next, events = crossing_case(margin_mv=1e-3)

    def g(s):
        return textbook_voltage(s, prm[P.P_E_L], w, 0.0, 0.0, prm) - prm[P_VTH]

    # Both ends of the interval between the two events lie below threshold:
    # only the interior maximum reveals the crossing.
    assert g(0.0) < 0.0 and g(t_next - t_arr) < 0.0 and g(s_peak) > 0.0
    net = lif_network(prm[None, :], [[prm[P.P_E_L], 0.0, 0.0]], 60.0, events=events)
    t = spikes_of(run_exact(net, 60.0), 0)
    # First crossing from brentq on the textbook closed form, bracketed by [0, s_peak].
    expected = t_arr + brentq(g, 0.0, s_peak, xtol=1e-15, rtol=4 * np.finfo(float).eps)
    assert t.size == 1
    assert abs(t[0] - expected) <= 1e-10


def test_peak_just_below_threshold_gives_no_spike():
    prm, w, s_peak, t_arr, t_next, events = crossing_case(margin_mv=-1e-6)
    net = lif_network(prm[None, :], [[prm[P.P_E_L], 0.0, 0.0]], 60.0, events=events)
    assert run_exact(net, 60.0).time_ms.size == 0


def test_equal_synaptic_and_membrane_time_constants_use_the_limit():
    # tau_exc == tau_m: V - V_inf = (V0 - V_inf + I0 s / C) e^{-s/tau} (textbook limit of
    # the undetermined-coefficients solution; resonant forcing).
    prm = lif_params(1, i_bias_pa=100.0, tau_syn_exc_ms=20.0, tau_m_ms=20.0)[0]
    w = 300.0
    net = lif_network(prm[None, :], [[-62.0, 0.0, 0.0]], 80.0, events=[(3.0, 0, RECEPTOR_EXC, w)])
    t = spikes_of(run_exact(net, 80.0), 0)
    c, tau = prm[P.P_C_M], prm[P.P_TAU_M]
    v_inf = prm[P.P_E_L] + tau / c * prm[P_IEXT]
    v3 = v_inf + (-62.0 - v_inf) * math.exp(-3.0 / tau)

    def g(s):
        return v_inf + (v3 - v_inf + w * s / c) * math.exp(-s / tau) - prm[P_VTH]

    s = np.linspace(0.0, 77.0, 77001)
    j = np.nonzero(np.array([g(x) for x in s]) >= 0.0)[0][0]
    expected = 3.0 + brentq(g, s[j - 1], s[j], xtol=1e-15, rtol=4 * np.finfo(float).eps)
    assert t.size >= 1
    assert abs(t[0] - expected) <= 1e-10


@pytest.mark.parametrize("family", ["mixed", "dip-then-cross"])
def test_first_crossing_kernel_matches_sampled_twin(family):
    # The numba crossing search on one inter-event interval against its slow twin:
    # the textbook closed form sampled every 1 us, refined by scipy brentq. The
    # "dip-then-cross" family (fast excitation, slower strong inhibition, strong bias)
    # makes V rise, fall back and cross later, so the first crossing follows an
    # interior maximum below threshold.
    rng = np.random.default_rng(3 if family == "mixed" else 4)
    seen = dict(spike=0, none=0, after_dip=0, ends_below=0)
    for _ in range(250):
        if family == "mixed":
            prm = lif_params(1, tau_m_ms=rng.uniform(5, 30), tau_syn_exc_ms=rng.uniform(0.5, 10),
                             tau_syn_inh_ms=rng.uniform(1, 20), i_bias_pa=rng.uniform(0, 450))[0]
            ie0 = rng.uniform(0, 1500) * (rng.random() < 0.8)
            ii0 = rng.uniform(0, 1500) * (rng.random() < 0.8)
            v0 = rng.uniform(-70, -50.2)
        else:
            prm = lif_params(1, tau_m_ms=rng.uniform(5, 30), tau_syn_exc_ms=rng.uniform(0.3, 3),
                             tau_syn_inh_ms=rng.uniform(3, 20), i_bias_pa=rng.uniform(300, 900))[0]
            ie0, ii0, v0 = rng.uniform(0, 3000), rng.uniform(0, 5000), rng.uniform(-60, -50.2)
        h = rng.uniform(0.2, 30.0)
        iext = prm[P_IEXT]

        def g(s):
            return textbook_voltage(s, v0, ie0, ii0, iext, prm) - prm[P_VTH]

        s = np.linspace(0.0, h, int(h / 1e-3) + 2)
        gs = g(s)
        peak = (gs[1:-1] >= gs[:-2]) & (gs[1:-1] >= gs[2:])
        # A sampled twin cannot decide a near-tangent touch; none occur in these draws.
        assert not np.any(np.abs(gs[1:-1][peak]) < 1e-3)
        ours = _first_crossing(h, 0.0, prm[P_VTH], v0, ie0, ii0, iext, prm[P.P_E_L], prm[P.P_C_M],
                               prm[P.P_TAU_M], prm[P.P_TAU_SYN_EXC], prm[P.P_TAU_SYN_INH])
        up = np.nonzero((gs[1:] >= 0.0) & (gs[:-1] < 0.0))[0]
        if up.size == 0:
            seen["none"] += 1
            assert ours == -1.0
            continue
        j = up[0]
        twin = brentq(g, s[j], s[j + 1], xtol=1e-15, rtol=4 * np.finfo(float).eps)
        assert abs(ours - twin) <= 1e-12
        seen["spike"] += 1
        seen["after_dip"] += bool(np.any(peak[:max(j - 1, 0)]))
        seen["ends_below"] += bool(gs[-1] < 0.0)
    # The draws exercise what they are meant to.
    assert seen["spike"] >= 20 and seen["none"] >= 20
    assert seen["ends_below"] >= 3
    if family == "dip-then-cross":
        assert seen["after_dip"] >= 3


def test_other_models_are_refused_with_the_group_name():
    prm = lif_params(1)
    net = lif_network(prm, [[-65.0, 0.0, 0.0]], 10.0, group_names=("pyramidal",),
                      group_model=("lif-conductance",))
    with pytest.raises(InputError, match="pyramidal"):
        ExactLifKernel(net)
