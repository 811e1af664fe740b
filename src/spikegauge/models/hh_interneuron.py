"""Fast-spiking interneuron of Wang & Buzsaki (1996), conductance synapses.

Wang X-J, Buzsaki G (1996) Gamma oscillation by synaptic inhibition in a
hippocampal interneuronal network model. J Neurosci 16:6402-6413.
Equations and values below are from memory of that paper.

Equations (area units: mV, ms, uF/cm2, mS/cm2, uA/cm2)::

    C dV/dt = I_ext - g_Na m_inf(V)^3 h (V - E_Na) - g_K n^4 (V - E_K) - g_L (V - E_L)
              + g_exc (E_exc - V) + g_inh (E_inh - V)
    dh/dt   = phi (alpha_h (1 - h) - beta_h h),  dn/dt = phi (alpha_n (1 - n) - beta_n n)
    m_inf   = alpha_m / (alpha_m + beta_m)        (sodium activation is instantaneous)

    alpha_m = 0.1 (V+35) / (1 - exp(-(V+35)/10))    beta_m = 4 exp(-(V+60)/18)
    alpha_h = 0.07 exp(-(V+58)/20)                  beta_h = 1 / (1 + exp(-(V+28)/10))
    alpha_n = 0.01 (V+34) / (1 - exp(-(V+34)/10))   beta_n = 0.125 exp(-(V+44)/80)

A spike is an upward crossing of ``v_detect_mv`` (default 0 mV; computed
here with scipy, spikes peak at +22 to +32 mV for 0.17-10 uA/cm2 but only
near +5 mV at 20 uA/cm2, so lower it for strong drive); no reset, no
refractory clamp (``v_reset_mv`` NaN and ``t_ref_ms`` 0, both fixed).
"""
from __future__ import annotations

import math

import numpy as np

from .._numba import jit
from .base import P_IEXT, P_TREF, P_VRESET, P_VTH, ModelSpec, ParamInfo
from .hh_squid import GATE_LOWER, GATE_UPPER, NEG_SCALES_ALLOWED, SYN_UPPER_SCALES, V_BOUND_MV, defun, efun

CODE = 4

P_C_M = 4
P_G_NA = 5
P_G_K = 6
P_G_L = 7
P_E_NA = 8
P_E_K = 9
P_E_L = 10
P_PHI = 11
P_E_EXC = 12
P_E_INH = 13
P_TAU_SYN_EXC = 14
P_TAU_SYN_INH = 15

S_V = 0
S_H = 1
S_N = 2
S_G_EXC = 3
S_G_INH = 4

# V: a spike spans ~100 mV; gates 1; conductances ~0.1 mS/cm2.
_SCALE = np.array([100.0, 1.0, 1.0, 0.1, 0.1])

_WB = "Wang & Buzsaki 1996, from memory"

