"""Hodgkin-Huxley squid axon (Hodgkin & Huxley 1952) with conductance synapses.

Hodgkin AL, Huxley AF (1952) A quantitative description of membrane current
and its application to conduction and excitation in nerve. J Physiol
117:500-544. Modern sign convention, rest near -65 mV; parameters and rate
functions exactly as in ../shared/limit/SPEC.md (bench-hh).

Equations (area units: mV, ms, uF/cm2, mS/cm2, uA/cm2)::

    C dV/dt = I_ext - g_Na m^3 h (V - E_Na) - g_K n^4 (V - E_K) - g_L (V - E_L)
              + g_exc (E_exc - V) + g_inh (E_inh - V)
    dx/dt   = phi (alpha_x(V) (1 - x) - beta_x(V) x),   x in {m, h, n}
    phi     = 3 ** ((T - 6.3) / 10)                     (Q10 = 3)
    dg_exc/dt = -g_exc / tau_syn_exc,  dg_inh/dt = -g_inh / tau_syn_inh

    alpha_m = 0.1 (V+40) / (1 - exp(-(V+40)/10))    beta_m = 4 exp(-(V+65)/18)
    alpha_h = 0.07 exp(-(V+65)/20)                  beta_h = 1 / (1 + exp(-(V+35)/10))
    alpha_n = 0.01 (V+55) / (1 - exp(-(V+55)/10))   beta_n = 0.125 exp(-(V+65)/80)

The removable singularities are evaluated through ``efun(x) = x/(1 - e^-x)``
with ``efun(x) = 1 + x/2`` for |x| < 1e-6 (SPEC.md).

A spike is an upward crossing of ``v_detect_mv`` (default 0 mV). There is no
reset and no refractory clamp: ``v_reset_mv`` is NaN and ``t_ref_ms`` 0, both
fixed (listed in ``SPEC.extra["fixed_params"]``).
"""
from __future__ import annotations

import math

import numpy as np

from .._numba import inline_jit, jit
from .fastexp import exp as vector_exp
from .base import P_IEXT, P_TREF, P_VRESET, P_VTH, ModelSpec, ParamInfo

CODE = 3

P_C_M = 4
P_G_NA = 5
P_G_K = 6
P_G_L = 7
P_E_NA = 8
P_E_K = 9
P_E_L = 10
P_TEMPERATURE = 11
P_E_EXC = 12
P_E_INH = 13
P_TAU_SYN_EXC = 14
P_TAU_SYN_INH = 15

S_V = 0
S_M = 1
S_H = 2
S_N = 3
S_G_EXC = 4
S_G_INH = 5

T_BASE_C = 6.3
"""Temperature of the published rate functions (deg C)."""
Q10 = 3.0
LN_Q10 = math.log(Q10)
"""Temperature factor per 10 deg C (Hodgkin & Huxley 1952)."""

# HH voltage never leaves [E_K, E_Na] by more than the synaptic reversals; 200 mV
# away means the step is unstable.
V_BOUND_MV = 200.0
# Gates live in [0, 1]; an explicit stepper may overshoot slightly, half a unit
# cannot be overshoot.
GATE_LOWER = -0.5
GATE_UPPER = 1.5
# As for the LIF models: one typical magnitude below zero, 1e4 above it.
NEG_SCALES_ALLOWED = 1.0
SYN_UPPER_SCALES = 1.0e4

# V: a spike spans ~100 mV; gates 1; conductances: bench-hh weights 0.015 and 0.1.
_SCALE = np.array([100.0, 1.0, 1.0, 1.0, 0.1, 0.1])

