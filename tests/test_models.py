"""Point-neuron models: kernels against slow NumPy twins, scipy and closed forms.

Every numba kernel is checked against something this project did not write:
the NumPy twins below are transcribed from the published equations (source
named on each), Jacobians against scipy's finite differences
(``scipy.differentiate.jacobian``), resting states against
``scipy.optimize.root`` on the twins, and integrate-and-fire behaviour against
textbook closed forms integrated with ``scipy.integrate.solve_ivp``.
"""
from __future__ import annotations

import math

import numba
import numpy as np
import pytest
import scipy.differentiate
import scipy.integrate
import scipy.optimize

from spikegauge.errors import ComputationError, InputError
from spikegauge.models import (
    BUILT_IN,
    MODELS,
    get_model,
    max_params,
    max_states,
    model_by_code,
    n_states_table,
    physical_zero,
    receptor_state_table,
    rest_state,
    state_bounds,
    state_scales,
    steady_state_at,
)
from spikegauge.models import adex as adex_module
from spikegauge.models.base import P_IEXT, P_TREF, P_VRESET, P_VTH
from spikegauge.models.kernels import jac, reset, rhs, split

NAMES = list(BUILT_IN)  # model files loaded by other tests join MODELS with codes from 5 on


# --------------------------------------------------------------------------
# Slow NumPy twins, written from the papers with the scenario keys (so they
# also check the slot layout). ``P`` maps parameter key -> value.

def twin_lif_current(y, P):
    """Textbook LIF, exponential synaptic currents (e.g. Rotter & Diesmann 1999)."""
    v, ie, ii = y
    c = P["c_m_pf"]
    g_l = c / P["tau_m_ms"]
    dv = (-g_l * (v - P["e_l_mv"]) + ie - ii + P["i_bias_pa"]) / c
    return np.array([dv, -ie / P["tau_syn_exc_ms"], -ii / P["tau_syn_inh_ms"]])


def twin_lif_conductance(y, P):
    """Textbook LIF, exponential synaptic conductances (as bench-lif in SPEC.md)."""
    v, ge, gi = y
    c = P["c_m_pf"]
    g_l = c / P["tau_m_ms"]
    dv = (g_l * (P["e_l_mv"] - v) + ge * (P["e_exc_mv"] - v) + gi * (P["e_inh_mv"] - v) + P["i_bias_pa"]) / c
    return np.array([dv, -ge / P["tau_syn_exc_ms"], -gi / P["tau_syn_inh_ms"]])


def twin_adex(y, P):
    """Brette & Gerstner 2005, J Neurophysiol 94:3637, eqs. (1)-(2), plus conductance synapses."""
    v, w, ge, gi = y
    g_l, dt_ = P["g_l_nsiemens"], P["delta_t_mv"]
    i = (-g_l * (v - P["e_l_mv"]) + g_l * dt_ * np.exp((v - P["v_t_mv"]) / dt_) - w
         + ge * (P["e_exc_mv"] - v) + gi * (P["e_inh_mv"] - v) + P["i_bias_pa"])
    dw = (P["a_nsiemens"] * (v - P["e_l_mv"]) - w) / P["tau_w_ms"]
    return np.array([i / P["c_m_pf"], dw, -ge / P["tau_syn_exc_ms"], -gi / P["tau_syn_inh_ms"]])


def twin_hh_squid(y, P):
    """Hodgkin & Huxley 1952, J Physiol 117:500, modern convention; rates as in SPEC.md."""
    v, m, h, n, ge, gi = y
    phi = 3.0 ** ((P["temperature_c"] - 6.3) / 10.0)
    am = 0.1 * (v + 40) / (1 - np.exp(-(v + 40) / 10))
    bm = 4 * np.exp(-(v + 65) / 18)
    ah = 0.07 * np.exp(-(v + 65) / 20)
    bh = 1 / (1 + np.exp(-(v + 35) / 10))
    an = 0.01 * (v + 55) / (1 - np.exp(-(v + 55) / 10))
    bn = 0.125 * np.exp(-(v + 65) / 80)
    i = (P["i_bias_ua_per_cm2"] - P["g_na_msiemens_per_cm2"] * m**3 * h * (v - P["e_na_mv"])
         - P["g_k_msiemens_per_cm2"] * n**4 * (v - P["e_k_mv"]) - P["g_l_msiemens_per_cm2"] * (v - P["e_l_mv"])
         + ge * (P["e_exc_mv"] - v) + gi * (P["e_inh_mv"] - v))
    return np.array([
        i / P["c_m_uf_per_cm2"],
        phi * (am * (1 - m) - bm * m),
        phi * (ah * (1 - h) - bh * h),
        phi * (an * (1 - n) - bn * n),
        -ge / P["tau_syn_exc_ms"],
        -gi / P["tau_syn_inh_ms"],
    ])


