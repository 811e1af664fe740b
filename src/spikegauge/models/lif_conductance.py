"""Leaky integrate-and-fire cell with exponentially decaying synaptic conductances.

Equations (point units: mV, ms, pF, nS, pA)::

    C dV/dt     = -g_L (V - E_L) + g_exc (E_exc - V) + g_inh (E_inh - V) + I_ext
    dg_exc/dt   = -g_exc / tau_syn_exc,   g_L = C / tau_m
    dg_inh/dt   = -g_inh / tau_syn_inh

An arrival adds its weight (nS) to ``g_exc`` or ``g_inh``. Threshold, reset
and refractory clamp as in lif-current, whose parameter slots 4..8 this model
shares, so a scenario can switch between the two LIF models by changing the
synapse keys only.

Defaults are the bench-lif cell of ../shared/limit/SPEC.md: C = 250 pF,
g_L = 12.5 nS (tau_m = 20 ms), E_L = -65, V_th = -50, V_reset = -60 mV,
2 ms refractory, E_exc = 0, E_inh = -80 mV, tau_exc = 4, tau_inh = 8 ms.
"""
from __future__ import annotations

import numpy as np

from .._numba import inline_jit, jit
from .base import P_IEXT, P_TREF, P_VRESET, P_VTH, ModelSpec, ParamInfo
from .lif_current import (
    NEG_SCALES_ALLOWED,
    P_C_M,
    P_E_L,
    P_TAU_M,
    P_TAU_SYN_EXC,
    P_TAU_SYN_INH,
    SYN_UPPER_SCALES,
    V_LOWER_MV,
    V_UPPER_MV,
)

CODE = 1

P_E_EXC = 9
P_E_INH = 10

S_V = 0
S_G_EXC = 1
S_G_INH = 2

# V as in lif-current; conductances: bench-lif weights are 1.5 and 15 nS.
_SCALE = np.array([10.0, 10.0, 10.0])

SPEC = ModelSpec(
    name="lif-conductance",
    code=CODE,
    unit_system="point",
    state_names=("v_mv", "g_exc_nsiemens", "g_inh_nsiemens"),
    params=(
        ParamInfo("i_bias_pa", P_IEXT, 0.0, "constant external current (pA); drives add to it"),
        ParamInfo("v_th_mv", P_VTH, -50.0, "spike threshold (mV); SPEC.md bench-lif"),
        ParamInfo("v_reset_mv", P_VRESET, -60.0, "reset voltage (mV); SPEC.md bench-lif"),
        ParamInfo("t_ref_ms", P_TREF, 2.0, "refractory period, voltage clamped (ms); SPEC.md bench-lif"),
        ParamInfo("c_m_pf", P_C_M, 250.0, "membrane capacitance (pF); SPEC.md bench-lif"),
        ParamInfo("tau_m_ms", P_TAU_M, 20.0, "membrane time constant C/g_L (ms); SPEC.md bench-lif"),
        ParamInfo("e_l_mv", P_E_L, -65.0, "leak reversal potential (mV); SPEC.md bench-lif"),
        ParamInfo("tau_syn_exc_ms", P_TAU_SYN_EXC, 4.0, "excitatory conductance decay (ms); SPEC.md bench-lif"),
        ParamInfo("tau_syn_inh_ms", P_TAU_SYN_INH, 8.0, "inhibitory conductance decay (ms); SPEC.md bench-lif"),
        ParamInfo("e_exc_mv", P_E_EXC, 0.0, "excitatory reversal potential (mV); SPEC.md bench-lif"),
        ParamInfo("e_inh_mv", P_E_INH, -80.0, "inhibitory reversal potential (mV); SPEC.md bench-lif"),
    ),
    exc_state=S_G_EXC,
    inh_state=S_G_INH,
    weight_key="weight_nsiemens",
    current_key="i_pa",
    scale=_SCALE,
    has_physical_zero=np.array([False, True, True]),
    lower=np.array([V_LOWER_MV, -NEG_SCALES_ALLOWED * _SCALE[1], -NEG_SCALES_ALLOWED * _SCALE[2]]),
    upper=np.array([V_UPPER_MV, SYN_UPPER_SCALES * _SCALE[1], SYN_UPPER_SCALES * _SCALE[2]]),
    doc=__doc__,
    source=("leaky integrate-and-fire with exponential synaptic conductances (textbook form); "
            "defaults: the bench-lif cell"),
    extra={
        "rest_guess_slot": P_E_L,
        "positive_params": ("c_m_pf", "tau_m_ms", "tau_syn_exc_ms", "tau_syn_inh_ms"),
        "nonnegative_params": ("t_ref_ms",),
    },
)