SPEC = ModelSpec(
    name="hh-squid",
    code=CODE,
    unit_system="area",
    state_names=("v_mv", "m", "h", "n", "g_exc_msiemens_per_cm2", "g_inh_msiemens_per_cm2"),
    params=(
        ParamInfo("i_bias_ua_per_cm2", P_IEXT, 0.0, "constant external current (uA/cm2); drives add to it"),
        ParamInfo("v_detect_mv", P_VTH, 0.0, "spike detection voltage, upward crossing (mV); SPEC.md bench-hh"),
        ParamInfo("v_reset_mv", P_VRESET, math.nan, "no reset: fixed at NaN"),
        ParamInfo("t_ref_ms", P_TREF, 0.0, "no refractory clamp: fixed at 0"),
        ParamInfo("c_m_uf_per_cm2", P_C_M, 1.0, "membrane capacitance (uF/cm2); Hodgkin & Huxley 1952"),
        ParamInfo("g_na_msiemens_per_cm2", P_G_NA, 120.0, "sodium conductance (mS/cm2); Hodgkin & Huxley 1952"),
        ParamInfo("g_k_msiemens_per_cm2", P_G_K, 36.0, "potassium conductance (mS/cm2); Hodgkin & Huxley 1952"),
        ParamInfo("g_l_msiemens_per_cm2", P_G_L, 0.3, "leak conductance (mS/cm2); Hodgkin & Huxley 1952"),
        ParamInfo("e_na_mv", P_E_NA, 50.0, "sodium reversal (mV); Hodgkin & Huxley 1952, modern convention"),
        ParamInfo("e_k_mv", P_E_K, -77.0, "potassium reversal (mV); Hodgkin & Huxley 1952, modern convention"),
        ParamInfo("e_l_mv", P_E_L, -54.387, "leak reversal (mV); Hodgkin & Huxley 1952, modern convention"),
        ParamInfo("temperature_c", P_TEMPERATURE, T_BASE_C, "temperature (deg C); rates scale by 3**((T-6.3)/10)"),
        ParamInfo("e_exc_mv", P_E_EXC, 0.0, "excitatory reversal (mV); SPEC.md bench-hh"),
        ParamInfo("e_inh_mv", P_E_INH, -80.0, "inhibitory reversal (mV); SPEC.md bench-hh"),
        ParamInfo("tau_syn_exc_ms", P_TAU_SYN_EXC, 2.0, "excitatory conductance decay (ms); SPEC.md bench-hh"),
        ParamInfo("tau_syn_inh_ms", P_TAU_SYN_INH, 6.0, "inhibitory conductance decay (ms); SPEC.md bench-hh"),
    ),
    exc_state=S_G_EXC,
    inh_state=S_G_INH,
    weight_key="weight_msiemens_per_cm2",
    current_key="i_ua_per_cm2",
    scale=_SCALE,
    has_physical_zero=np.array([False, True, True, True, True, True]),
    lower=np.array([-V_BOUND_MV, GATE_LOWER, GATE_LOWER, GATE_LOWER,
                    -NEG_SCALES_ALLOWED * _SCALE[4], -NEG_SCALES_ALLOWED * _SCALE[5]]),
    upper=np.array([V_BOUND_MV, GATE_UPPER, GATE_UPPER, GATE_UPPER,
                    SYN_UPPER_SCALES * _SCALE[4], SYN_UPPER_SCALES * _SCALE[5]]),
    doc=__doc__,
    source="Hodgkin & Huxley 1952, J Physiol 117:500-544 (squid giant axon, 6.3 deg C, modern sign convention)",
    extra={
        "rest_guess_slot": P_E_L,
        "fixed_params": ("v_reset_mv", "t_ref_ms"),
        "positive_params": ("c_m_uf_per_cm2", "tau_syn_exc_ms", "tau_syn_inh_ms"),
        "nonnegative_params": ("g_na_msiemens_per_cm2", "g_k_msiemens_per_cm2", "g_l_msiemens_per_cm2"),
    },
)


# ---------------------------------------------------------------- rate helpers
# Shared with hh_interneuron (same functional forms, shifted).

