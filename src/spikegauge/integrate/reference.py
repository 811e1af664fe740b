"""Exact event-driven reference for networks of current-based LIF cells.

Between two events (an arrival, a change of external current, the end of a
refractory period, a window edge) a ``lif-current`` cell is a linear system
with constant coefficients::

    dV/dt     = (E_L - V) / tau_m + (I_exc - I_inh + I_ext) / C
    dI_exc/dt = -I_exc / tau_exc,   dI_inh/dt = -I_inh / tau_inh

so its state after ``s`` ms is a closed form (the exact propagator of Rotter &
Diesmann 1999, Biol Cybern 81:381-402)::

    I_x(s) = I_x(0) e^{-s/tau_x}
    V(s)   = E_L + (V(0) - E_L) e^{-s/tau_m} + (I_ext/C) tau_m (1 - e^{-s/tau_m})
             + (I_exc(0)/C) P(s; tau_m, tau_exc) - (I_inh(0)/C) P(s; tau_m, tau_inh)

with ``P(s; tau_m, tau_x) = (e^{-s/tau_x} - e^{-s/tau_m}) / (1/tau_m - 1/tau_x)``.
:func:`_syn_kernel` evaluates ``P`` as ``s e^{-s/tau_slow} phi1(-|1/tau_m - 1/tau_x| s)``
(``phi1(z) = (e^z - 1)/z``), which is exact for every pair of time constants
and turns continuously into the limit ``s e^{-s/tau_m}`` when tau_x == tau_m,
without the cancellation the difference quotient suffers near that limit.

Threshold crossings are roots of the closed-form voltage. V is a sum of
exponentials, so it has few extrema, and they can be located exactly:
``w(s) = e^{s/tau_m} V'(s)`` has derivative
``e^{s/tau_m} (-I_exc(s)/tau_exc + I_inh(s)/tau_inh) / C``, a sum of two
exponentials with at most one zero, which has a closed form. So ``w`` (and
with it the sign of V') is monotone on at most two pieces, V' has at most one
zero in each, and V is monotone between the (at most two) zeros of V'. The
first monotone piece of V that starts below threshold and ends at or above it
holds the first upward crossing, which a safeguarded Newton iteration then
locates to about 1e-14 relative precision in time. A crossing followed by a
recrossing between two events is therefore never missed. A cheap comparison
bound (V is below the solution driven by the largest current the interval can
hold) skips this analysis on intervals that cannot reach threshold.

At a spike the cell's currents are propagated exactly to the spike time, V is
set to V_reset and held there until ``t_spike + t_ref`` (a continuous time,
not snapped to any grid); arrivals during the clamp still increment the
currents, which keep decaying exactly.

Cost counters: ``steps`` counts closed-form propagations (one per interval
between consecutive events of a cell, including the piece up to a spike);
``rhs_evals`` stays 0, because no right-hand side is integrated (the root
finding evaluates closed forms; those evaluations are not counted);
``arrivals`` counts applied arrivals.
"""
from __future__ import annotations

import math

import numba
import numpy as np

from .._numba import jit, pjit
from ..errors import InputError
from ..models.base import (P_IEXT, P_TREF, P_VRESET, P_VTH, RECEPTOR_CURRENT,
                           RECEPTOR_EXC)
from ..models.lif_current import (CODE as LIF_CURRENT_CODE, P_C_M, P_E_L, P_TAU_M,
                                  P_TAU_SYN_EXC, P_TAU_SYN_INH, S_I_EXC, S_I_INH, S_V)
from ..models.lif_current import SPEC as LIF_CURRENT_SPEC
from .engine import C_ARRIVALS, C_STEPS, DIV_BOUNDS, default_boundaries

ROOT_RTOL = 1e-14
"""Relative precision (of the absolute time) at which root finding stops."""

ROOT_MAX_ITERS = 200
"""Newton/bisection iterations allowed per root; bisection alone needs < 110."""

# Root-finding targets of :func:`_root`.
_F_VOLTAGE = 0   # V(s) - V_th, derivative V'(s)
_F_SLOPE = 1     # V'(s), derivative V''(s)


@jit
def _phi1(z):
    """(e^z - 1) / z, continuous at z = 0; expm1 keeps it accurate for small |z|."""
    if z == 0.0:
        return 1.0
    return math.expm1(z) / z


@jit
def _syn_kernel(s, tau_m, tau_x):
    """Voltage response integral P(s) = int_0^s e^{-(s-r)/tau_m} e^{-r/tau_x} dr (ms).

    Written with the slower decay factored out, so the remaining factor is
    phi1 of a non-positive argument: no overflow for long intervals, no
    cancellation as tau_x approaches tau_m, and the exact limit at equality.
    """
    a = 1.0 / tau_m
    b = 1.0 / tau_x
    if a <= b:
        return s * math.exp(-a * s) * _phi1((a - b) * s)
    return s * math.exp(-b * s) * _phi1((b - a) * s)