@inline_jit
def _derivatives(v, g_e, g_i, i_ext, c, tau_m, e_l, e_exc, e_inh, tau_exc, tau_inh, clamped):
    """(dV/dt, dg_exc/dt, dg_inh/dt) from scalars; the one writing of the equations."""
    g_l = c / tau_m
    i_tot = g_l * (e_l - v) + g_e * (e_exc - v) + g_i * (e_inh - v) + i_ext
    dv = 0.0 if clamped else i_tot / c
    return dv, -g_e / tau_exc, -g_i / tau_inh


@jit
def rhs(y, p, clamped, dydt):
    """Right-hand side of one cell; see the module docstring. Writes dydt[0:3]."""
    dydt[S_V], dydt[S_G_EXC], dydt[S_G_INH] = _derivatives(
        y[S_V], y[S_G_EXC], y[S_G_INH], p[P_IEXT], p[P_C_M], p[P_TAU_M], p[P_E_L],
        p[P_E_EXC], p[P_E_INH], p[P_TAU_SYN_EXC], p[P_TAU_SYN_INH], clamped)


@jit
def rhs_cols(Y, P, lo, hi, clamped, F, k):
    """Right-hand side of cells lo..hi-1 at once (structure of arrays).

    ``Y``: (n_states, >= hi - lo), column ``i - lo`` for cell ``i``; writes ``F[k]``;
    ``P``: (n_params, n_cells), column ``i``; ``clamped[i - lo]`` the clamp flag.
    """
    base = np.uint64(lo)
    for j in range(np.uint64(hi - lo)):  # unsigned indices: no negative-index wraparound,
        i = base + j                     # which would stop LLVM from vectorising the loop
        F[k, S_V, j], F[k, S_G_EXC, j], F[k, S_G_INH, j] = _derivatives(
            Y[S_V, j], Y[S_G_EXC, j], Y[S_G_INH, j], P[P_IEXT, i], P[P_C_M, i], P[P_TAU_M, i],
            P[P_E_L, i], P[P_E_EXC, i], P[P_E_INH, i], P[P_TAU_SYN_EXC, i], P[P_TAU_SYN_INH, i],
            clamped[j])


@jit
def jac(y, p, clamped, J):
    """Jacobian d rhs / d y of one cell; writes J[0:3, 0:3]."""
    v = y[S_V]
    c = p[P_C_M]
    on = 0.0 if clamped else 1.0
    g_l = c / p[P_TAU_M]
    J[0, 0] = -on * (g_l + y[S_G_EXC] + y[S_G_INH]) / c
    J[0, 1] = on * (p[P_E_EXC] - v) / c
    J[0, 2] = on * (p[P_E_INH] - v) / c
    J[1, 0] = 0.0
    J[1, 1] = -1.0 / p[P_TAU_SYN_EXC]
    J[1, 2] = 0.0
    J[2, 0] = 0.0
    J[2, 1] = 0.0
    J[2, 2] = -1.0 / p[P_TAU_SYN_INH]


@jit
def split(y, p, clamped, a, b):
    """Quasi-linear split dy_i/dt = a_i + b_i y_i with b_i = d f_i / d y_i.

    For V, b is minus the total conductance over C and a the driving terms,
    which is exact for the linear voltage equation with frozen conductances.
    """
    c = p[P_C_M]
    on = 0.0 if clamped else 1.0
    g_l = c / p[P_TAU_M]
    g_e = y[S_G_EXC]
    g_i = y[S_G_INH]
    a[S_V] = on * (g_l * p[P_E_L] + g_e * p[P_E_EXC] + g_i * p[P_E_INH] + p[P_IEXT]) / c
    b[S_V] = -on * (g_l + g_e + g_i) / c
    a[S_G_EXC] = 0.0
    b[S_G_EXC] = -1.0 / p[P_TAU_SYN_EXC]
    a[S_G_INH] = 0.0
    b[S_G_INH] = -1.0 / p[P_TAU_SYN_INH]


@jit
def reset(y, p):
    """Spike reset: V = V_reset (the clamp itself is the driver's business)."""
    y[S_V] = p[P_VRESET]