@inline_jit
def efun(x, vector):
    """x / (1 - exp(-x)), continuous through x = 0 (1 + x/2 for |x| < 1e-6).

    Both branches are computed and one selected (at x = 0 the quotient is NaN
    and unused), so a loop over cells stays vectorisable. ``vector`` (a
    constant at each call site) picks the exp: the vectorisable one in loops
    over cells, the C library's in single-cell code, where it is faster (a
    scalar call is not latency-bound on a long polynomial) and compiles quicker.
    """
    e = vector_exp(-x) if vector else math.exp(-x)
    q = x / (1.0 - e)
    return 1.0 + 0.5 * x if abs(x) < 1e-6 else q


@jit
def defun(x):
    """Derivative of :func:`efun`.

    The closed form [1 - e^-x (1 + x)] / (1 - e^-x)^2 loses digits to
    cancellation near 0 (relative error ~ 1e-16 / x^2), so |x| < 1e-3 uses the
    Taylor series 1/2 + x/6 - x^3/180 (next term x^5/5040 < 1e-19 there).
    """
    if abs(x) < 1e-3:
        return 0.5 + x / 6.0 - x * x * x / 180.0
    e = math.exp(-x)
    d = 1.0 - e
    return (1.0 - e * (1.0 + x)) / (d * d)


@inline_jit
def temperature_factor(temperature_c):
    """phi = Q10 ** ((T - 6.3) / 10): multiplies every gating rate.

    As exp(ln(Q10) (T - 6.3) / 10): a power costs several exponentials.
    """
    return math.exp(LN_Q10 * ((temperature_c - T_BASE_C) / 10.0))


@inline_jit
def _rates(v, vector):
    """(alpha_m, beta_m, alpha_h, beta_h, alpha_n, beta_n) at 6.3 deg C, 1/ms.

    ``vector``: use the vectorisable exp (see :func:`efun`).
    """
    e_m = vector_exp(-(v + 65.0) / 18.0) if vector else math.exp(-(v + 65.0) / 18.0)
    e_h = vector_exp(-(v + 65.0) / 20.0) if vector else math.exp(-(v + 65.0) / 20.0)
    e_b = vector_exp(-(v + 35.0) / 10.0) if vector else math.exp(-(v + 35.0) / 10.0)
    e_n = vector_exp(-(v + 65.0) / 80.0) if vector else math.exp(-(v + 65.0) / 80.0)
    am = efun((v + 40.0) / 10.0, vector)         # = 0.1 (V+40) / (1 - e^{-(V+40)/10})
    bm = 4.0 * e_m
    ah = 0.07 * e_h
    bh = 1.0 / (1.0 + e_b)
    an = 0.1 * efun((v + 55.0) / 10.0, vector)   # = 0.01 (V+55) / (1 - e^{-(V+55)/10})
    bn = 0.125 * e_n
    return am, bm, ah, bh, an, bn


@jit
def _rate_derivatives(v, bm, ah, bh, bn):
    """d/dV of the six rates, reusing the exponential rates already computed."""
    dam = 0.1 * defun((v + 40.0) / 10.0)
    dbm = -bm / 18.0
    dah = -ah / 20.0
    dbh = bh * (1.0 - bh) / 10.0                 # logistic: s' = s (1 - s) / 10
    dan = 0.01 * defun((v + 55.0) / 10.0)
    dbn = -bn / 80.0
    return dam, dbm, dah, dbh, dan, dbn


# --------------------------------------------------------------------- kernels

@inline_jit
def _voltage_derivative(v, m, h, n, g_e, g_i, i_ext, c, g_na_max, g_k_max, g_l, e_na, e_k, e_l,
                        e_exc, e_inh, clamped):
    """dV/dt (mV/ms) from scalars."""
    g_na = g_na_max * m * m * m * h
    n2 = n * n
    g_k = g_k_max * n2 * n2
    i_tot = (i_ext - g_na * (v - e_na) - g_k * (v - e_k) - g_l * (v - e_l)
             + g_e * (e_exc - v) + g_i * (e_inh - v))
    return 0.0 if clamped else i_tot / c


