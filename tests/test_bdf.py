"""Variable-order BDF against references the project did not write.

Sources named beside each check:

* scipy.integrate's BDF (scipy/integrate/_ivp/bdf.py, after Shampine &
  Reichelt 1997, SIAM J Sci Comput 18:1): the re-interpolation of the
  difference array onto a new step (``change_D``) and the interpolating
  polynomial of the dense output (``BdfDenseOutput``), the slow twins of
  the numba kernels;
* scipy.integrate.solve_ivp DOP853 at rtol = atol = 1e-12 with an event
  function: reference spike times of one Hodgkin-Huxley cell;
* SUNDIALS CVODE (BDF, orders 1-5) through scikit-sundae, with the same
  right-hand side and Jacobian, the same rtol and the same scaled atol
  (atol x each state's scale): error and steps at equal tolerance, and, for a
  cell under a periodic input train, CVODE re-initialised at every input
  (the restart a multistep method needs at a discontinuity; Lytton & Hines
  2005, Neural Comput 17:903);
* the LIF closed form under constant current (textbook, ../shared/CHECKS.md).

CVODE applies rtol to the voltage too, where the adaptive strategies give the
voltage the absolute part alone (DESIGN.md); the comparisons therefore allow
the factors the issue states (10x in error, 2x in steps), not equality.
"""
import math

import numpy as np
import pytest
from scipy.integrate._ivp.bdf import BdfDenseOutput
from scipy.integrate._ivp.bdf import change_D as scipy_change_D

from spikegauge.integrate.adaptive import GlobalAdaptiveKernel, LocalAdaptiveKernel
from spikegauge.integrate.bdf import MAX_ORDER, bdf_dense_coefficients, change_D
from spikegauge.integrate.engine import run_windows
from spikegauge.models import MODELS, receptor_state_table, state_scales
from spikegauge.models.base import P_VTH, RECEPTOR_EXC
from spikegauge.models.kernels import jac, rhs

from _adaptive_netutil import hh_rest, model_network, model_params

HH = MODELS["hh-squid"]
HH_SCALE = state_scales()[HH.code, :HH.n_states]
T_SINGLE = 1000.0
RTOLS = (1e-4, 1e-5, 1e-6, 1e-7, 1e-8)


def run_bdf(net, t_stop, rtol, kernel=LocalAdaptiveKernel, **kw):
    k = kernel(net, "bdf", rtol, rtol, **kw)
    return run_windows(net, k, t_stop), k


# ------------------------------------------------------------ kernel twins

@pytest.mark.parametrize("order", range(1, MAX_ORDER + 1))
@pytest.mark.parametrize("factor", [0.3, 0.5, 1.7, 4.0])
def test_change_D_matches_scipy(order, factor):
    # scipy.integrate's BDF: change_D re-interpolates the differences onto the new spacing
    rng = np.random.default_rng(order)
    D = rng.normal(size=(MAX_ORDER + 3, 4))
    ours = D.copy()
    change_D(ours, order, factor, 4)
    theirs = D.copy()
    scipy_change_D(theirs, order, factor)
    np.testing.assert_allclose(ours, theirs, rtol=1e-13, atol=1e-13)


@pytest.mark.parametrize("order", range(1, MAX_ORDER + 1))
def test_dense_polynomial_matches_scipy(order):
    # scipy.integrate's BdfDenseOutput: the interpolating polynomial over the last step
    rng = np.random.default_rng(10 + order)
    D = rng.normal(size=(MAX_ORDER + 3, 3))
    h, t_new = 0.37, 5.0
    dense = BdfDenseOutput(t_new - h, t_new, h, order, D[:order + 1].copy())
    c = np.empty(MAX_ORDER + 1)
    for q in range(3):
        bdf_dense_coefficients(D, order, q, c)
        for th in (0.0, 0.25, 0.5, 0.9, 1.0):
            ours = np.polyval(c[:order + 1][::-1], th)
            assert ours == pytest.approx(dense(t_new - h + th * h)[q], rel=1e-12, abs=1e-12)


# ----------------------------------------------------- one HH cell, no input

def single_hh(t_stop):
    p = model_params("hh-squid", 1, i_bias_ua_per_cm2=10.0)
    return model_network("hh-squid", p, hh_rest()[None, :], t_stop)


