"""Fixed-step driver: one global time step, runtime-chosen stepper, crossing and delivery.

Semantics (DESIGN.md):

* Step times are ``n * dt``, never a running sum; windows are whole numbers of steps.
* Delivery ``grid`` applies an arrival at the first step boundary at or after
  its arrival time (never early; within 1e-9 ms of a boundary counts as on it).
  Delivery ``exact`` ends a sub-step at each arrival inside a step; the grid
  stays ``n * dt``.
* Crossing ``step`` puts the spike at the end of the (sub-)step; ``linear`` and
  ``hermite`` interpolate it, reset the cell at the interpolated time and
  integrate it over the rest of the step.
* A refractory period ends at a continuous time (snapped to a grid point within
  1e-9 ms); the step containing its end is split there.

One compiled kernel serves every stepper, crossing and delivery (runtime codes),
so a sweep compiles once per process.
"""
from __future__ import annotations

import math

import numba
import numpy as np

from .._numba import jit, pjit
from ..errors import InputError
from ..models import receptor_state_table
from ..models.base import P_IEXT, P_TREF, P_VRESET, P_VTH, RECEPTOR_CURRENT
from ..models.kernels import reset, rhs
from .crossing import (CROSS_HERMITE, CROSS_LINEAR, CROSS_STEP, CROSSING_CODES,
                       hermite_first_crossing, hermite_value, linear_crossing)
from .engine import (C_ARRIVALS, C_NEWTON, C_RHS, C_STEPS, DIV_BOUNDS, DIV_NEWTON)
from .steppers import STEPPER_CODES, fixed_step

SNAP_MS = 1e-9
"""A time within this distance of a grid point is taken to be on it (ms)."""

MAX_SUBSTEPS = 10_000
"""Sub-steps allowed inside one step before the cell is declared diverged."""


def grid_time(time_ms: np.ndarray, dt_ms: float) -> np.ndarray:
    """First grid point ``n * dt`` at or after each time (snapping within SNAP_MS)."""
    s = np.asarray(time_ms, dtype=np.float64) / dt_ms
    r = np.round(s)
    on = np.abs(np.asarray(time_ms) - r * dt_ms) <= SNAP_MS
    return np.where(on, r, np.ceil(s)) * dt_ms


@jit
def _snap(t, dt):
    g = np.floor(t / dt + 0.5)
    if abs(t - g * dt) <= SNAP_MS:
        return g * dt
    return t


@jit
def _apply(code_row, y, p, recep, w, rstate):
    if recep == RECEPTOR_CURRENT:
        p[P_IEXT] += w
    else:
        y[rstate[code_row, recep]] += w


@jit
def _in_bounds(y, n, lower, upper):
    for s in range(n):
        if not (lower[s] <= y[s] <= upper[s]):  # NaN fails both comparisons
            return False
    return True


@jit
def _fixed_cell(code, y, p, refr0, n, st0, st1, dt, stepper, crossing, grid,
                at, ar, aw, a_lo, a_hi, spk, cnt, lower, upper, scale, rstate, k, J, ncount):
    """Advance one cell over steps st0..st1-1. Returns (refr, n_spikes, div_time, div_code)."""
    a = a_lo
    nsp = 0
    cap = spk.size
    refr = refr0
    vth = p[P_VTH]
    vreset = p[P_VRESET]
    has_reset = vreset == vreset
    tref = p[P_TREF]
    have_f = False
    f_clamped = False
    for st in range(st0, st1):
        ta = st * dt
        tb = (st + 1) * dt
        if grid:
            while a < a_hi and at[a] < tb - 0.5 * dt:  # effective times sit on grid points
                _apply(code, y, p, ar[a], aw[a], rstate)
                cnt[C_ARRIVALS] += 1
                a += 1
                have_f = False
        t = ta
        sub = 0
        while t < tb:
            sub += 1
            if sub > MAX_SUBSTEPS:
                return refr, nsp, t, DIV_BOUNDS
            if not grid:
                while a < a_hi and at[a] <= t:
                    _apply(code, y, p, ar[a], aw[a], rstate)
                    cnt[C_ARRIVALS] += 1
                    a += 1
                    have_f = False
            t_end = tb
            if not grid and a < a_hi and at[a] < t_end:
                t_end = at[a]
            clamped = t < refr
            if clamped and refr < t_end:
                t_end = refr
            if have_f and f_clamped != clamped:
                have_f = False
            h = t_end - t
            v_old = y[0]
            for s in range(n):
                k[5, s] = y[s]
            if crossing == CROSS_HERMITE and not have_f:
                rhs(code, y, p, clamped, k[0])
                cnt[C_RHS] += 1
                have_f = True
            if crossing == CROSS_HERMITE:
                for s in range(n):
                    k[6, s] = k[0, s]
            nf = fixed_step(stepper, code, y, p, clamped, h, n, k, have_f, scale, J, ncount)
            have_f = False
            if nf < 0:
                return refr, nsp, t_end, DIV_NEWTON
            cnt[C_STEPS] += 1
            cnt[C_RHS] += nf
            th = -1.0
            if not clamped and v_old < vth:
                if crossing == CROSS_HERMITE:
                    rhs(code, y, p, clamped, k[7])
                    cnt[C_RHS] += 1
                    th = hermite_first_crossing(v_old, y[0], k[6, 0], k[7, 0], h, vth)
                    for s in range(n):
                        k[0, s] = k[7, s]
                    have_f = True
                    f_clamped = clamped
                elif y[0] >= vth:
                    th = 1.0 if crossing == CROSS_STEP else linear_crossing(v_old, y[0], vth)
            if th >= 0.0:
                ts = t_end if crossing == CROSS_STEP else t + th * h
                if nsp < cap:
                    spk[nsp] = ts
                nsp += 1
                if has_reset:
                    if crossing == CROSS_LINEAR:
                        for s in range(n):
                            y[s] = k[5, s] + th * (y[s] - k[5, s])
                    elif crossing == CROSS_HERMITE:
                        for s in range(n):
                            y[s] = hermite_value(k[5, s], y[s], k[6, s], k[7, s], h, th)
                    reset(code, y, p)
                    have_f = False
                    if tref > 0.0:
                        refr = _snap(ts + tref, dt)
                    if crossing != CROSS_STEP and ts < t_end:
                        t = ts
                        continue
            if not _in_bounds(y, n, lower, upper):
                return refr, nsp, t_end, DIV_BOUNDS
            t = t_end
    return refr, nsp, np.inf, 0