def _wb_minf(v):
    """Instantaneous sodium activation of Wang & Buzsaki 1996 (from memory)."""
    am = -0.1 * (v + 35) / (np.exp(-0.1 * (v + 35)) - 1)
    bm = 4 * np.exp(-(v + 60) / 18)
    return am / (am + bm)


def twin_hh_interneuron(y, P):
    """Wang & Buzsaki 1996, J Neurosci 16:6402 (equations from memory), plus conductance synapses."""
    v, h, n, ge, gi = y
    minf = _wb_minf(v)
    ah = 0.07 * np.exp(-(v + 58) / 20)
    bh = 1 / (np.exp(-0.1 * (v + 28)) + 1)
    an = -0.01 * (v + 34) / (np.exp(-0.1 * (v + 34)) - 1)
    bn = 0.125 * np.exp(-(v + 44) / 80)
    i = (P["i_bias_ua_per_cm2"] - P["g_na_msiemens_per_cm2"] * minf**3 * h * (v - P["e_na_mv"])
         - P["g_k_msiemens_per_cm2"] * n**4 * (v - P["e_k_mv"]) - P["g_l_msiemens_per_cm2"] * (v - P["e_l_mv"])
         + ge * (P["e_exc_mv"] - v) + gi * (P["e_inh_mv"] - v))
    phi = P["phi"]
    return np.array([
        i / P["c_m_uf_per_cm2"],
        phi * (ah * (1 - h) - bh * h),
        phi * (an * (1 - n) - bn * n),
        -ge / P["tau_syn_exc_ms"],
        -gi / P["tau_syn_inh_ms"],
    ])


def total_conductance(name, y, P):
    """Coefficient of -V in C dV/dt with every gate (m_inf(V) too) frozen, from the same papers:
    what an exponential-Euler step treats as the membrane's leak towards the weighted reversal."""
    if name == "lif-current":
        return P["c_m_pf"] / P["tau_m_ms"]
    if name == "lif-conductance":
        return P["c_m_pf"] / P["tau_m_ms"] + y[1] + y[2]
    if name == "adex":
        return P["g_l_nsiemens"] + y[2] + y[3]
    if name == "hh-squid":
        v, m, h, n, ge, gi = y
        return (P["g_na_msiemens_per_cm2"] * m**3 * h + P["g_k_msiemens_per_cm2"] * n**4
                + P["g_l_msiemens_per_cm2"] + ge + gi)
    v, h, n, ge, gi = y
    return (P["g_na_msiemens_per_cm2"] * _wb_minf(v)**3 * h + P["g_k_msiemens_per_cm2"] * n**4
            + P["g_l_msiemens_per_cm2"] + ge + gi)


TWINS = {
    "lif-current": twin_lif_current,
    "lif-conductance": twin_lif_conductance,
    "adex": twin_adex,
    "hh-squid": twin_hh_squid,
    "hh-interneuron": twin_hh_interneuron,
}


def twin(name, y, p, clamped=False):
    spec = MODELS[name]
    out = TWINS[name](np.asarray(y, dtype=float), dict(zip(spec.param_keys(), p)))
    if clamped:
        out[0] = 0.0
    return out


# --------------------------------------------------------------------------
# Random parameters and states

def random_params(spec, rng):
    """Defaults perturbed by up to +-20 % (so a swapped slot shows), plus a bias current."""
    p = spec.default_params()
    finite = np.isfinite(p) & (p != 0.0)
    p[finite] *= rng.uniform(0.8, 1.2, finite.sum())
    p[P_IEXT] = rng.uniform(-1.0, 1.0) * (100.0 if spec.unit_system == "point" else 5.0)
    return p


