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
from .engine import (C_ARRIVALS, C_JACOBIAN, C_NEWTON, C_RHS, C_STEPS, DIV_BOUNDS, DIV_MAX_STEPS,
                     DIV_NEWTON, N_COUNTERS)
from .steppers import STEPPER_CODES, fixed_step

SNAP_MS = 1e-9
"""A time within this distance of a grid point is taken to be on it (ms)."""

MAX_RESETS_PER_STEP = 15
"""Resets inside one step (runaway firing without a refractory period) before the cell is
declared diverged: a cell firing this often within one step is not resolved by the step at
all. Splits at arrivals are bounded by the arrivals and not counted."""


@jit
def grid_index(t, dt):
    """Index of the first grid point ``k * dt`` at or after ``t`` (within SNAP_MS counts as on it)."""
    s = t / dt
    r = np.floor(s + 0.5)
    if abs(t - r * dt) <= SNAP_MS:
        return np.int64(r)
    return np.int64(np.ceil(s))


@jit
def _grid_index_each(times, dt, out):
    for k in range(times.size):
        out[k] = grid_index(times[k], dt)


def grid_indices(time_ms: np.ndarray, dt_ms: float) -> np.ndarray:
    """:func:`grid_index` of each time; int64, the shape of ``time_ms``."""
    t = np.asarray(time_ms, dtype=np.float64)
    out = np.empty(t.size, dtype=np.int64)
    _grid_index_each(np.ascontiguousarray(t).ravel(), float(dt_ms), out)
    return out.reshape(t.shape)


def grid_time(time_ms: np.ndarray, dt_ms: float) -> np.ndarray:
    """First grid point ``n * dt`` at or after each time (snapping within SNAP_MS)."""
    return grid_indices(time_ms, dt_ms) * dt_ms


@jit
def _snap(t, dt):
    g = np.floor(t / dt + 0.5)
    if abs(t - g * dt) <= SNAP_MS:
        return g * dt
    return t


@jit
def _apply(code_row, y, p, recep, w, rstate, held):
    """Apply one arrival: a current step to ``p[P_IEXT]``, a synaptic weight to its state.

    ``held``: the cell is refractory; an arrival to the held spike state (state 0, a
    model file whose input moves it) is dropped, since the hold fixes that state.
    """
    if recep == RECEPTOR_CURRENT:
        p[P_IEXT] += w
    else:
        s = rstate[code_row, recep]
        if s != 0 or not held:
            y[s] += w


@jit
def fires_on_arrival(v_before, y, p, held):
    """Whether arrivals carried the spike state from below the threshold to it or above.

    Only an input that moves the spike state itself (a model file's voltage jump)
    can do that; the cell then fires at the arrival time.
    """
    return (not held) and v_before < p[P_VTH] <= y[0]


def inputs_move_spike_state(network) -> bool:
    """Whether some cell's inputs move its spike state itself (a model file's voltage jump).

    Such networks take the cell-by-cell path with grid delivery too: the block
    loop sums arrivals into the synaptic states without the threshold test that
    a jump of the spike state needs (:func:`fires_on_arrival`).
    """
    codes = np.unique(np.asarray(network.cell_model, dtype=np.int64))
    return bool((receptor_state_table()[codes] == 0).any())


@jit
def _fire_at_arrival(code, y, p, t, refr, has_reset, tref, dt, spk, row, nsp, cap):
    """A spike at arrival time ``t`` (see :func:`fires_on_arrival`): stored, then the reset
    and the hold as after a crossing. Returns the new end of the hold."""
    if nsp < cap:
        spk[row, nsp] = t
    if has_reset:
        reset(code, y, p)
        if tref > 0.0:
            return _snap(t + tref, dt)
    return refr


@jit
def _in_bounds(y, n, lower, upper):
    for s in range(n):
        if not (lower[s] <= y[s] <= upper[s]):  # NaN fails both comparisons
            return False
    return True