@pjit
def _fixed_window(code, Y, P, refr, div_time, div_code, lower, upper, scale, nst,
                  st0, st1, dt, stepper, crossing, grid,
                  arr_ptr, arr_time, arr_recep, arr_weight,
                  spk_count, spk_time, counters, rstate, n_chunks):
    n_cells = code.size
    width = Y.shape[1]
    for c in numba.prange(n_chunks):
        lo = c * n_cells // n_chunks
        hi = (c + 1) * n_cells // n_chunks
        k = np.empty((8, width))
        J = np.empty((width, width))
        ncount = np.zeros(1, dtype=np.int64)
        for i in range(lo, hi):
            if div_time[i] < np.inf:
                continue
            ncount[0] = 0
            r, nsp, tdiv, dcode = _fixed_cell(
                code[i], Y[i], P[i], refr[i], nst[i], st0, st1, dt, stepper, crossing, grid,
                arr_time, arr_recep, arr_weight, arr_ptr[i], arr_ptr[i + 1],
                spk_time[i], counters[i], lower[i], upper[i], scale[i], rstate, k, J, ncount)
            counters[i, C_NEWTON] += ncount[0]
            refr[i] = r
            spk_count[i] = nsp
            if dcode != 0:
                div_time[i] = tdiv
                div_code[i] = dcode


class FixedStepKernel:
    """Window kernel of the fixed-step strategy (see :mod:`spikegauge.integrate.engine`)."""

    def __init__(self, network, dt_ms: float, stepper: str, crossing: str, delivery: str):
        if stepper not in STEPPER_CODES:
            raise InputError(f"stepper: unknown fixed-step stepper {stepper!r}; "
                             f"choose one of {', '.join(STEPPER_CODES)}")
        if crossing not in ("step", "linear", "hermite"):
            raise InputError(f"crossing: {crossing!r} is not available with the fixed strategy; "
                             "choose step, linear or hermite")
        if delivery not in ("grid", "exact"):
            raise InputError(f"delivery: unknown delivery {delivery!r}; choose grid or exact")
        if not (dt_ms > 0 and math.isfinite(dt_ms)):
            raise InputError(f"dt_ms: must be a positive number, got {dt_ms!r}")
        if delivery == "grid" and network.d_min_ms < dt_ms - SNAP_MS:
            raise InputError(f"dt_ms: grid delivery needs every delay >= the time step; the smallest "
                             f"delay is {network.d_min_ms:g} ms and dt is {dt_ms:g} ms")
        self.network = network
        self.dt = float(dt_ms)
        self.stepper = STEPPER_CODES[stepper]
        self.crossing = CROSSING_CODES[crossing]
        self.grid = delivery == "grid"
        self.rstate = receptor_state_table()
        self.n_chunks = max(1, 8 * numba.get_num_threads())
        d_min = network.d_min_ms
        steps_per_window = max(1, int(math.floor(d_min / self.dt + 1e-9))) if math.isfinite(d_min) \
            else max(1, int(round(100.0 / self.dt)))
        self.steps_per_window = steps_per_window

    def n_steps(self, t_stop_ms: float) -> int:
        return int(math.ceil(t_stop_ms / self.dt - 1e-9))

    def boundaries(self, t_stop_ms: float) -> np.ndarray:
        n = self.n_steps(t_stop_ms)
        idx = np.arange(0, n, self.steps_per_window, dtype=np.int64)
        return np.append(idx, n).astype(np.float64) * self.dt

    def effective_time(self, time_ms):
        return grid_time(time_ms, self.dt) if self.grid else time_ms

    def advance(self, state, t0, t1, arrivals, spikes, counters):
        st0 = int(round(t0 / self.dt))
        st1 = int(round(t1 / self.dt))
        _fixed_window(state.code, state.y, state.p, state.refractory_until, state.div_time,
                      state.div_code, state.lower, state.upper, state.scale, state.n_states,
                      st0, st1, self.dt, self.stepper, self.crossing, self.grid,
                      arrivals.ptr, arrivals.time_ms, arrivals.receptor, arrivals.weight,
                      spikes.count, spikes.time_ms, counters, self.rstate, self.n_chunks)