def random_state(spec, rng):
    """A state in the region the kernels see in a run (AdEx below the exponent cap)."""
    y = np.empty(spec.n_states)
    if spec.unit_system == "area":
        y[0] = rng.uniform(-90.0, 40.0)
    else:
        y[0] = rng.uniform(-85.0, -35.0)
    for i, key in enumerate(spec.state_names[1:], start=1):
        if key == "w_pa":
            y[i] = rng.uniform(-100.0, 300.0)
        elif spec.has_physical_zero[i] and spec.scale[i] == 1.0:   # gates
            y[i] = rng.uniform(0.0, 1.0)
        else:                                                      # synaptic states
            y[i] = rng.uniform(0.0, 2.0) * spec.scale[i]
    return y


def call_rhs(spec, y, p, clamped=False):
    out = np.empty(spec.n_states)
    rhs(spec.code, np.ascontiguousarray(y, dtype=float), p, clamped, out)
    return out


def call_jac(spec, y, p, clamped=False):
    out = np.empty((spec.n_states, spec.n_states))
    jac(spec.code, np.ascontiguousarray(y, dtype=float), p, clamped, out)
    return out


def call_split(spec, y, p, clamped=False):
    a = np.empty(spec.n_states)
    b = np.empty(spec.n_states)
    split(spec.code, np.ascontiguousarray(y, dtype=float), p, clamped, a, b)
    return a, b


def fd_jacobian(spec, y, p, clamped):
    """Jacobian by scipy.differentiate.jacobian (Richardson-extrapolated central differences)."""
    n = spec.n_states

    def f(x):
        cols = x.reshape(n, -1)
        out = np.empty_like(cols)
        for j in range(cols.shape[1]):
            out[:, j] = call_rhs(spec, cols[:, j], p, clamped)
        return out.reshape(x.shape)

    res = scipy.differentiate.jacobian(f, y, initial_step=1e-2 * spec.scale)
    return res.df


# --------------------------------------------------------------------------
# Registry and tables

def test_registry_codes_and_lookup():
    assert [MODELS[n].code for n in NAMES] == list(range(len(NAMES)))
    for name in NAMES:
        spec = MODELS[name]
        assert get_model(name) is spec
        assert model_by_code(spec.code) is spec
    with pytest.raises(InputError, match="lif-current.*hh-interneuron"):
        get_model("lif")
    with pytest.raises(ValueError):
        model_by_code(n_states_table().size)  # one past the last code loaded in this process


def test_tables_are_padded_per_code():
    lower, upper = state_bounds()
    scale = state_scales()
    zero = physical_zero()
    codes = n_states_table().size  # built-in models, then any model files loaded so far
    shape = (codes, max_states())
    assert codes >= len(NAMES)
    assert lower.shape == upper.shape == scale.shape == zero.shape == shape
    specs = [model_by_code(c) for c in range(codes)]
    assert max_params() == max(s.n_params for s in specs)
    np.testing.assert_array_equal(n_states_table(), [s.n_states for s in specs])
    for spec in (MODELS[n] for n in NAMES):
        k = spec.n_states
        np.testing.assert_array_equal(lower[spec.code, :k], spec.lower)
        assert np.all(np.isneginf(lower[spec.code, k:])) and np.all(np.isposinf(upper[spec.code, k:]))
        assert not zero[spec.code, 0] and np.all(zero[spec.code, 1:k])
        np.testing.assert_array_equal(receptor_state_table()[spec.code], [spec.exc_state, spec.inh_state])


@pytest.mark.parametrize("name", NAMES)
def test_spec_is_consistent(name):
    spec = MODELS[name]
    slots = sorted(pi.slot for pi in spec.params)
    assert slots == list(range(spec.n_params))
    keys = spec.param_keys()
    assert len(set(keys)) == len(keys)
    assert spec.state_names[0] == "v_mv"
    for arr in (spec.scale, spec.has_physical_zero, spec.lower, spec.upper):
        assert arr.shape == (spec.n_states,)
    assert np.all(spec.scale > 0) and np.all(spec.lower < 0) and np.all(spec.upper > 0)
    # The resting state lies well inside the bounds.
    y = rest_state(spec, spec.default_params())
    assert np.all(y > spec.lower) and np.all(y < spec.upper)
    assert spec.weight_key.startswith("weight_") and spec.current_key.startswith("i_")
    unit = "_pa" if spec.unit_system == "point" else "_ua_per_cm2"
    assert keys[P_IEXT].endswith(unit) and spec.current_key.endswith(unit)
    # Validation hints name real keys, and the defaults obey them.
    p = dict(zip(keys, spec.default_params()))
    assert all(p[k] > 0 for k in spec.extra["positive_params"])
    assert all(p[k] >= 0 for k in spec.extra.get("nonnegative_params", ()))
    assert set(spec.extra.get("fixed_params", ())) <= set(keys)