@inline_jit
def _gate_derivatives(v, m, h, n, phi, vector):
    """(dm, dh, dn)/dt (1/ms) from scalars; ``vector`` as in :func:`efun`."""
    am, bm, ah, bh, an, bn = _rates(v, vector)
    return (phi * (am * (1.0 - m) - bm * m),
            phi * (ah * (1.0 - h) - bh * h),
            phi * (an * (1.0 - n) - bn * n))


@jit
def rhs(y, p, clamped, dydt):
    """Right-hand side of one cell; see the module docstring. Writes dydt[0:6]."""
    v = y[S_V]
    dydt[S_V] = _voltage_derivative(
        v, y[S_M], y[S_H], y[S_N], y[S_G_EXC], y[S_G_INH], p[P_IEXT], p[P_C_M], p[P_G_NA],
        p[P_G_K], p[P_G_L], p[P_E_NA], p[P_E_K], p[P_E_L], p[P_E_EXC], p[P_E_INH], clamped)
    dydt[S_M], dydt[S_H], dydt[S_N] = _gate_derivatives(
        v, y[S_M], y[S_H], y[S_N], temperature_factor(p[P_TEMPERATURE]), False)
    dydt[S_G_EXC] = -y[S_G_EXC] / p[P_TAU_SYN_EXC]
    dydt[S_G_INH] = -y[S_G_INH] / p[P_TAU_SYN_INH]


D_PHI = 0
"""Row of the derived-constant array holding phi (see :func:`derive_cols`)."""


@jit
def derive_cols(P, lo, hi, D):
    """Per-cell constants of cells lo..hi-1 that :func:`rhs_cols` reads: D[D_PHI, i] = phi."""
    for i in range(lo, hi):
        D[D_PHI, i] = temperature_factor(P[P_TEMPERATURE, i])


@jit
def rhs_cols(Y, P, D, lo, hi, clamped, F, k):
    """Right-hand side of cells lo..hi-1 at once (structure of arrays).

    ``Y``: (n_states, >= hi - lo), column ``i - lo`` for cell ``i``; writes ``F[k]``;
    ``P``: (n_params, n_cells) and ``D`` (from :func:`derive_cols`), column ``i``;
    ``clamped[i - lo]`` the clamp flag.

    Three loops (voltage, gates, synapses) rather than one: LLVM checks at run
    time that no output row overlaps an input row, and gives up vectorising a
    loop that would need too many such checks (one loop over all six outputs
    and nineteen inputs does not vectorise; these three do).
    """
    base = np.uint64(lo)
    m = np.uint64(hi - lo)
    for j in range(m):  # unsigned indices: no negative-index wraparound,
        i = base + j    # which would stop LLVM from vectorising the loop
        F[k, S_V, j] = _voltage_derivative(
            Y[S_V, j], Y[S_M, j], Y[S_H, j], Y[S_N, j], Y[S_G_EXC, j], Y[S_G_INH, j],
            P[P_IEXT, i], P[P_C_M, i], P[P_G_NA, i], P[P_G_K, i], P[P_G_L, i], P[P_E_NA, i],
            P[P_E_K, i], P[P_E_L, i], P[P_E_EXC, i], P[P_E_INH, i], clamped[j])
    for j in range(m):
        F[k, S_M, j], F[k, S_H, j], F[k, S_N, j] = _gate_derivatives(
            Y[S_V, j], Y[S_M, j], Y[S_H, j], Y[S_N, j], D[D_PHI, base + j], True)
    for j in range(m):
        i = base + j
        F[k, S_G_EXC, j] = -Y[S_G_EXC, j] / P[P_TAU_SYN_EXC, i]
        F[k, S_G_INH, j] = -Y[S_G_INH, j] / P[P_TAU_SYN_INH, i]


