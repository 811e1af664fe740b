"""Adaptive exponential integrate-and-fire cell (Brette & Gerstner 2005).

Brette R, Gerstner W (2005) Adaptive exponential integrate-and-fire model as
an effective description of neuronal activity. J Neurophysiol 94:3637-3642.

Equations (point units: mV, ms, pF, nS, pA)::

    C dV/dt     = -g_L (V - E_L) + g_L Delta_T exp((V - V_T) / Delta_T) - w
                  + g_exc (E_exc - V) + g_inh (E_inh - V) + I_ext
    tau_w dw/dt = a (V - E_L) - w
    dg_exc/dt   = -g_exc / tau_syn_exc,   dg_inh/dt = -g_inh / tau_syn_inh

A spike is the upward crossing of ``v_peak_mv`` (the common threshold slot);
the reset sets V = V_r and adds b to w. An optional refractory clamp holds V
at V_r for ``t_ref_ms`` while w and the conductances evolve.

Overflow guard: the exponent (V - V_T)/Delta_T is capped at ``EXP_ARG_MAX``
(= 50) before exp. Beyond the cap the spike current is the constant
g_L Delta_T e^50, about 5e21 times the leak scale, so V runs from the cap to
any peak in far less than any time step and the model is unchanged where it
matters (below V_peak for Delta_T >= (V_peak - V_T)/50, i.e. Delta_T above about 1 mV
with the default peak). The point of the cap is that
the right-hand side stays finite for every finite V: a blown-up step ends at
the peak crossing or at the bounds, never in inf/NaN. Above the cap the
derivative of the spike term is 0, and the Jacobian says so.

Default parameter values are the paper's regular-spiking cell, from memory:
C = 281 pF, g_L = 30 nS, E_L = -70.6 mV, V_T = -50.4 mV, Delta_T = 2 mV,
tau_w = 144 ms, a = 4 nS, b = 0.0805 nA, reset at V_r = E_L. Synapse
defaults are the bench-lif ones (SPEC.md), as in lif-conductance.

The default peak is 0 mV, not the paper's 20 mV (from memory). Near the
blow-up, e^{-x} falls linearly in time, so V reaches V_T + x Delta_T about
(C/g_L) e^{-x} ms before the singularity: ~1e-10 ms at 0 mV but ~1e-14 ms
at 20 mV, below the spacing of double-precision times after ~10 ms, where
an adaptive solver can no longer step (scipy's DOP853 stops there). The
spike time moves by less than 1e-9 ms between the two choices. For long runs
a lower peak (e.g. V_T + 5 Delta_T, 0.06 ms before the singularity) is
cheaper still.
"""
from __future__ import annotations

import math

import numpy as np

from .._numba import jit
from .base import P_IEXT, P_TREF, P_VRESET, P_VTH, ModelSpec, ParamInfo
from .lif_current import NEG_SCALES_ALLOWED, SYN_UPPER_SCALES, V_LOWER_MV, V_UPPER_MV

CODE = 2

P_C_M = 4
P_G_L = 5
P_E_L = 6
P_TAU_SYN_EXC = 7
P_TAU_SYN_INH = 8
P_E_EXC = 9
P_E_INH = 10
P_V_T = 11
P_DELTA_T = 12
P_TAU_W = 13
P_A = 14
P_B = 15

S_V = 0
S_W = 1
S_G_EXC = 2
S_G_INH = 3

EXP_ARG_MAX = 50.0
"""Cap on (V - V_T)/Delta_T before exp; see the module docstring."""

# w can be negative (a > 0 and V below E_L) but a physiological adaptation
# current stays within a few nA; 1 uA means the run has blown up.
W_BOUND_PA = 1.0e6

_SCALE = np.array([10.0, 100.0, 10.0, 10.0])

_BG = "Brette & Gerstner 2005, from memory"

SPEC = ModelSpec(
    name="adex",
    code=CODE,
    unit_system="point",
    state_names=("v_mv", "w_pa", "g_exc_nsiemens", "g_inh_nsiemens"),
    params=(
        ParamInfo("i_bias_pa", P_IEXT, 0.0, "constant external current (pA); drives add to it"),
        ParamInfo("v_peak_mv", P_VTH, 0.0, "spike detection (peak) voltage (mV); see the module docstring"),
        ParamInfo("v_reset_mv", P_VRESET, -70.6, f"reset voltage V_r = E_L (mV); {_BG}"),
        ParamInfo("t_ref_ms", P_TREF, 0.0, "refractory period, voltage clamped (ms); none in the paper"),
        ParamInfo("c_m_pf", P_C_M, 281.0, f"membrane capacitance (pF); {_BG}"),
        ParamInfo("g_l_nsiemens", P_G_L, 30.0, f"leak conductance (nS); {_BG}"),
        ParamInfo("e_l_mv", P_E_L, -70.6, f"leak reversal potential (mV); {_BG}"),
        ParamInfo("tau_syn_exc_ms", P_TAU_SYN_EXC, 4.0, "excitatory conductance decay (ms); SPEC.md bench-lif"),
        ParamInfo("tau_syn_inh_ms", P_TAU_SYN_INH, 8.0, "inhibitory conductance decay (ms); SPEC.md bench-lif"),
        ParamInfo("e_exc_mv", P_E_EXC, 0.0, "excitatory reversal potential (mV); SPEC.md bench-lif"),
        ParamInfo("e_inh_mv", P_E_INH, -80.0, "inhibitory reversal potential (mV); SPEC.md bench-lif"),
        ParamInfo("v_t_mv", P_V_T, -50.4, f"threshold slope-factor centre V_T (mV); {_BG}"),
        ParamInfo("delta_t_mv", P_DELTA_T, 2.0, f"slope factor Delta_T (mV, > 0); {_BG}"),
        ParamInfo("tau_w_ms", P_TAU_W, 144.0, f"adaptation time constant (ms); {_BG}"),
        ParamInfo("a_nsiemens", P_A, 4.0, f"subthreshold adaptation (nS); {_BG}"),
        ParamInfo("b_pa", P_B, 80.5, f"spike-triggered adaptation increment (pA); {_BG}"),
    ),
    exc_state=S_G_EXC,
    inh_state=S_G_INH,
    weight_key="weight_nsiemens",
    current_key="i_pa",
    scale=_SCALE,
    has_physical_zero=np.array([False, True, True, True]),
    lower=np.array([V_LOWER_MV, -W_BOUND_PA, -NEG_SCALES_ALLOWED * _SCALE[2], -NEG_SCALES_ALLOWED * _SCALE[3]]),
    upper=np.array([V_UPPER_MV, W_BOUND_PA, SYN_UPPER_SCALES * _SCALE[2], SYN_UPPER_SCALES * _SCALE[3]]),
    doc=__doc__,
    source="Brette & Gerstner 2005, J Neurophysiol 94:3637-3642 (regular-spiking cell, values from memory)",
    extra={
        "rest_guess_slot": P_E_L,
        "positive_params": ("c_m_pf", "g_l_nsiemens", "delta_t_mv", "tau_w_ms", "tau_syn_exc_ms", "tau_syn_inh_ms"),
        "nonnegative_params": ("t_ref_ms",),
    },
)