# --------------------------------------------------------------------------
# Kernels against the twins, finite differences and each other

@pytest.mark.parametrize("name", NAMES)
def test_rhs_matches_published_equations(name):
    spec = MODELS[name]
    rng = np.random.default_rng(11 + spec.code)
    for _ in range(20):
        p = random_params(spec, rng)
        y = random_state(spec, rng)
        for clamped in (False, True):
            np.testing.assert_allclose(call_rhs(spec, y, p, clamped), twin(name, y, p, clamped),
                                       rtol=1e-11, atol=1e-12)


@pytest.mark.parametrize("name", NAMES)
def test_jacobian_matches_scipy_finite_differences(name):
    spec = MODELS[name]
    rng = np.random.default_rng(23 + spec.code)
    for _ in range(4):
        p = random_params(spec, rng)
        y = random_state(spec, rng)
        for clamped in (False, True):
            J = call_jac(spec, y, p, clamped)
            fd = fd_jacobian(spec, y, p, clamped)
            tol = 1e-7 * np.max(np.abs(fd)) + 1e-7 * np.abs(fd)
            assert np.all(np.abs(J - fd) <= tol), (clamped, J, fd)
            if clamped:
                assert np.all(J[0] == 0.0)


@pytest.mark.parametrize("name", NAMES)
def test_split_reproduces_rhs_and_is_the_exponential_euler_split(name):
    """a + b y = f; b_i = d f_i / d y_i for every state but V (Rush-Larsen form for gates); for V,
    b = -(total conductance)/C, which equals d f_V / dV where the voltage equation is linear in V
    (LIF, hh-squid) and leaves the AdEx spike current and the Wang-Buzsaki m_inf(V) term in a."""
    spec = MODELS[name]
    keys = spec.param_keys()
    rng = np.random.default_rng(37 + spec.code)
    for _ in range(20):
        p = random_params(spec, rng)
        y = random_state(spec, rng)
        c = p[keys.index("c_m_pf" if spec.unit_system == "point" else "c_m_uf_per_cm2")]
        for clamped in (False, True):
            a, b = call_split(spec, y, p, clamped)
            f = call_rhs(spec, y, p, clamped)
            J = call_jac(spec, y, p, clamped)
            scale = np.abs(a) + np.abs(b * y) + 1e-300
            assert np.all(np.abs(a + b * y - f) <= 1e-13 * scale + 1e-14)
            np.testing.assert_allclose(b[1:], np.diag(J)[1:], rtol=1e-13, atol=1e-15)
            if clamped:
                assert a[0] == 0.0 and b[0] == 0.0
                continue
            g = total_conductance(name, y, dict(zip(keys, p)))
            assert b[0] == pytest.approx(-g / c, rel=1e-12)
            if name not in ("adex", "hh-interneuron"):
                assert b[0] == pytest.approx(J[0, 0], rel=1e-13)


@pytest.mark.parametrize("name", NAMES)
def test_kernels_ignore_padding(name):
    """y and p may be longer than the model's own counts (NaN-padded in a Network)."""
    spec = MODELS[name]
    rng = np.random.default_rng(5)
    p = random_params(spec, rng)
    y = random_state(spec, rng)
    n = spec.n_states
    yp = np.concatenate([y, np.full(max_states() + 2 - n, np.nan)])
    pp = np.concatenate([p, np.full(max_params() + 2 - spec.n_params, np.nan)])
    big = max_states() + 2
    d = np.full(big, -7.0)
    J = np.full((big, big), -7.0)
    a = np.full(big, -7.0)
    b = np.full(big, -7.0)
    rhs(spec.code, yp, pp, False, d)
    jac(spec.code, yp, pp, False, J)
    split(spec.code, yp, pp, False, a, b)
    np.testing.assert_array_equal(d[:n], call_rhs(spec, y, p))
    np.testing.assert_array_equal(J[:n, :n], call_jac(spec, y, p))
    assert np.all(d[n:] == -7.0) and np.all(a[n:] == -7.0) and np.all(b[n:] == -7.0)
    assert np.all(J[n:, :] == -7.0) and np.all(J[:, n:] == -7.0)