def hh_functions(p):
    p = np.ascontiguousarray(p)

    def f(t, y, yp):
        rhs(HH.code, np.ascontiguousarray(y), p, False, yp)

    def jf(t, y, yp, JJ):
        J = np.empty((HH.n_states, HH.n_states))
        jac(HH.code, np.ascontiguousarray(y), p, False, J)
        JJ[:, :] = J

    return f, jf


def cvode_steps(f, jf, t0, t1, y0, rtol, eventsfn=None):
    """Integrate with SUNDIALS CVODE (BDF) from t0 to t1 one internal step at a time.

    Returns (steps, final state, event times): a return at an event (status 2)
    is not a step.
    """
    from sksundae.cvode import CVODE
    opts = dict(method="BDF", rtol=rtol, atol=rtol * HH_SCALE, jacfn=jf, max_num_steps=10**7)
    if eventsfn is not None:
        opts.update(eventsfn=eventsfn, num_events=1)
    solver = CVODE(f, **opts)
    solver.init_step(t0, np.ascontiguousarray(y0, dtype=np.float64))
    t, steps, sol = t0, 0, None
    while t < t1:
        sol = solver.step(t1, method="onestep", tstop=t1)
        assert sol.status in (0, 1, 2), sol.message
        steps += sol.status != 2
        t = float(np.atleast_1d(sol.t)[-1])
    events = np.asarray(sol.t_events if sol.t_events is not None else [], dtype=float).ravel()
    return steps, np.asarray(sol.y, dtype=float).ravel()[-HH.n_states:], events


@pytest.fixture(scope="module")
def hh_single():
    from scipy.integrate import solve_ivp
    net = single_hh(T_SINGLE)
    p = net.params[0]
    f, jf = hh_functions(p)

    def fun(t, y):
        out = np.empty(y.size)
        rhs(HH.code, np.ascontiguousarray(y), np.ascontiguousarray(p), False, out)
        return out

    def ev(t, y):
        return y[0] - p[P_VTH]

    ev.direction = 1
    sol = solve_ivp(fun, (0.0, T_SINGLE), net.y0[0, :HH.n_states], method="DOP853", rtol=1e-12,
                    atol=1e-12, events=ev)
    assert sol.success
    ref = np.asarray(sol.t_events[0])

    def root(t, y, events):
        events[0] = y[0] - p[P_VTH]

    root.terminal = [False]
    root.direction = [1]
    ours, cvode, glob = {}, {}, {}
    for rtol in RTOLS:
        res, _ = run_bdf(net, T_SINGLE, rtol)
        assert res.status == "ok"
        ours[rtol] = (res.time_ms[res.cell == 0], res.counters["steps"])
        res, _ = run_bdf(net, T_SINGLE, rtol, kernel=GlobalAdaptiveKernel)
        assert res.status == "ok"
        glob[rtol] = (res.time_ms[res.cell == 0], res.counters["steps"])
    for rtol in RTOLS[::2]:
        steps, _, events = cvode_steps(f, jf, 0.0, T_SINGLE, net.y0[0, :HH.n_states], rtol, root)
        cvode[rtol] = (events, steps)
    return dict(ref=ref, ours=ours, cvode=cvode, glob=glob)


def max_error(got, ref):
    assert got.size == ref.size, (got.size, ref.size)
    return float(np.max(np.abs(got - ref)))


def test_single_hh_converges_to_dop853(hh_single):
    # solve_ivp DOP853 (rtol = atol = 1e-12): every spike at every tolerance, the error
    # falling with rtol over four decades, in proportion to it within the range the other
    # adaptive steppers meet (exponent 0.6-1.2, test_adaptive.py; tolerance proportionality is
    # the aim of variable-order BDF codes, Shampine & Reichelt 1997)
    ref = hh_single["ref"]
    assert ref.size == 69   # ../shared/CHECKS.md: 68.32 Hz steady at 10 uA/cm2
    errs = [max_error(hh_single["ours"][r][0], ref) for r in RTOLS]
    assert all(b < a for a, b in zip(errs, errs[1:])), errs
    slope = np.polyfit(np.log(RTOLS), np.log(errs), 1)[0]
    assert 0.6 <= slope <= 1.2, (slope, errs)
    assert errs[-1] < 1e-3