@jit
def _voltage(s, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i):
    """Closed-form voltage s ms after the interval start (mV)."""
    decay = math.exp(-s / tau_m)
    return (e_l + (v0 - e_l) * decay - (iext / c_m) * tau_m * math.expm1(-s / tau_m)
            + (ie0 / c_m) * _syn_kernel(s, tau_m, tau_e)
            - (ii0 / c_m) * _syn_kernel(s, tau_m, tau_i))


@jit
def _eval(target, s, level, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i):
    """Value and derivative of a root-finding target at s: see _F_VOLTAGE, _F_SLOPE."""
    v = _voltage(s, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i)
    ie = ie0 * math.exp(-s / tau_e)
    ii = ii0 * math.exp(-s / tau_i)
    dv = (e_l - v) / tau_m + (ie - ii + iext) / c_m
    if target == _F_VOLTAGE:
        return v - level, dv
    d2v = -dv / tau_m + (-ie / tau_e + ii / tau_i) / c_m
    return dv, d2v


@jit
def _root(target, lo, hi, tol, level, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i):
    """Root of a target on [lo, hi], where it changes sign (safeguarded Newton).

    The bracket shrinks at every evaluation; a Newton step that leaves it is
    replaced by bisection. Stops when the Newton correction or the bracket is
    below ``tol`` (ms); after a small Newton correction the remaining error is
    of order tol squared, so the result is accurate to rounding.
    """
    g_lo, _ = _eval(target, lo, level, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i)
    neg_lo = g_lo < 0.0
    x = 0.5 * (lo + hi)
    for _ in range(ROOT_MAX_ITERS):
        g, dg = _eval(target, x, level, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i)
        if g == 0.0:
            return x
        if (g < 0.0) == neg_lo:
            lo = x
        else:
            hi = x
        xn = x - g / dg if dg != 0.0 else 0.5 * (lo + hi)
        if not (lo < xn < hi):
            xn = 0.5 * (lo + hi)
        if abs(xn - x) <= tol or hi - lo <= tol:
            return xn
        x = xn
    return x


@jit
def _may_reach(level, h, v0, ie0, ii0, iext, e_l, c_m, tau_m):
    """False when V provably stays below ``level`` on [0, h].

    Comparison bound: I_exc(s) - I_inh(s) <= max(I_exc(0), 0) + max(-I_inh(0), 0)
    for decaying currents, so V(s) is at most the solution with that constant
    current, which moves monotonically from v0 towards its asymptote.
    """
    j_max = iext + max(ie0, 0.0) + max(-ii0, 0.0)
    v_asym = e_l + tau_m * j_max / c_m
    v_end = v_asym + (v0 - v_asym) * math.exp(-h / tau_m)
    return max(v0, v_end) >= level


@jit
def _first_crossing(h, t_abs, level, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i):
    """First upward crossing of ``level`` by V in (0, h] (ms after the start), or -1."""
    if not _may_reach(level, h, v0, ie0, ii0, iext, e_l, c_m, tau_m):
        return -1.0
    tol = ROOT_RTOL * max(abs(t_abs) + h, 1.0)
    # Split [0, h] where w = e^{s/tau_m} V' may change monotonicity: the zero of
    # c1 e^{-s/tau_e} + c2 e^{-s/tau_i} (at most one, when the signs differ).
    # Scalars rather than small arrays: this runs per interval, so no allocation.
    c1 = -ie0 / (tau_e * c_m)
    c2 = ii0 / (tau_i * c_m)
    s_star = h
    if c1 * c2 < 0.0 and tau_e != tau_i:
        s_star = min(max(math.log(-c2 / c1) / (1.0 / tau_i - 1.0 / tau_e), 0.0), h)
    # Zeros of V' (extrema of V, -1 when absent): at most one on [0, s_star] and
    # one on [s_star, h], where w is monotone.
    d_0, _ = _eval(_F_SLOPE, 0.0, level, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i)
    d_star, _ = _eval(_F_SLOPE, s_star, level, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i)
    d_h, _ = _eval(_F_SLOPE, h, level, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i)
    x1 = -1.0
    x2 = -1.0
    if d_0 * d_star < 0.0:
        x1 = _root(_F_SLOPE, 0.0, s_star, tol, level, v0, ie0, ii0, iext, e_l, c_m,
                   tau_m, tau_e, tau_i)
    elif d_star == 0.0 and 0.0 < s_star < h:
        x1 = s_star  # an extremum exactly on the split point
    if d_star * d_h < 0.0:
        x2 = _root(_F_SLOPE, s_star, h, tol, level, v0, ie0, ii0, iext, e_l, c_m,
                   tau_m, tau_e, tau_i)
    # V is monotone between 0, the extrema and h: the first piece that starts
    # below the level and ends at or above it holds the first upward crossing.
    a = 0.0
    g_a = v0 - level
    for k in range(3):
        b = x1 if k == 0 else (x2 if k == 1 else h)
        if b <= a:
            continue
        g_b = _voltage(b, v0, ie0, ii0, iext, e_l, c_m, tau_m, tau_e, tau_i) - level
        if g_a < 0.0 and g_b >= 0.0:
            if g_b == 0.0:
                return b
            return _root(_F_VOLTAGE, a, b, tol, level, v0, ie0, ii0, iext,
                         e_l, c_m, tau_m, tau_e, tau_i)
        a = b
        g_a = g_b
    return -1.0