@jit
def _spike_term(v, p):
    """Return (exp of the capped exponent, 1.0 below the cap else 0.0)."""
    x = (v - p[P_V_T]) / p[P_DELTA_T]
    if x < EXP_ARG_MAX:
        return math.exp(x), 1.0
    return math.exp(EXP_ARG_MAX), 0.0


@jit
def rhs(y, p, clamped, dydt):
    """Right-hand side of one cell; see the module docstring. Writes dydt[0:4]."""
    v = y[S_V]
    w = y[S_W]
    g_l = p[P_G_L]
    ex, _ = _spike_term(v, p)
    i_tot = (-g_l * (v - p[P_E_L]) + g_l * p[P_DELTA_T] * ex - w
             + y[S_G_EXC] * (p[P_E_EXC] - v) + y[S_G_INH] * (p[P_E_INH] - v) + p[P_IEXT])
    dydt[S_V] = 0.0 if clamped else i_tot / p[P_C_M]
    dydt[S_W] = (p[P_A] * (v - p[P_E_L]) - w) / p[P_TAU_W]
    dydt[S_G_EXC] = -y[S_G_EXC] / p[P_TAU_SYN_EXC]
    dydt[S_G_INH] = -y[S_G_INH] / p[P_TAU_SYN_INH]


@jit
def jac(y, p, clamped, J):
    """Jacobian d rhs / d y of one cell; writes J[0:4, 0:4]."""
    v = y[S_V]
    on_c = (0.0 if clamped else 1.0) / p[P_C_M]
    g_l = p[P_G_L]
    ex, below = _spike_term(v, p)
    J[0, 0] = on_c * (-g_l + g_l * ex * below - y[S_G_EXC] - y[S_G_INH])
    J[0, 1] = -on_c
    J[0, 2] = on_c * (p[P_E_EXC] - v)
    J[0, 3] = on_c * (p[P_E_INH] - v)
    inv_tw = 1.0 / p[P_TAU_W]
    J[1, 0] = p[P_A] * inv_tw
    J[1, 1] = -inv_tw
    J[1, 2] = 0.0
    J[1, 3] = 0.0
    J[2, 0] = 0.0
    J[2, 1] = 0.0
    J[2, 2] = -1.0 / p[P_TAU_SYN_EXC]
    J[2, 3] = 0.0
    J[3, 0] = 0.0
    J[3, 1] = 0.0
    J[3, 2] = 0.0
    J[3, 3] = -1.0 / p[P_TAU_SYN_INH]


@jit
def split(y, p, clamped, a, b):
    """Quasi-linear split dy_i/dt = a_i + b_i y_i.

    For V, b = -(g_L + g_exc + g_inh)/C, minus the total conductance, and a
    carries everything else, the exponential spike current and -w included.
    This b is *not* d f_V / dV (which adds g_L e^x / C): on the upswing that
    derivative reaches ~1e20 /ms, and exp(b h) in an exponential stepper would
    overflow to inf, turning an ordinary spike into a divergence. With the
    spike current frozen over a step the update stays finite and the peak
    crossing ends the spike. For w and the conductances b = d f_i / d y_i.
    """
    v = y[S_V]
    on_c = (0.0 if clamped else 1.0) / p[P_C_M]
    g_l = p[P_G_L]
    g_e = y[S_G_EXC]
    g_i = y[S_G_INH]
    ex, _ = _spike_term(v, p)
    a[S_V] = on_c * (g_l * p[P_E_L] + g_l * p[P_DELTA_T] * ex - y[S_W]
                     + g_e * p[P_E_EXC] + g_i * p[P_E_INH] + p[P_IEXT])
    b[S_V] = -on_c * (g_l + g_e + g_i)
    inv_tw = 1.0 / p[P_TAU_W]
    a[S_W] = p[P_A] * (v - p[P_E_L]) * inv_tw
    b[S_W] = -inv_tw
    a[S_G_EXC] = 0.0
    b[S_G_EXC] = -1.0 / p[P_TAU_SYN_EXC]
    a[S_G_INH] = 0.0
    b[S_G_INH] = -1.0 / p[P_TAU_SYN_INH]


@jit
def reset(y, p):
    """Spike reset: V = V_r and w += b."""
    y[S_V] = p[P_VRESET]
    y[S_W] += p[P_B]