@pytest.mark.parametrize("rtol", RTOLS[::2])
def test_single_hh_error_and_steps_against_cvode(hh_single, rtol):
    # SUNDIALS CVODE BDF (scikit-sundae) at the same rtol and scaled atol: error within 10x,
    # accepted steps within 2x (the bounds)
    ref = hh_single["ref"]
    got, steps = hh_single["ours"][rtol]
    events, cv_steps = hh_single["cvode"][rtol]
    ours_err, cv_err = max_error(got, ref), max_error(events, ref)
    assert ours_err <= 10.0 * cv_err, (ours_err, cv_err)
    assert 0.5 <= steps / cv_steps <= 2.0, (steps, cv_steps)


def test_single_hh_global_equals_local(hh_single):
    # one cell: the two strategies are the same method (DESIGN.md), so the same spikes and steps
    for rtol in RTOLS:
        a, b = hh_single["ours"][rtol], hh_single["glob"][rtol]
        assert a[1] == b[1]
        np.testing.assert_array_equal(a[0], b[0])


# ------------------------------------------- one HH cell under an input train

TRAIN_T_MS = 200.0
TRAIN_PERIOD_MS = 2.0
TRAIN_WEIGHT = 0.05   # mS/cm2 of excitatory conductance per input


@pytest.mark.parametrize("kernel", [LocalAdaptiveKernel, GlobalAdaptiveKernel])
@pytest.mark.parametrize("rtol", [1e-4, 1e-6])
def test_input_train_restarts_like_reinitialised_cvode(rtol, kernel):
    # CVODE BDF (scikit-sundae) re-initialised at every input: steps per input within 2x;
    # the order trace is 1 on the first step after every input (a restart), and the order
    # rises again in between
    times = np.arange(1.0, TRAIN_T_MS, TRAIN_PERIOD_MS)
    p = model_params("hh-squid", 1)
    net = model_network("hh-squid", p, hh_rest()[None, :], TRAIN_T_MS,
                        events=[(t, 0, RECEPTOR_EXC, TRAIN_WEIGHT) for t in times])
    res, k = run_bdf(net, TRAIN_T_MS, rtol, kernel=kernel, record_steps=[0])
    assert res.status == "ok"
    f, jf = hh_functions(net.params[0])
    exc = receptor_state_table()[HH.code, RECEPTOR_EXC]
    y = net.y0[0, :HH.n_states].copy()
    edges = np.concatenate(([0.0], times, [TRAIN_T_MS]))
    cv_steps = 0
    for a, b in zip(edges[:-1], edges[1:]):
        if a > 0.0:
            y[exc] += TRAIN_WEIGHT
        steps, y, _ = cvode_steps(f, jf, a, b, y, rtol)
        cv_steps += steps
    ratio = res.counters["steps"] / cv_steps
    assert 0.5 <= ratio <= 2.0, (res.counters["steps"], cv_steps)
    tr = k.step_trace()
    acc = tr[tr["accepted"]]
    assert acc["order"].between(1, MAX_ORDER).all()
    after = np.searchsorted(times, acc["time_ms"].to_numpy(), side="right")
    first = acc.groupby(after)["order"].first()
    assert (first == 1).all() and first.size == times.size + 1
    # (the cell starts at rest: before the first input it barely moves, a step or two)
    assert acc.groupby(after)["order"].max().iloc[1:].min() >= 2


# ---------------------------------------------------- reset, refractory clamp

def test_lif_constant_current_closed_form():
    # LIF under constant current (textbook closed form, ../shared/CHECKS.md): the restart at
    # every reset and at every refractory end keeps the spike times exact to the tolerance
    p = model_params("lif-current", 1, i_bias_pa=1000.0)
    net = model_network("lif-current", p, [[-65.0, 0.0, 0.0]], 100.0, d_min_ms=1.0)
    res, k = run_bdf(net, 100.0, 1e-9, record_steps=[0])
    tau, v_inf = 20.0, -65.0 + 1000.0 * 20.0 / 250.0
    first = tau * math.log((v_inf + 65.0) / (v_inf + 50.0))
    isi = 2.0 + tau * math.log((v_inf + 60.0) / (v_inf + 50.0))
    expect = first + isi * np.arange(0, 40)
    expect = expect[expect < 100.0]
    got = res.time_ms[res.cell == 0]
    assert got.size == expect.size
    assert np.max(np.abs(got - expect)) < 1e-6