@pytest.mark.parametrize("name", NAMES)
def test_receptors_have_the_expected_sign(name):
    """Excitation depolarises, inhibition hyperpolarises a cell at rest (common practice)."""
    spec = MODELS[name]
    p = spec.default_params()
    y = rest_state(spec, p)
    base = call_rhs(spec, y, p)[0]
    for state, sign in ((spec.exc_state, 1.0), (spec.inh_state, -1.0)):
        z = y.copy()
        z[state] += spec.scale[state]
        assert sign * (call_rhs(spec, z, p)[0] - base) > 0.0


@pytest.mark.parametrize("name, v_sing", [("hh-squid", -40.0), ("hh-squid", -55.0),
                                          ("hh-interneuron", -35.0), ("hh-interneuron", -34.0)])
def test_rates_pass_smoothly_through_removable_singularities(name, v_sing):
    """alpha_m and alpha_n are 0/0 at these voltages; SPEC.md evaluates x/(1 - e^-x) as 1 + x/2 for
    |x| < 1e-6. At the singular voltage and next to it the kernel must agree with the twin's
    values just outside it, and the Jacobian with scipy's finite differences across it."""
    spec = MODELS[name]
    p = spec.default_params()
    y = rest_state(spec, p)
    for dv in (0.0, 3e-7, -3e-7):
        y[0] = v_sing + dv
        # The twin is exact away from the singularity; average two points 1e-4 mV either side.
        lo, hi = y.copy(), y.copy()
        lo[0] -= 1e-4
        hi[0] += 1e-4
        np.testing.assert_allclose(call_rhs(spec, y, p), 0.5 * (twin(name, lo, p) + twin(name, hi, p)),
                                   rtol=1e-8, atol=1e-12)
        J = call_jac(spec, y, p)
        fd = fd_jacobian(spec, y, p, False)
        assert np.all(np.abs(J - fd) <= 1e-7 * np.max(np.abs(fd)) + 1e-7 * np.abs(fd))


# --------------------------------------------------------------------------
# Resting states

def _independent_rest(name, p):
    """Lowest fixed point of the NumPy twin, found without the package's code.

    In every model each non-voltage state obeys an equation linear in itself
    that involves V only, so its steady value at a given V is f0/(f0 - f1),
    f0 and f1 being its derivative at values 0 and 1. The voltage equation
    with those values is scanned for sign changes over [-100, 0] mV, the
    lowest root is bracketed with scipy.optimize.brentq (the rest state; the
    Wang-Buzsaki cell and AdEx have unstable fixed points above it), and the
    full system is polished with scipy.optimize.root.
    """
    spec = MODELS[name]
    n = spec.n_states

    def reduced(v):
        y = np.zeros(n)
        y[0] = v
        for i in range(1, n):
            y_lo = y.copy()
            y_lo[i] = 0.0
            y_hi = y.copy()
            y_hi[i] = 1.0
            f0 = twin(name, y_lo, p)[i]
            f1 = twin(name, y_hi, p)[i]
            y[i] = f0 / (f0 - f1) if f0 != 0.0 else 0.0
        return y

    grid = np.arange(-100.0, 0.0, 0.25) + 0.0123   # off the removable singularities
    g = np.array([twin(name, reduced(v), p)[0] for v in grid])
    k = np.flatnonzero(np.sign(g[:-1]) != np.sign(g[1:]))[0]
    v_rest = scipy.optimize.brentq(lambda v: twin(name, reduced(v), p)[0], grid[k], grid[k + 1], xtol=1e-13)
    sol = scipy.optimize.root(lambda y: twin(name, y, p), reduced(v_rest), method="lm", tol=1e-14)
    assert sol.success
    return sol.x


@pytest.mark.parametrize("name", NAMES)
def test_rest_state_is_an_independent_fixed_point(name):
    spec = MODELS[name]
    p = spec.default_params()
    ours = rest_state(spec, p)
    theirs = _independent_rest(name, p)
    np.testing.assert_allclose(ours, theirs, rtol=1e-8, atol=1e-10)
    assert np.all(np.abs(twin(name, ours, p)) < 1e-10 * spec.scale)
    # It is a resting state: stable (every eigenvalue of the finite-difference
    # Jacobian has a negative real part).
    assert np.all(np.linalg.eigvals(fd_jacobian(spec, ours, p, False)).real < 0)