@jit
def _propagate(y, p, s, clamped):
    """Advance one cell's state exactly by s ms (V held while clamped)."""
    if not clamped:
        y[S_V] = _voltage(s, y[S_V], y[S_I_EXC], y[S_I_INH], p[P_IEXT], p[P_E_L], p[P_C_M],
                          p[P_TAU_M], p[P_TAU_SYN_EXC], p[P_TAU_SYN_INH])
    y[S_I_EXC] *= math.exp(-s / p[P_TAU_SYN_EXC])
    y[S_I_INH] *= math.exp(-s / p[P_TAU_SYN_INH])


@jit
def _in_bounds(y, lower, upper):
    for s in range(3):
        if not (lower[s] <= y[s] <= upper[s]):  # NaN fails both comparisons
            return False
    return True


@jit
def _exact_cell(y, p, refr0, t0, t1, at, ar, aw, a_lo, a_hi, spk, cnt, lower, upper):
    """Advance one lif-current cell from t0 to t1 exactly.

    Returns (refractory_until, n_spikes, div_time); spikes go to ``spk`` while
    it has room (the count tells the caller it overflowed).
    """
    a = a_lo
    nsp = 0
    cap = spk.size
    refr = refr0
    vth = p[P_VTH]
    t = t0
    while t < t1:
        while a < a_hi and at[a] <= t:
            if ar[a] == RECEPTOR_CURRENT:
                p[P_IEXT] += aw[a]
            elif ar[a] == RECEPTOR_EXC:
                y[S_I_EXC] += aw[a]
            else:
                y[S_I_INH] += aw[a]
            cnt[C_ARRIVALS] += 1
            a += 1
        t_next = t1
        if a < a_hi and at[a] < t_next:
            t_next = at[a]
        clamped = t < refr
        if clamped and refr < t_next:
            t_next = refr
        h = t_next - t
        if not clamped:
            s = _first_crossing(h, t, vth, y[S_V], y[S_I_EXC], y[S_I_INH], p[P_IEXT],
                                p[P_E_L], p[P_C_M], p[P_TAU_M], p[P_TAU_SYN_EXC],
                                p[P_TAU_SYN_INH])
            if s >= 0.0:
                ts = t + s
                _propagate(y, p, s, False)
                cnt[C_STEPS] += 1
                if nsp < cap:
                    spk[nsp] = ts
                nsp += 1
                y[S_V] = p[P_VRESET]
                refr = ts + p[P_TREF]
                t = ts
                continue
        _propagate(y, p, h, clamped)
        cnt[C_STEPS] += 1
        if not _in_bounds(y, lower, upper):
            return refr, nsp, t_next
        t = t_next
    return refr, nsp, np.inf


@pjit
def _exact_window(Y, P, refr, div_time, div_code, lower, upper, t0, t1,
                  arr_ptr, arr_time, arr_recep, arr_weight, spk_count, spk_time, counters,
                  n_chunks):
    n_cells = Y.shape[0]
    for c in numba.prange(n_chunks):
        lo = c * n_cells // n_chunks
        hi = (c + 1) * n_cells // n_chunks
        for i in range(lo, hi):
            if div_time[i] < np.inf:
                continue
            r, nsp, tdiv = _exact_cell(Y[i], P[i], refr[i], t0, t1, arr_time, arr_recep,
                                       arr_weight, arr_ptr[i], arr_ptr[i + 1], spk_time[i],
                                       counters[i], lower[i], upper[i])
            refr[i] = r
            spk_count[i] = nsp
            if tdiv < np.inf:
                div_time[i] = tdiv
                div_code[i] = DIV_BOUNDS


class ExactLifKernel:
    """Window kernel of the exact reference (see :mod:`spikegauge.integrate.engine`).

    Parameters
    ----------
    network : Network
        Every cell must be ``lif-current``.

    Raises
    ------
    InputError
        When a group uses another model.
    """

    def __init__(self, network):
        for name, model in zip(network.group_names, network.group_model):
            if model != LIF_CURRENT_SPEC.name:
                raise InputError(
                    f"groups.{name}.model: the exact reference needs every group to be "
                    f"{LIF_CURRENT_SPEC.name!r}; group {name!r} is {model!r}")
        if np.any(np.asarray(network.cell_model) != LIF_CURRENT_CODE):
            raise InputError("the exact reference needs every cell to be "
                             f"{LIF_CURRENT_SPEC.name!r}")
        self.network = network
        self.n_chunks = max(1, 8 * numba.get_num_threads())

    def boundaries(self, t_stop_ms: float) -> np.ndarray:
        return default_boundaries(self.network.d_min_ms, t_stop_ms)

    def effective_time(self, time_ms):
        return time_ms

    def advance(self, state, t0, t1, arrivals, spikes, counters):
        _exact_window(state.y, state.p, state.refractory_until, state.div_time, state.div_code,
                      state.lower, state.upper, float(t0), float(t1),
                      arrivals.ptr, arrivals.time_ms, arrivals.receptor, arrivals.weight,
                      spikes.count, spikes.time_ms, counters, self.n_chunks)
