"""Leaky integrate-and-fire cell with exponentially decaying synaptic currents.

Equations (point units: mV, ms, pF, nS, pA)::

    C dV/dt     = -g_L (V - E_L) + I_exc - I_inh + I_ext,   g_L = C / tau_m
    dI_exc/dt   = -I_exc / tau_syn_exc
    dI_inh/dt   = -I_inh / tau_syn_inh

An excitatory (inhibitory) arrival adds its weight (pA, >= 0) to ``I_exc``
(``I_inh``); the inhibitory current enters with a minus sign, so both weights
are non-negative. A spike is an upward crossing of ``v_th_mv``; the voltage
is then set to ``v_reset_mv`` and held there for ``t_ref_ms`` (the clamp).

The model is linear between events, so it has an exact propagator (Rotter &
Diesmann 1999, Biol Cybern 81:381-402), which the reference solution uses.

Parameterised by ``tau_m_ms`` and ``c_m_pf`` (the textbook pair) rather than
by a leak conductance, so the membrane time constant is a key of its own.
Defaults take the bench-lif membrane (../shared/limit/SPEC.md): C = 250 pF,
tau_m = 20 ms, E_L = -65, V_th = -50, V_reset = -60 mV, 2 ms refractory;
the synaptic time constants are the bench's conductance ones (4 and 8 ms).
"""
from __future__ import annotations

import numpy as np

from .._numba import inline_jit, jit
from .base import P_IEXT, P_TREF, P_VRESET, P_VTH, ModelSpec, ParamInfo

CODE = 0

# Parameter slots after the four common ones. lif-conductance shares 4..8.
P_C_M = 4
P_TAU_M = 5
P_E_L = 6
P_TAU_SYN_EXC = 7
P_TAU_SYN_INH = 8

# State slots.
S_V = 0
S_I_EXC = 1
S_I_INH = 2

# Lower bound of an integrate-and-fire voltage: far below any reversal
# potential, so only a numerically unstable step can get there.
V_LOWER_MV = -1000.0
# Upper bound: a spike is detected at threshold before bounds are checked, so
# a voltage this high means the state was never meant to be there.
V_UPPER_MV = 1000.0
# A current or conductance that starts non-negative and decays stays
# non-negative; exact decay and every stable explicit step keep it so. A value
# of minus one typical magnitude cannot come from rounding: the step is
# unstable (e.g. forward Euler with dt > 2 tau).
NEG_SCALES_ALLOWED = 1.0
# Upper bound of synaptic states, in typical magnitudes.
SYN_UPPER_SCALES = 1.0e4

_SCALE = np.array([10.0, 100.0, 100.0])

SPEC = ModelSpec(
    name="lif-current",
    code=CODE,
    unit_system="point",
    state_names=("v_mv", "i_exc_pa", "i_inh_pa"),
    params=(
        ParamInfo("i_bias_pa", P_IEXT, 0.0, "constant external current (pA); drives add to it"),
        ParamInfo("v_th_mv", P_VTH, -50.0, "spike threshold (mV); SPEC.md bench-lif"),
        ParamInfo("v_reset_mv", P_VRESET, -60.0, "reset voltage (mV); SPEC.md bench-lif"),
        ParamInfo("t_ref_ms", P_TREF, 2.0, "refractory period, voltage clamped (ms); SPEC.md bench-lif"),
        ParamInfo("c_m_pf", P_C_M, 250.0, "membrane capacitance (pF); SPEC.md bench-lif"),
        ParamInfo("tau_m_ms", P_TAU_M, 20.0, "membrane time constant C/g_L (ms); SPEC.md bench-lif"),
        ParamInfo("e_l_mv", P_E_L, -65.0, "leak reversal potential (mV); SPEC.md bench-lif"),
        ParamInfo("tau_syn_exc_ms", P_TAU_SYN_EXC, 4.0, "decay time of the excitatory current (ms)"),
        ParamInfo("tau_syn_inh_ms", P_TAU_SYN_INH, 8.0, "decay time of the inhibitory current (ms)"),
    ),
    exc_state=S_I_EXC,
    inh_state=S_I_INH,
    weight_key="weight_pa",
    current_key="i_pa",
    # V: the threshold-to-reset range is 10-15 mV; currents: a few arrivals of
    # tens of pA.
    scale=_SCALE,
    has_physical_zero=np.array([False, True, True]),
    lower=np.array([V_LOWER_MV, -NEG_SCALES_ALLOWED * _SCALE[1], -NEG_SCALES_ALLOWED * _SCALE[2]]),
    upper=np.array([V_UPPER_MV, SYN_UPPER_SCALES * _SCALE[1], SYN_UPPER_SCALES * _SCALE[2]]),
    doc=__doc__,
    source=("leaky integrate-and-fire with exponential synaptic currents (textbook form); exact propagator: "
            "Rotter & Diesmann 1999, Biol Cybern 81:381-402; defaults: the bench-lif cell"),
    extra={
        "rest_guess_slot": P_E_L,
        "positive_params": ("c_m_pf", "tau_m_ms", "tau_syn_exc_ms", "tau_syn_inh_ms"),
        "nonnegative_params": ("t_ref_ms",),
    },
)