SPEC = ModelSpec(
    name="hh-interneuron",
    code=CODE,
    unit_system="area",
    state_names=("v_mv", "h", "n", "g_exc_msiemens_per_cm2", "g_inh_msiemens_per_cm2"),
    params=(
        ParamInfo("i_bias_ua_per_cm2", P_IEXT, 0.0, "constant external current (uA/cm2); drives add to it"),
        ParamInfo("v_detect_mv", P_VTH, 0.0, "spike detection voltage, upward crossing (mV)"),
        ParamInfo("v_reset_mv", P_VRESET, math.nan, "no reset: fixed at NaN"),
        ParamInfo("t_ref_ms", P_TREF, 0.0, "no refractory clamp: fixed at 0"),
        ParamInfo("c_m_uf_per_cm2", P_C_M, 1.0, f"membrane capacitance (uF/cm2); {_WB}"),
        ParamInfo("g_na_msiemens_per_cm2", P_G_NA, 35.0, f"sodium conductance (mS/cm2); {_WB}"),
        ParamInfo("g_k_msiemens_per_cm2", P_G_K, 9.0, f"potassium conductance (mS/cm2); {_WB}"),
        ParamInfo("g_l_msiemens_per_cm2", P_G_L, 0.1, f"leak conductance (mS/cm2); {_WB}"),
        ParamInfo("e_na_mv", P_E_NA, 55.0, f"sodium reversal (mV); {_WB}"),
        ParamInfo("e_k_mv", P_E_K, -90.0, f"potassium reversal (mV); {_WB}"),
        ParamInfo("e_l_mv", P_E_L, -65.0, f"leak reversal (mV); {_WB}"),
        ParamInfo("phi", P_PHI, 5.0, f"gating rate factor for h and n (dimensionless); {_WB}"),
        ParamInfo("e_exc_mv", P_E_EXC, 0.0, "excitatory reversal (mV); common practice"),
        ParamInfo("e_inh_mv", P_E_INH, -75.0, f"inhibitory reversal (mV); {_WB}"),
        ParamInfo("tau_syn_exc_ms", P_TAU_SYN_EXC, 2.0, "excitatory conductance decay (ms); common practice"),
        ParamInfo("tau_syn_inh_ms", P_TAU_SYN_INH, 10.0, f"inhibitory conductance decay, 1/beta (ms); {_WB}"),
    ),
    exc_state=S_G_EXC,
    inh_state=S_G_INH,
    weight_key="weight_msiemens_per_cm2",
    current_key="i_ua_per_cm2",
    scale=_SCALE,
    has_physical_zero=np.array([False, True, True, True, True]),
    lower=np.array([-V_BOUND_MV, GATE_LOWER, GATE_LOWER,
                    -NEG_SCALES_ALLOWED * _SCALE[3], -NEG_SCALES_ALLOWED * _SCALE[4]]),
    upper=np.array([V_BOUND_MV, GATE_UPPER, GATE_UPPER,
                    SYN_UPPER_SCALES * _SCALE[3], SYN_UPPER_SCALES * _SCALE[4]]),
    doc=__doc__,
    source="Wang & Buzsaki 1996, J Neurosci 16:6402-6413 (values from memory)",
    extra={
        "rest_guess_slot": P_E_L,
        "fixed_params": ("v_reset_mv", "t_ref_ms"),
        "positive_params": ("c_m_uf_per_cm2", "phi", "tau_syn_exc_ms", "tau_syn_inh_ms"),
        "nonnegative_params": ("g_na_msiemens_per_cm2", "g_k_msiemens_per_cm2", "g_l_msiemens_per_cm2"),
    },
)


@jit
def _m_inf(v):
    """(m_inf, d m_inf / dV) of the instantaneous sodium activation."""
    x = (v + 35.0) / 10.0
    am = efun(x, False)                          # = 0.1 (V+35) / (1 - e^{-(V+35)/10})
    bm = 4.0 * math.exp(-(v + 60.0) / 18.0)
    s = am + bm
    dam = 0.1 * defun(x)
    dbm = -bm / 18.0
    return am / s, (dam * bm - am * dbm) / (s * s)


@jit
def _hn_rates(v):
    """(alpha_h, beta_h, alpha_n, beta_n) before the factor phi, 1/ms."""
    ah = 0.07 * math.exp(-(v + 58.0) / 20.0)
    bh = 1.0 / (1.0 + math.exp(-(v + 28.0) / 10.0))
    an = 0.1 * efun((v + 34.0) / 10.0, False)    # = 0.01 (V+34) / (1 - e^{-(V+34)/10})
    bn = 0.125 * math.exp(-(v + 44.0) / 80.0)
    return ah, bh, an, bn


@jit
def rhs(y, p, clamped, dydt):
    """Right-hand side of one cell; see the module docstring. Writes dydt[0:5]."""
    v = y[S_V]
    h = y[S_H]
    n = y[S_N]
    g_e = y[S_G_EXC]
    g_i = y[S_G_INH]
    minf, _ = _m_inf(v)
    g_na = p[P_G_NA] * minf * minf * minf * h
    n2 = n * n
    g_k = p[P_G_K] * n2 * n2
    i_tot = (p[P_IEXT] - g_na * (v - p[P_E_NA]) - g_k * (v - p[P_E_K]) - p[P_G_L] * (v - p[P_E_L])
             + g_e * (p[P_E_EXC] - v) + g_i * (p[P_E_INH] - v))
    dydt[S_V] = 0.0 if clamped else i_tot / p[P_C_M]
    phi = p[P_PHI]
    ah, bh, an, bn = _hn_rates(v)
    dydt[S_H] = phi * (ah * (1.0 - h) - bh * h)
    dydt[S_N] = phi * (an * (1.0 - n) - bn * n)
    dydt[S_G_EXC] = -g_e / p[P_TAU_SYN_EXC]
    dydt[S_G_INH] = -g_i / p[P_TAU_SYN_INH]