@jit
def _fixed_cell(code, y, p, refr0, n, st0, st1, dt, t_hi, stepper, crossing, grid,
                at, ar, aw, a_lo, a_hi, spk, row, cap, cnt, lower, upper, scale, rstate,
                f0, f1, f2, f3, ys, y0, f6, f7, J, ncount):
    """Advance one cell over steps st0..st1-1; no step ends after ``t_hi`` (ms).

    ``y``, ``p``, ``lower``, ``upper``, ``scale``, ``cnt`` and the stage arrays are
    the calling thread's own 1-D copies of the cell's rows; spikes go to
    ``spk[row, :cap]`` (only the first ``cap`` are stored, all are counted).

    Returns (refr, n_spikes, div_time, div_code).
    """
    a = a_lo
    nsp = 0
    refr = refr0
    vth = p[P_VTH]
    vreset = p[P_VRESET]
    has_reset = vreset == vreset
    tref = p[P_TREF]
    hermite = crossing == CROSS_HERMITE
    interpolate = crossing != CROSS_STEP
    have_f = False
    f_clamped = False
    for st in range(st0, st1):
        ta = st * dt
        tb = min((st + 1) * dt, t_hi)  # the last step of a run may end early, at its stop time
        if grid:
            v_before = y[0]
            while a < a_hi and at[a] < ta + 0.5 * dt:  # effective times sit on grid points
                _apply(code, y, p, ar[a], aw[a], rstate, ta < refr)
                cnt[C_ARRIVALS] += 1
                a += 1
                have_f = False
            if fires_on_arrival(v_before, y, p, ta < refr):
                refr = _fire_at_arrival(code, y, p, ta, refr, has_reset, tref, dt, spk, row, nsp, cap)
                nsp += 1
        t = ta
        resets = 0
        while t < tb:
            if not grid:
                v_before = y[0]
                while a < a_hi and at[a] <= t:
                    _apply(code, y, p, ar[a], aw[a], rstate, t < refr)
                    cnt[C_ARRIVALS] += 1
                    a += 1
                    have_f = False
                if fires_on_arrival(v_before, y, p, t < refr):
                    refr = _fire_at_arrival(code, y, p, t, refr, has_reset, tref, dt, spk, row, nsp, cap)
                    nsp += 1
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
            if interpolate:
                for s in range(n):
                    y0[s] = y[s]
            if hermite:
                if not have_f:
                    rhs(code, y, p, clamped, f0)
                    cnt[C_RHS] += 1
                    have_f = True
                for s in range(n):
                    f6[s] = f0[s]
            nf = fixed_step(stepper, code, y, p, clamped, h, n, f0, f1, f2, f3, ys, y0, have_f,
                            scale, J, ncount)
            have_f = False
            if nf < 0:
                return refr, nsp, t_end, DIV_NEWTON
            cnt[C_STEPS] += 1
            cnt[C_RHS] += nf
            th = -1.0
            if not clamped and v_old < vth:
                if hermite:
                    rhs(code, y, p, clamped, f7)
                    cnt[C_RHS] += 1
                    th = hermite_first_crossing(v_old, y[0], f6[0], f7[0], h, vth)
                    for s in range(n):
                        f0[s] = f7[s]
                    have_f = True
                    f_clamped = clamped
                elif y[0] >= vth:
                    th = 1.0 if crossing == CROSS_STEP else linear_crossing(v_old, y[0], vth)
            if th >= 0.0:
                ts = t_end if crossing == CROSS_STEP else t + th * h
                if nsp < cap:
                    spk[row, nsp] = ts
                nsp += 1
                if has_reset:
                    if crossing == CROSS_LINEAR:
                        for s in range(n):
                            y[s] = y0[s] + th * (y[s] - y0[s])
                    elif hermite:
                        for s in range(n):
                            y[s] = hermite_value(y0[s], y[s], f6[s], f7[s], h, th)
                    reset(code, y, p)
                    have_f = False
                    if tref > 0.0:
                        refr = _snap(ts + tref, dt)
                    if interpolate and ts < t_end:
                        resets += 1
                        if resets > MAX_RESETS_PER_STEP:
                            return refr, nsp, ts, DIV_MAX_STEPS
                        t = ts
                        continue
            for s in range(n):
                if not (lower[s] <= y[s] <= upper[s]):  # NaN fails both comparisons
                    return refr, nsp, t_end, DIV_BOUNDS
            t = t_end
    return refr, nsp, np.inf, 0