@jit
def jac(y, p, clamped, J):
    """Jacobian d rhs / d y of one cell; writes J[0:6, 0:6]."""
    v = y[S_V]
    m = y[S_M]
    h = y[S_H]
    n = y[S_N]
    g_e = y[S_G_EXC]
    g_i = y[S_G_INH]
    on_c = (0.0 if clamped else 1.0) / p[P_C_M]
    gna_bar = p[P_G_NA]
    gk_bar = p[P_G_K]
    m2 = m * m
    n3 = n * n * n
    J[0, 0] = -on_c * (gna_bar * m2 * m * h + gk_bar * n3 * n + p[P_G_L] + g_e + g_i)
    J[0, 1] = -on_c * 3.0 * gna_bar * m2 * h * (v - p[P_E_NA])
    J[0, 2] = -on_c * gna_bar * m2 * m * (v - p[P_E_NA])
    J[0, 3] = -on_c * 4.0 * gk_bar * n3 * (v - p[P_E_K])
    J[0, 4] = on_c * (p[P_E_EXC] - v)
    J[0, 5] = on_c * (p[P_E_INH] - v)
    phi = temperature_factor(p[P_TEMPERATURE])
    am, bm, ah, bh, an, bn = _rates(v, False)
    dam, dbm, dah, dbh, dan, dbn = _rate_derivatives(v, bm, ah, bh, bn)
    for i in range(1, 6):
        for k in range(1, 6):
            J[i, k] = 0.0
    J[1, 0] = phi * (dam * (1.0 - m) - dbm * m)
    J[1, 1] = -phi * (am + bm)
    J[2, 0] = phi * (dah * (1.0 - h) - dbh * h)
    J[2, 2] = -phi * (ah + bh)
    J[3, 0] = phi * (dan * (1.0 - n) - dbn * n)
    J[3, 3] = -phi * (an + bn)
    J[4, 0] = 0.0
    J[5, 0] = 0.0
    J[4, 4] = -1.0 / p[P_TAU_SYN_EXC]
    J[5, 5] = -1.0 / p[P_TAU_SYN_INH]


@jit
def split(y, p, clamped, a, b):
    """Quasi-linear split dy_i/dt = a_i + b_i y_i with b_i = d f_i / d y_i.

    Gates take the Rush-Larsen form a = phi alpha, b = -phi (alpha + beta);
    V takes b = -(total conductance)/C, a = the conductance-weighted
    reversals plus I_ext over C.
    """
    v = y[S_V]
    m = y[S_M]
    h = y[S_H]
    n = y[S_N]
    g_e = y[S_G_EXC]
    g_i = y[S_G_INH]
    on_c = (0.0 if clamped else 1.0) / p[P_C_M]
    g_na = p[P_G_NA] * m * m * m * h
    n2 = n * n
    g_k = p[P_G_K] * n2 * n2
    g_l = p[P_G_L]
    a[S_V] = on_c * (p[P_IEXT] + g_na * p[P_E_NA] + g_k * p[P_E_K] + g_l * p[P_E_L]
                     + g_e * p[P_E_EXC] + g_i * p[P_E_INH])
    b[S_V] = -on_c * (g_na + g_k + g_l + g_e + g_i)
    phi = temperature_factor(p[P_TEMPERATURE])
    am, bm, ah, bh, an, bn = _rates(v, False)
    a[S_M] = phi * am
    b[S_M] = -phi * (am + bm)
    a[S_H] = phi * ah
    b[S_H] = -phi * (ah + bh)
    a[S_N] = phi * an
    b[S_N] = -phi * (an + bn)
    a[S_G_EXC] = 0.0
    b[S_G_EXC] = -1.0 / p[P_TAU_SYN_EXC]
    a[S_G_INH] = 0.0
    b[S_G_INH] = -1.0 / p[P_TAU_SYN_INH]


@jit
def reset(y, p):
    """No reset: a Hodgkin-Huxley cell repolarises by itself."""