@pytest.mark.parametrize("name", ["lif-current", "lif-conductance"])
def test_lif_rest_with_bias_is_the_closed_form(name):
    """V_inf = E_L + R I, R = tau_m / C (textbook closed form)."""
    spec = MODELS[name]
    p = spec.default_params()
    p[P_IEXT] = 120.0
    keys = spec.param_keys()
    v_inf = p[keys.index("e_l_mv")] + p[keys.index("tau_m_ms")] / p[keys.index("c_m_pf")] * 120.0
    assert rest_state(spec, p)[0] == pytest.approx(v_inf, abs=1e-10)


def test_rest_state_reports_a_missing_fixed_point():
    """Above rheobase a LIF-like AdEx cell has no fixed point: an error, not a wrong state."""
    spec = MODELS["adex"]
    p = spec.default_params()
    p[P_IEXT] = 2000.0
    with pytest.raises(ComputationError, match="adex"):
        rest_state(spec, p)


def test_steady_state_at_voltage_puts_gates_at_steady_state():
    """x_inf(V) = alpha/(alpha+beta) (Hodgkin & Huxley 1952); bench-hh values at -65 mV from SPEC.md."""
    spec = MODELS["hh-squid"]
    p = np.tile(spec.default_params(), (2, 1))
    y = steady_state_at(spec, p, np.array([-65.0, -20.0]))
    np.testing.assert_allclose(y[0, 1:4], [0.052932, 0.596121, 0.317677], atol=5e-7)
    assert np.all(y[:, 4:] == 0.0)
    d = twin("hh-squid", y[1], p[1])
    np.testing.assert_allclose(d[1:], 0.0, atol=1e-15)


# --------------------------------------------------------------------------
# Reset and overflow guard

def test_resets():
    for name in ("lif-current", "lif-conductance"):
        spec = MODELS[name]
        p = spec.default_params()
        y = np.array([-49.0, 30.0, 40.0])
        reset(spec.code, y, p)
        np.testing.assert_array_equal(y, [p[P_VRESET], 30.0, 40.0])
    spec = MODELS["adex"]
    p = spec.default_params()
    y = np.array([p[P_VTH] + 1.0, 12.0, 1.0, 2.0])
    reset(spec.code, y, p)
    np.testing.assert_array_equal(y, [p[P_VRESET], 12.0 + p[spec.param_keys().index("b_pa")], 1.0, 2.0])
    for name in ("hh-squid", "hh-interneuron"):
        spec = MODELS[name]
        p = spec.default_params()
        assert math.isnan(p[P_VRESET]) and p[P_TREF] == 0.0
        y = rest_state(spec, p) + 0.1
        before = y.copy()
        reset(spec.code, y, p)
        np.testing.assert_array_equal(y, before)


def test_adex_exponential_is_capped_and_finite():
    spec = MODELS["adex"]
    p = spec.default_params()
    keys = spec.param_keys()
    v_t, d_t = p[keys.index("v_t_mv")], p[keys.index("delta_t_mv")]
    for v in (v_t + 2 * adex_module.EXP_ARG_MAX * d_t, 1e6, 1e300):
        y = np.array([v, 0.0, 0.0, 0.0])
        f = call_rhs(spec, y, p)
        assert np.all(np.isfinite(f))
        assert np.all(np.isfinite(call_jac(spec, y, p)))
        assert np.all(np.isfinite(np.concatenate(call_split(spec, y, p))))
    # Beyond the cap the spike current is the paper's with the exponent held at
    # the cap, constant in V, so it drops out of the Jacobian.
    g_l, c = p[keys.index("g_l_nsiemens")], p[keys.index("c_m_pf")]
    y = np.array([v_t + 60 * d_t, 10.0, 1.0, 1.0])
    capped = twin("adex", y, p)
    capped[0] -= g_l * d_t * (math.exp(60.0) - math.exp(adex_module.EXP_ARG_MAX)) / c
    np.testing.assert_allclose(call_rhs(spec, y, p), capped, rtol=1e-11)
    assert call_jac(spec, y, p)[0, 0] == pytest.approx(-(g_l + y[2] + y[3]) / c, rel=1e-14)
    # An exponential-Euler step (y + h (a + b y)(e^{bh} - 1)/(bh)) from high on
    # the upswing stays finite: the spike current sits in a, not in b.
    for x in (10.0, 30.0, adex_module.EXP_ARG_MAX - 0.5):
        y = np.array([v_t + x * d_t, 50.0, 2.0, 2.0])
        a, b = call_split(spec, y, p)
        step = y + 0.1 * (a + b * y) * np.expm1(b * 0.1) / (b * 0.1)
        assert np.all(np.isfinite(step)) and step[0] > y[0]
    # Just below the cap the derivative of the spike term is still there
    # (scipy finite differences; the other entries of that row drown in the
    # rounding of a 1e20 mV/ms right-hand side, and are checked elsewhere).
    y[0] = v_t + (adex_module.EXP_ARG_MAX - 1.0) * d_t
    assert call_jac(spec, y, p)[0, 0] == pytest.approx(fd_jacobian(spec, y, p, False)[0, 0], rel=1e-7)