@pjit
def _fixed_window(code, Y, P, refr, div_time, div_code, lower, upper, scale, nst,
                  st0, st1, dt, t_hi, stepper, crossing, grid,
                  arr_ptr, arr_time, arr_recep, arr_weight,
                  spk_count, spk_time, counters, rstate, n_chunks, redo, only_redo):
    """Advance every live cell over steps st0..st1-1 (cells in parallel chunks).

    Each thread copies a cell's rows into its own 1-D scratch, advances the
    copy and writes it back: no thread touches another's cells, and no views
    of shared arrays are taken in the hot loop (their reference counts are
    shared between threads and cost more than a step of a LIF cell).

    A cell that emits more spikes than ``spk_time`` has columns is not written
    back: ``redo[i]`` is set to 1 and ``spk_count[i]`` to its spike count, so
    the caller can widen the buffer and rerun only those cells
    (``only_redo=True`` advances just the cells with ``redo[i] == 1``). Cells
    are independent inside a window, so the rerun gives what a rerun of the
    whole window would.
    """
    n_cells = code.size
    width = Y.shape[1]
    pwidth = P.shape[1]
    cap = spk_time.shape[1]
    for c in numba.prange(n_chunks):
        lo = c * n_cells // n_chunks
        hi = (c + 1) * n_cells // n_chunks
        y = np.empty(width)
        p = np.empty(pwidth)
        lo_b = np.empty(width)
        up_b = np.empty(width)
        sc = np.empty(width)
        f0 = np.empty(width)
        f1 = np.empty(width)
        f2 = np.empty(width)
        f3 = np.empty(width)
        ys = np.empty(width)
        y0 = np.empty(width)
        f6 = np.empty(width)
        f7 = np.empty(width)
        J = np.empty((width, width))
        ncount = np.zeros(1, dtype=np.int64)
        cnt = np.zeros(N_COUNTERS, dtype=np.int64)
        for i in range(lo, hi):
            if div_time[i] < np.inf:
                continue
            if only_redo and redo[i] != 1:
                continue
            n = nst[i]
            for s in range(width):
                y[s] = Y[i, s]
                lo_b[s] = lower[i, s]
                up_b[s] = upper[i, s]
                sc[s] = scale[i, s]
            for s in range(pwidth):
                p[s] = P[i, s]
            for j in range(N_COUNTERS):
                cnt[j] = 0
            ncount[0] = 0
            r, nsp, tdiv, dcode = _fixed_cell(
                code[i], y, p, refr[i], n, st0, st1, dt, t_hi, stepper, crossing, grid,
                arr_time, arr_recep, arr_weight, arr_ptr[i], arr_ptr[i + 1],
                spk_time, i, cap, cnt, lo_b, up_b, sc, rstate,
                f0, f1, f2, f3, ys, y0, f6, f7, J, ncount)
            spk_count[i] = nsp
            if nsp > cap:
                redo[i] = 1                  # state left at the window start
                continue
            redo[i] = 0
            for s in range(width):
                Y[i, s] = y[s]
            for s in range(pwidth):
                P[i, s] = p[s]
            for j in range(N_COUNTERS):
                counters[i, j] += cnt[j]
            counters[i, C_NEWTON] += ncount[0]
            counters[i, C_JACOBIAN] += ncount[0]  # full Newton: a Jacobian per iteration
            refr[i] = r
            if dcode != 0:
                div_time[i] = tdiv
                div_code[i] = dcode