@jit
def jac(y, p, clamped, J):
    """Jacobian d rhs / d y of one cell; writes J[0:5, 0:5]."""
    v = y[S_V]
    h = y[S_H]
    n = y[S_N]
    g_e = y[S_G_EXC]
    g_i = y[S_G_INH]
    on_c = (0.0 if clamped else 1.0) / p[P_C_M]
    minf, dminf = _m_inf(v)
    m2 = minf * minf
    n3 = n * n * n
    g_tot = p[P_G_NA] * m2 * minf * h + p[P_G_K] * n3 * n + p[P_G_L] + g_e + g_i
    # Minus the total conductance, plus the slope of the instantaneous m_inf(V).
    J[0, 0] = -on_c * (g_tot + 3.0 * p[P_G_NA] * m2 * dminf * h * (v - p[P_E_NA]))
    J[0, 1] = -on_c * p[P_G_NA] * m2 * minf * (v - p[P_E_NA])
    J[0, 2] = -on_c * 4.0 * p[P_G_K] * n3 * (v - p[P_E_K])
    J[0, 3] = on_c * (p[P_E_EXC] - v)
    J[0, 4] = on_c * (p[P_E_INH] - v)
    for i in range(1, 5):
        for k in range(0, 5):
            J[i, k] = 0.0
    phi = p[P_PHI]
    ah, bh, an, bn = _hn_rates(v)
    dah = -ah / 20.0
    dbh = bh * (1.0 - bh) / 10.0                 # logistic: s' = s (1 - s) / 10
    dan = 0.01 * defun((v + 34.0) / 10.0)
    dbn = -bn / 80.0
    J[1, 0] = phi * (dah * (1.0 - h) - dbh * h)
    J[1, 1] = -phi * (ah + bh)
    J[2, 0] = phi * (dan * (1.0 - n) - dbn * n)
    J[2, 2] = -phi * (an + bn)
    J[3, 3] = -1.0 / p[P_TAU_SYN_EXC]
    J[4, 4] = -1.0 / p[P_TAU_SYN_INH]


@jit
def split(y, p, clamped, a, b):
    """Quasi-linear split dy_i/dt = a_i + b_i y_i.

    Gates take the Rush-Larsen form a = phi alpha, b = -phi (alpha + beta).
    For V, b = -(total conductance)/C with g_Na m_inf(V)^3 h frozen at the
    current V, and a = the conductance-weighted reversals plus I_ext over C:
    the classic exponential-Euler split for conductance models. This b is not
    d f_V / dV, which adds a term from m_inf(V) that is positive on the
    upswing; with it exp(b h) would amplify the upswing and send a step at
    dt ~ 0.5 ms far out of bounds instead of relaxing V towards E_Na.
    """
    v = y[S_V]
    h = y[S_H]
    n = y[S_N]
    g_e = y[S_G_EXC]
    g_i = y[S_G_INH]
    on_c = (0.0 if clamped else 1.0) / p[P_C_M]
    minf, _ = _m_inf(v)
    g_na = p[P_G_NA] * minf * minf * minf * h
    n2 = n * n
    g_k = p[P_G_K] * n2 * n2
    g_l = p[P_G_L]
    a[S_V] = on_c * (p[P_IEXT] + g_na * p[P_E_NA] + g_k * p[P_E_K] + g_l * p[P_E_L]
                     + g_e * p[P_E_EXC] + g_i * p[P_E_INH])
    b[S_V] = -on_c * (g_na + g_k + g_l + g_e + g_i)
    phi = p[P_PHI]
    ah, bh, an, bn = _hn_rates(v)
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
    """No reset: the cell repolarises by itself."""