@inline_jit
def _derivatives(v, i_exc, i_inh, i_ext, c, tau_m, e_l, tau_exc, tau_inh, clamped):
    """(dV/dt, di_exc/dt, di_inh/dt) from scalars; the one writing of the equations."""
    dv = (e_l - v) / tau_m + (i_exc - i_inh + i_ext) / c
    return 0.0 if clamped else dv, -i_exc / tau_exc, -i_inh / tau_inh


@jit
def rhs(y, p, clamped, dydt):
    """Right-hand side of one cell; see the module docstring. Writes dydt[0:3]."""
    dydt[S_V], dydt[S_I_EXC], dydt[S_I_INH] = _derivatives(
        y[S_V], y[S_I_EXC], y[S_I_INH], p[P_IEXT], p[P_C_M], p[P_TAU_M], p[P_E_L],
        p[P_TAU_SYN_EXC], p[P_TAU_SYN_INH], clamped)


@jit
def rhs_cols(Y, P, lo, hi, clamped, F, k):
    """Right-hand side of cells lo..hi-1 at once (structure of arrays).

    ``Y``: (n_states, >= hi - lo), column ``i - lo`` for cell ``i``; writes ``F[k]``;
    ``P``: (n_params, n_cells), column ``i``; ``clamped[i - lo]`` the clamp flag.
    """
    base = np.uint64(lo)
    for j in range(np.uint64(hi - lo)):  # unsigned indices: no negative-index wraparound,
        i = base + j                     # which would stop LLVM from vectorising the loop
        F[k, S_V, j], F[k, S_I_EXC, j], F[k, S_I_INH, j] = _derivatives(
            Y[S_V, j], Y[S_I_EXC, j], Y[S_I_INH, j], P[P_IEXT, i], P[P_C_M, i], P[P_TAU_M, i],
            P[P_E_L, i], P[P_TAU_SYN_EXC, i], P[P_TAU_SYN_INH, i], clamped[j])


@jit
def jac(y, p, clamped, J):
    """Jacobian d rhs / d y of one cell; writes J[0:3, 0:3]."""
    on = 0.0 if clamped else 1.0
    inv_c = on / p[P_C_M]
    J[0, 0] = -on / p[P_TAU_M]
    J[0, 1] = inv_c
    J[0, 2] = -inv_c
    J[1, 0] = 0.0
    J[1, 1] = -1.0 / p[P_TAU_SYN_EXC]
    J[1, 2] = 0.0
    J[2, 0] = 0.0
    J[2, 1] = 0.0
    J[2, 2] = -1.0 / p[P_TAU_SYN_INH]


@jit
def split(y, p, clamped, a, b):
    """Quasi-linear split dy_i/dt = a_i + b_i y_i with b_i = d f_i / d y_i."""
    on = 0.0 if clamped else 1.0
    tau_m = p[P_TAU_M]
    a[S_V] = on * (p[P_E_L] / tau_m + (y[S_I_EXC] - y[S_I_INH] + p[P_IEXT]) / p[P_C_M])
    b[S_V] = -on / tau_m
    a[S_I_EXC] = 0.0
    b[S_I_EXC] = -1.0 / p[P_TAU_SYN_EXC]
    a[S_I_INH] = 0.0
    b[S_I_INH] = -1.0 / p[P_TAU_SYN_INH]


@jit
def reset(y, p):
    """Spike reset: V = V_reset (the clamp itself is the driver's business)."""
    y[S_V] = p[P_VRESET]