class FixedStepKernel:
    """Window kernel of the fixed-step strategy (see :mod:`spikegauge.integrate.engine`)."""

    widens_spike_buffer = True
    """:meth:`advance` reruns only the cells that overflow the spike buffer, on a wider one."""

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
        if network.d_min_ms < dt_ms - SNAP_MS:
            # Windows are whole steps and may not be longer than the smallest delay: a spike
            # must not reach a cell inside a window that cell has already integrated.
            raise InputError(f"dt_ms: the time step may not exceed the smallest delay; the smallest "
                             f"delay is {network.d_min_ms:g} ms and dt is {dt_ms:g} ms")
        self.network = network
        self.dt = float(dt_ms)
        self.stepper = STEPPER_CODES[stepper]
        self.crossing = CROSSING_CODES[crossing]
        self.grid = delivery == "grid"
        self.rstate = receptor_state_table()
        self.n_chunks = max(1, 8 * numba.get_num_threads())
        d_min = network.d_min_ms
        if math.isfinite(d_min):
            steps_per_window = max(1, int(math.floor(d_min / self.dt + 1e-9)))
            if not self.grid and steps_per_window > 1 and steps_per_window * self.dt > d_min:
                steps_per_window -= 1  # exact delivery: never let a window outgrow d_min
        else:
            steps_per_window = max(1, int(round(100.0 / self.dt)))
        self.steps_per_window = steps_per_window

    def n_steps(self, t_stop_ms: float) -> int:
        return int(math.ceil(t_stop_ms / self.dt - 1e-9))

    def boundaries(self, t_stop_ms: float) -> np.ndarray:
        """Window edges on the grid, the last one at ``t_stop_ms`` itself (which may cut a step)."""
        n = self.n_steps(t_stop_ms)
        idx = np.arange(0, n, self.steps_per_window, dtype=np.int64)
        edges = np.append(idx, n).astype(np.float64) * self.dt
        edges[-1] = t_stop_ms
        return edges

    def effective_time(self, time_ms):
        return grid_time(time_ms, self.dt) if self.grid else time_ms

    def run(self, network, t_stop_ms, state, progress=None, on_window=None, extra_edges=None,
            work_limit=None, replay=None):
        """Integrate the whole run: grid delivery in the block loop of
        :mod:`spikegauge.integrate.fixed_block`, exact delivery window by window;
        ``replay`` (a :class:`~spikegauge.integrate.replay.ReplayRaster`) makes it open loop."""
        if self.grid and not inputs_move_spike_state(network):
            from .fixed_block import run_grid
            return run_grid(self, network, t_stop_ms, state, progress, on_window, extra_edges,
                            work_limit=work_limit, replay=replay)
        from .engine import run_windows
        return run_windows(network, self, t_stop_ms, state=state, progress=progress,
                           on_window=on_window, extra_edges=extra_edges, work_limit=work_limit,
                           replay=replay)

    def warm_up(self, network, state):
        """Compile (or load) the kernels of this setting without advancing ``state``."""
        if not self.grid or inputs_move_spike_state(network):
            return False
        from .fixed_block import GridRun, _no_drive
        GridRun(network, state, self.dt, self.stepper, self.crossing, self.dt).advance(0, 0, _no_drive())
        return True

    def advance(self, state, t0, t1, arrivals, spikes, counters):
        st0 = int(round(t0 / self.dt))
        st1 = int(math.ceil(t1 / self.dt - 1e-9))
        redo = np.zeros(state.code.size, dtype=np.int8)
        only_redo = False
        while True:
            _fixed_window(state.code, state.y, state.p, state.refractory_until, state.div_time,
                          state.div_code, state.lower, state.upper, state.scale, state.n_states,
                          st0, st1, self.dt, float(t1), self.stepper, self.crossing, self.grid,
                          arrivals.ptr, arrivals.time_ms, arrivals.receptor, arrivals.weight,
                          spikes.count, spikes.time_ms, counters, self.rstate, self.n_chunks,
                          redo, only_redo)
            if not redo.any():
                return
            # Widen the spike buffer and rerun only the cells that overflowed it.
            wider = np.empty((spikes.count.size, max(2 * spikes.capacity, int(spikes.count.max()))))
            wider[:, :spikes.capacity] = spikes.time_ms
            spikes.time_ms = wider
            only_redo = True