# --------------------------------------------------------------------------
# Integrate-and-fire behaviour against closed forms (solve_ivp on the kernels)

@numba.njit
def _f(t, y, code, p, clamped):
    out = np.empty_like(y)
    rhs(code, y, p, clamped, out)
    return out


def _solve(spec, y0, p, t_end, clamped=False, events=None):
    return scipy.integrate.solve_ivp(_f, (0.0, t_end), y0, method="DOP853", rtol=1e-10, atol=1e-12,
                                     args=(spec.code, p, clamped), events=events, dense_output=True)


@pytest.mark.parametrize("name", ["lif-current", "lif-conductance"])
def test_lif_interval_under_constant_current(name):
    """ISI = t_ref + tau_m ln((V_inf - V_reset)/(V_inf - V_th)) (textbook closed form; CHECKS.md).

    The refractory part is integrated with the clamp on: V must stay at V_reset
    while a synaptic state decays exactly as exp(-t/tau) (closed form).
    """
    spec = MODELS[name]
    keys = spec.param_keys()
    p = spec.default_params()
    p[P_IEXT] = 250.0
    tau_m, c = p[keys.index("tau_m_ms")], p[keys.index("c_m_pf")]
    v_inf = p[keys.index("e_l_mv")] + tau_m / c * p[P_IEXT]
    t_ref = p[P_TREF]
    y0 = np.zeros(spec.n_states)
    y0[0] = p[P_VRESET]
    y0[spec.exc_state] = 3.0
    clamp = _solve(spec, y0, p, t_ref, clamped=True)
    y1 = clamp.y[:, -1]
    assert y1[0] == p[P_VRESET]
    tau_e = p[keys.index("tau_syn_exc_ms")]
    assert y1[spec.exc_state] == pytest.approx(3.0 * math.exp(-t_ref / tau_e), rel=1e-9)
    y1[spec.exc_state] = 0.0

    def at_threshold(t, y, code, p_, clamped):
        return y[0] - p_[P_VTH]
    at_threshold.terminal = True
    at_threshold.direction = 1
    free = _solve(spec, y1, p, 200.0, events=at_threshold)
    isi = t_ref + free.t_events[0][0]
    expected = t_ref + tau_m * math.log((v_inf - p[P_VRESET]) / (v_inf - p[P_VTH]))
    # DOP853 at rtol 1e-10: V within ~1e-8 mV, crossed at 0.25 mV/ms.
    assert isi == pytest.approx(expected, abs=1e-7)


def test_lif_current_psp_is_the_closed_form():
    """Response to one exponential current: (w/C) tau_m tau_s/(tau_m - tau_s) (e^{-t/tau_m} - e^{-t/tau_s})
    (linear ODE, closed form as in Rotter & Diesmann 1999); inhibition enters with the opposite sign."""
    spec = MODELS["lif-current"]
    keys = spec.param_keys()
    p = spec.default_params()
    c, tau_m, e_l = p[keys.index("c_m_pf")], p[keys.index("tau_m_ms")], p[keys.index("e_l_mv")]
    t = np.linspace(0.0, 60.0, 31)
    for state, tau_key, sign in ((spec.exc_state, "tau_syn_exc_ms", 1.0), (spec.inh_state, "tau_syn_inh_ms", -1.0)):
        tau_s = p[keys.index(tau_key)]
        y0 = np.array([e_l, 0.0, 0.0])
        y0[state] = 50.0
        sol = _solve(spec, y0, p, 60.0)
        exact = e_l + sign * 50.0 / c * tau_m * tau_s / (tau_m - tau_s) * (np.exp(-t / tau_m) - np.exp(-t / tau_s))
        np.testing.assert_allclose(sol.sol(t)[0], exact, atol=1e-9)


def test_adex_without_adaptation_tends_to_lif_as_delta_t_shrinks():
    """Delta_T -> 0 turns AdEx into the LIF with threshold V_T (Brette & Gerstner 2005).

    With a = b = 0 and w = 0 the interval from V_r to V_peak is the quadrature
    T = int C dV / (C f_V(V)) (scipy.integrate.quad on the kernel); the LIF
    limit is the closed form tau ln((V_inf - V_r)/(V_inf - V_T)). Near V_T the
    drive is ~ g_L (k + Delta_T e^u), k = V_inf - V_T, u = (V - V_T)/Delta_T,
    and int du Delta_T/(k + Delta_T e^u) over the layer exceeds the LIF's by
    (Delta_T/k) ln(k/Delta_T): the AdEx cell still has to climb
    Delta_T ln(k/Delta_T) above V_T before the exponential takes over. So
    T - T_LIF -> tau (Delta_T/k) ln(k/Delta_T) (derived here; leading order).
    """
    spec = MODELS["adex"]
    keys = spec.param_keys()
    p = spec.default_params()
    p[keys.index("a_nsiemens")] = 0.0
    p[keys.index("b_pa")] = 0.0
    p[P_IEXT] = 800.0
    g_l, c, e_l = p[keys.index("g_l_nsiemens")], p[keys.index("c_m_pf")], p[keys.index("e_l_mv")]
    v_t, v_r, v_peak = p[keys.index("v_t_mv")], p[P_VRESET], p[P_VTH]
    tau = c / g_l
    v_inf = e_l + p[P_IEXT] / g_l
    k = v_inf - v_t
    lif = tau * math.log((v_inf - v_r) / k)
    ratios = []
    for d in (0.2, 0.05, 0.0125):
        p[keys.index("delta_t_mv")] = d

        def inv_dv(v):
            return 1.0 / call_rhs(spec, np.array([v, 0.0, 0.0, 0.0]), p)[0]
        # Split at V_T so quad resolves the layer of width Delta_T there.
        t1 = scipy.integrate.quad(inv_dv, v_r, v_t, epsabs=1e-13, epsrel=1e-13, limit=400)[0]
        t2 = scipy.integrate.quad(inv_dv, v_t, v_peak, epsabs=1e-13, epsrel=1e-13, limit=400)[0]
        ratios.append((t1 + t2 - lif) / (tau * d / k * math.log(k / d)))
    # The ratio tends to 1 from above, the gap shrinking with Delta_T.
    assert ratios[0] > ratios[1] > ratios[2] > 1.0
    assert ratios[2] == pytest.approx(1.0, abs=0.01)


def test_adex_regular_spiking_cell_adapts():
    """Brette & Gerstner 2005 fit their default cell to a regular-spiking (adapting) cortical
    neuron (from memory): under a step current the intervals lengthen monotonically and settle
    (spike-frequency adaptation from w += b). Integrated with solve_ivp (DOP853) spike by spike,
    the package's reset kernel applied at each terminal peak event. The peak is lowered to -30 mV
    to keep the test fast (the spike time moves by (C/g_L) e^{-10} ~ 4e-4 ms)."""
    spec = MODELS["adex"]
    p = spec.default_params()
    y = rest_state(spec, p)
    p[P_VTH] = -30.0
    p[P_IEXT] = 1000.0

    def peak(t, y_, code, p_, clamped):
        return y_[0] - p_[P_VTH]
    peak.terminal = True
    peak.direction = 1
    t0, times = 0.0, []
    while len(times) < 16:
        sol = scipy.integrate.solve_ivp(_f, (t0, 2000.0), y, method="DOP853", rtol=1e-9, atol=1e-9,
                                        args=(spec.code, p, False), events=peak)
        assert sol.status == 1
        t0 = sol.t_events[0][0]
        times.append(t0)
        y = sol.y_events[0][0].copy()
        w_before = y[1]
        reset(spec.code, y, p)
        assert y[0] == p[P_VRESET] and y[1] == w_before + p[spec.param_keys().index("b_pa")]
    isi = np.diff(times)
    assert np.all(np.diff(isi) > 0)                    # monotone lengthening
    assert isi[-1] > 2.0 * isi[0]                      # strong adaptation
    assert isi[-1] - isi[-2] < 1e-2 * (isi[1] - isi[0])  # settling
