"""Fixed step with grid delivery: the whole run in compiled code, cells in blocks.

With grid delivery every arrival acts at a step start, so a step of one cell
is the same formula for every cell of a model: the bulk of the work is a loop
over a block ("tile") of cells in structure-of-arrays form that LLVM
vectorises (:func:`spikegauge.models.kernels.rhs_cols`). What is not the same
for every cell goes, cell by cell, to the single-cell step of
:mod:`spikegauge.integrate.fixed` (``_fixed_cell``), so both paths share one
definition of a step:

* a refractory period that ends inside the step (the step is split there);
* an interpolated crossing of a model with a reset (the step is redone from
  its start: reset at the crossing, integrate the rest of the step);
* the exponential-Euler and backward-Euler steppers (no block form).

Arrivals go into a ring of per-step, per-receptor sums: a spike at step ``m``
adds its weights to the slot of the first grid point at or after its arrival
time; at each step start a cell adds its slot's sums to its synaptic states
(one addition per receptor, not one per arrival).

Parallelism and determinism: the run advances in windows of whole steps no
longer than the smallest delay, so no spike reaches a cell inside the window
in which it was emitted. In one parallel region per window each thread first
adds the previous window's spikes (and the window's drive events) to the ring
rows of its own cells, in (step, source cell, synapse) order, then advances
its own cells over the window. Every sum is formed in the same order for any
number of threads, so results are bit-identical across thread counts.
"""
from __future__ import annotations

import math
import types

import numba
import numpy as np

from .._numba import jit, pjit
from ..models import receptor_state_table, state_bounds
from ..models.base import P_IEXT, P_TREF, P_VRESET, P_VTH, RECEPTOR_CURRENT
from ..models.kernels import N_DERIVED, derive_cols, reset, rhs_cols
from .crossing import CROSS_HERMITE, CROSS_STEP, hermite_first_crossing, linear_crossing
from .engine import (C_ARRIVALS, C_JACOBIAN, C_NEWTON, C_RHS, C_STEPS, DIV_BOUNDS, N_COUNTERS,
                     divergence)
from .fixed import MAX_RESETS_PER_STEP, _fixed_cell, _snap, grid_index, grid_indices
from .steppers import EULER, RK2, RK4

TILE = 256
"""Cells per block of the vectorised step (a block's scratch stays in the L1 cache)."""

MAX_WINDOW_SPIKE_SLOTS = 1 << 21
"""Upper bound on (cells x window steps x spikes per step) slots of one window's spike buffer."""


@jit
def _scatter(c_lo, c_hi, n_cells, n0, n_total, dt, mask,
             p_lo, p_hi, pend_step, pend_cell, pend_time,
             syn_ptr, syn_target, syn_steps, syn_delay, syn_offset, syn_weight,
             d_lo, d_hi, drv_step, drv_cell, drv_offset, drv_weight, ring):
    """Add pending spikes' and drive events' weights to the ring columns of cells c_lo..c_hi-1.

    The pending spikes are ``pend_*[p_lo:p_hi]`` (step of emission, cell, time).
    ``ring`` is (slots, planes x cells); ``syn_offset`` / ``drv_offset`` the column
    (plane x n_cells + target) of each synapse / drive event. Returns (arrivals
    added, late arrivals); a late arrival (due before step ``n0``) would mean a
    window longer than the smallest delay.
    """
    added = 0
    late = 0
    part = c_lo > 0 or c_hi < n_cells
    for k in range(p_lo, p_hi):
        src = pend_cell[k]
        st = pend_step[k]
        ts = pend_time[k]
        on_grid = ts == (st + 1) * dt
        for s in range(np.uint64(syn_ptr[src]), np.uint64(syn_ptr[src + 1])):
            if part and (syn_target[s] < c_lo or syn_target[s] >= c_hi):
                continue
            if on_grid:
                kk = st + 1 + syn_steps[s]
            else:
                kk = grid_index(ts + syn_delay[s], dt)
            if kk < n0:
                late += 1
            elif kk < n_total:
                # Unsigned indices: no negative-index wraparound test in this hot loop.
                ring[np.uint64(kk & mask), np.uint64(syn_offset[s])] += syn_weight[s]
                added += 1
    for e in range(d_lo, d_hi):
        c = drv_cell[e]
        if c >= c_lo and c < c_hi and drv_step[e] < n_total:
            ring[drv_step[e] & mask, drv_offset[e]] += drv_weight[e]
            added += 1
    return added, late


@jit
def _advance_chunk(n0, n1, t_stop, dt, mask, stepper, crossing, t_first, t_last,
                   tile_code, tile_lo, tile_hi, tile_nst, Y, P, D, refr, div_time, div_code,
                   lower, upper, scale, rstate, ring, state_plane, current_plane,
                   sp_step, sp_cell, sp_time, sp_at, cnt, X, XF, clamp, S1, J, spk1, ncount, cnt1):
    """Advance the cells of tiles t_first..t_last-1 over steps n0..n1-1.

    ``Y`` (n_states, n_cells) and ``P`` (n_params, n_cells) are the global state
    and parameters in structure-of-arrays form. ``X`` holds this thread's tile
    scratch (y0, stage input, new state), ``XF`` its stage derivatives (stage,
    state, column), ``clamp`` the per-column clamp flag; ``S1`` (13 rows), ``J``,
    ``spk1``, ``ncount`` and ``cnt1`` the scratch of the single-cell step (arrays,
    not a tuple of views: a large tuple argument costs seconds of compile time).

    Arrivals: ``ring[slot, q * n_cells + i]`` sums for ring plane ``q``;
    ``state_plane[code, s]`` is the plane that adds to state ``s`` (-1: none)
    and ``current_plane`` the one that adds to the external current (-1: none).
    Spikes go to ``sp_*[sp_at:]`` in (step, cell) order. Returns (the new
    ``sp_at``, cells that diverged).
    """
    width = Y.shape[0]
    n_par = P.shape[0]
    n_cells = Y.shape[1]
    n_div = 0
    hermite = crossing == CROSS_HERMITE
    bulk = stepper == EULER or stepper == RK2 or stepper == RK4
    n_stage = 1 if stepper == EULER else (2 if stepper == RK2 else 4)
    n_eval = n_stage + (1 if hermite else 0)
    y0 = X[0]
    ys = X[1]
    yn = X[2]
    y1 = S1[0]
    p1 = S1[1]
    lo1 = S1[2]
    up1 = S1[3]
    sc1 = S1[4]
    f0 = S1[5]
    f1 = S1[6]
    f2 = S1[7]
    f3 = S1[8]
    s_ys = S1[9]
    s_y0 = S1[10]
    f6 = S1[11]
    f7 = S1[12]
    empty_t = np.empty(0)
    empty_i = np.empty(0, dtype=np.int64)
    for n in range(n0, n1):
        t_a = n * dt
        t_b = min((n + 1) * dt, t_stop)
        h = t_b - t_a
        slot = n & mask
        for tl in range(t_first, t_last):
            code = tile_code[tl]
            # Unsigned indices: a signed one gets a negative-index wraparound test that
            # stops LLVM from vectorising the loops over the tile.
            lo = np.uint64(tile_lo[tl])
            m = np.uint64(tile_hi[tl] - tile_lo[tl])
            ns = tile_nst[tl]
            # Load the tile and add this step's arrivals: y0 is the state at the step start.
            # (Loops run over 1-D row views: with 2-D indexing LLVM vectorises them less well.)
            r_row = ring[slot]
            for s in range(ns):
                y_row = Y[s]
                y0_row = y0[s]
                q = state_plane[code, s]
                if q < 0:
                    for j in range(m):
                        y0_row[j] = y_row[lo + j]
                else:
                    at = np.uint64(q * n_cells) + lo
                    for j in range(m):
                        y0_row[j] = y_row[lo + j] + r_row[at + j]
                        r_row[at + j] = 0.0
            if current_plane >= 0:
                i_row = P[P_IEXT]
                at = np.uint64(current_plane * n_cells) + lo
                for j in range(m):
                    i_row[lo + j] += r_row[at + j]
                    r_row[at + j] = 0.0
            # Cells needing the single-cell step (not bulk-capable, or a refractory period
            # ending inside the step) or diverged earlier: counted here, met again below.
            n_single = 0
            n_dead = 0
            for j in range(m):
                r = refr[lo + j]
                clamp[j] = r >= t_b
                n_single += (r > t_a) & (r < t_b)
                n_dead += div_time[lo + j] < np.inf
            if not bulk:
                n_single = np.int64(m)
            n_bulk = np.int64(m) - n_single - n_dead
            special = n_single > 0 or n_dead > 0
            bad = False
            if n_bulk > 0:
                # Stages over the whole tile (columns of other kinds are computed and ignored).
                for k in range(n_eval):
                    if k == n_stage:                        # Hermite: f at the new state
                        src = yn
                    elif k == 0:
                        src = y0
                    else:
                        c = 0.5 * h if (stepper == RK4 and k < 3) else h
                        for s in range(ns):
                            ys_row = ys[s]
                            y0_row = y0[s]
                            f_row = XF[k - 1, s]
                            for j in range(m):
                                ys_row[j] = y0_row[j] + c * f_row[j]
                        src = ys
                    rhs_cols(code, src, P, D, tile_lo[tl], tile_hi[tl], ns, clamp, XF, k)
                    if k == n_stage - 1:
                        for s in range(ns):
                            yn_row = yn[s]
                            y0_row = y0[s]
                            f0_row = XF[0, s]
                            if stepper == EULER:
                                for j in range(m):
                                    yn_row[j] = y0_row[j] + h * f0_row[j]
                            elif stepper == RK2:
                                f1_row = XF[1, s]
                                for j in range(m):
                                    yn_row[j] = y0_row[j] + 0.5 * h * (f0_row[j] + f1_row[j])
                            else:
                                f1_row = XF[1, s]
                                f2_row = XF[2, s]
                                f3_row = XF[3, s]
                                for j in range(m):
                                    yn_row[j] = y0_row[j] + h / 6.0 * (
                                        f0_row[j] + 2.0 * f1_row[j] + 2.0 * f2_row[j] + f3_row[j])
                cnt[C_STEPS] += n_bulk
                cnt[C_RHS] += n_bulk * n_eval
                # Write back; then whole-tile tests (vectorised "any"): a state out of its
                # bounds, or a cell that may have crossed. Only then a cell-by-cell pass.
                for s in range(ns):
                    y_row = Y[s]
                    yn_row = yn[s]
                    lo_s = lower[code, s]
                    up_s = upper[code, s]
                    for j in range(m):
                        y_row[lo + j] = yn_row[j]
                    for j in range(m):  # a separate loop: with the copy it does not vectorise
                        bad |= (yn_row[j] < lo_s) | (yn_row[j] > up_s) | (yn_row[j] != yn_row[j])
                special |= bad
                v0_row = y0[0]
                vn_row = yn[0]
                vth_row = P[P_VTH]
                cross = False
                if hermite:
                    fa_row = XF[0, 0]
                    fb_row = XF[n_stage, 0]
                    reach_c = (4.0 / 27.0) * h
                    for j in range(m):
                        vth = vth_row[lo + j]
                        reach = max(v0_row[j], vn_row[j]) + reach_c * (abs(fa_row[j]) + abs(fb_row[j]))
                        cross |= (v0_row[j] < vth) & (reach >= vth)
                else:
                    for j in range(m):
                        vth = vth_row[lo + j]
                        cross |= (v0_row[j] < vth) & (vn_row[j] >= vth)
                special |= cross
            if not special:
                continue
            # Cell by cell, only in tiles where something happened.
            for jj in range(m):
                j = np.int64(jj)
                i = np.int64(lo) + j
                if div_time[i] < np.inf:
                    continue
                r = refr[i]
                redo = (not bulk) or (r > t_a and r < t_b)
                checked = False
                if not redo and r <= t_a and y0[0, j] < P[P_VTH, i]:
                    vth = P[P_VTH, i]
                    has_reset = P[P_VRESET, i] == P[P_VRESET, i]
                    th = -1.0
                    if hermite:
                        th = hermite_first_crossing(y0[0, j], yn[0, j], XF[0, 0, j],
                                                    XF[n_stage, 0, j], h, vth)
                    elif yn[0, j] >= vth:
                        th = 1.0 if crossing == CROSS_STEP else linear_crossing(y0[0, j], yn[0, j], vth)
                    if th >= 0.0:
                        if has_reset and crossing != CROSS_STEP:
                            redo = True                     # reset inside the step: redo it
                            cnt[C_STEPS] -= 1               # (the redo counts its own work)
                            cnt[C_RHS] -= n_eval
                        else:
                            ts = t_b if crossing == CROSS_STEP else t_a + th * h
                            sp_step[sp_at] = n
                            sp_cell[sp_at] = i
                            sp_time[sp_at] = ts
                            sp_at += 1
                            if has_reset:
                                for s in range(ns):
                                    y1[s] = yn[s, j]
                                for s in range(n_par):
                                    p1[s] = P[s, i]
                                reset(code, y1, p1)
                                for s in range(ns):
                                    Y[s, i] = y1[s]
                                if P[P_TREF, i] > 0.0:
                                    refr[i] = _snap(ts + P[P_TREF, i], dt)
                                checked = True
                if redo:
                    for s in range(width):
                        y1[s] = y0[s, j] if s < ns else 0.0
                        lo1[s] = lower[code, s]
                        up1[s] = upper[code, s]
                        sc1[s] = scale[i, s]
                    for s in range(n_par):
                        p1[s] = P[s, i]
                    for q in range(cnt1.size):
                        cnt1[q] = 0
                    ncount[0] = 0
                    r, nsp, tdiv, dcode = _fixed_cell(
                        code, y1, p1, refr[i], ns, n, n + 1, dt, t_stop, stepper, crossing, True,
                        empty_t, empty_i, empty_t, 0, 0, spk1, 0, spk1.shape[1], cnt1,
                        lo1, up1, sc1, rstate, f0, f1, f2, f3, s_ys, s_y0, f6, f7, J, ncount)
                    for q in range(min(nsp, spk1.shape[1])):
                        sp_step[sp_at] = n
                        sp_cell[sp_at] = i
                        sp_time[sp_at] = spk1[0, q]
                        sp_at += 1
                    for s in range(ns):
                        Y[s, i] = y1[s]
                    for q in range(cnt1.size):
                        cnt[q] += cnt1[q]
                    cnt[C_NEWTON] += ncount[0]
                    cnt[C_JACOBIAN] += ncount[0]  # full Newton: a Jacobian per iteration
                    refr[i] = r
                    if dcode != 0:
                        div_time[i] = tdiv
                        div_code[i] = dcode
                        n_div += 1
                    continue
                if bad or checked:
                    ok = True
                    for s in range(ns):
                        ok = ok & (Y[s, i] >= lower[code, s]) & (Y[s, i] <= upper[code, s])
                    if not ok:
                        div_time[i] = t_b
                        div_code[i] = DIV_BOUNDS
                        n_div += 1
    return sp_at, n_div


def _run_windows(w_edges, n_total, t_stop, dt, mask, stepper, crossing,
                 chunk_tiles, tile_code, tile_lo, tile_hi, tile_nst,
                 Y, P, D, refr, div_time, div_code, lower, upper, scale, rstate, ring,
                 state_plane, current_plane,
                 syn_ptr, syn_target, syn_steps, syn_delay, syn_offset, syn_weight,
                 drv_step, drv_cell, drv_offset, drv_weight, drv_ptr,
                 pend_n, pend_step, pend_cell, pend_time,
                 replay, rp_step, rp_cell, rp_time, rp_at,
                 buf_step, buf_cell, buf_time, chunk_cap, buf_n, late,
                 out_step, out_cell, out_time, counters,
                 X, XF, clamp, S1, SJ, spk1, ncount, cnt1):
    """Advance over the windows ``w_edges[w]..w_edges[w+1]`` (step indices), one parallel region each.

    Chunk ``c`` owns tiles ``chunk_tiles[c]..chunk_tiles[c+1]-1`` and their cells.
    Spikes of every window go to ``out_*`` (from 0) and become the pending
    spikes of the next. Open loop (``replay``), the spikes scattered at the
    start of a window are instead ``rp_*[rp_at[0]:]`` emitted in earlier steps
    (sorted by step, cell, time, as the window's own would be), and ``rp_at[0]``
    moves past them. Stops early, before a window whose spikes might not fit
    in ``out_*``, after a window in which a cell diverged, or when an arrival
    came late (``late[c] > 0``).

    Returns (windows done, spikes written to ``out_*``).
    """
    n_chunks = chunk_tiles.size - 1
    n_out = 0
    div_new = np.zeros(n_chunks, dtype=np.int64)
    for w in range(w_edges.size - 1):
        if out_step.size - n_out < n_chunks * chunk_cap:
            return w, n_out
        n0 = w_edges[w]
        n1 = w_edges[w + 1]
        if replay:
            p_lo = rp_at[0]
            p_hi = p_lo
            while p_hi < rp_step.size and rp_step[p_hi] < n0:
                p_hi += 1
            rp_at[0] = p_hi
            s_step, s_cell, s_time = rp_step, rp_cell, rp_time
        else:
            p_lo = 0
            p_hi = pend_n[0]
            s_step, s_cell, s_time = pend_step, pend_cell, pend_time
        for c in numba.prange(n_chunks):
            t_first = chunk_tiles[c]
            t_last = chunk_tiles[c + 1]
            if t_first == t_last:
                buf_n[c] = 0
                continue
            added, n_late = _scatter(tile_lo[t_first], tile_hi[t_last - 1], Y.shape[1], n0,
                                     n_total, dt, mask, p_lo, p_hi, s_step, s_cell, s_time,
                                     syn_ptr, syn_target, syn_steps, syn_delay, syn_offset,
                                     syn_weight, drv_ptr[w], drv_ptr[w + 1],
                                     drv_step, drv_cell, drv_offset, drv_weight, ring)
            counters[c, C_ARRIVALS] += added
            late[c] += n_late
            at = c * chunk_cap
            end, div_new[c] = _advance_chunk(
                n0, n1, t_stop, dt, mask, stepper, crossing, t_first, t_last,
                tile_code, tile_lo, tile_hi, tile_nst, Y, P, D, refr, div_time, div_code,
                lower, upper, scale, rstate, ring, state_plane, current_plane,
                buf_step, buf_cell, buf_time, at, counters[c], X[c], XF[c],
                clamp[c], S1[c], SJ[c], spk1[c], ncount[c], cnt1[c])
            buf_n[c] = end - at
        # Merge the chunks' spikes in (step, cell) order: chunks hold consecutive cells.
        pos = np.zeros(n_chunks, dtype=np.int64)
        m = 0
        for n in range(n0, n1):
            for c in range(n_chunks):
                base = c * chunk_cap
                while pos[c] < buf_n[c] and buf_step[base + pos[c]] == n:
                    b = base + pos[c]
                    pend_step[m] = n
                    pend_cell[m] = buf_cell[b]
                    pend_time[m] = buf_time[b]
                    out_step[n_out] = n
                    out_cell[n_out] = buf_cell[b]
                    out_time[n_out] = buf_time[b]
                    m += 1
                    n_out += 1
                    pos[c] += 1
        pend_n[0] = m
        stop = False
        for c in range(n_chunks):
            stop |= (late[c] > 0) | (div_new[c] > 0)
        if stop:
            return w + 1, n_out
    return w_edges.size - 1, n_out


def _twin(func, name):
    """``func`` as a new function object named ``name`` (its own numba cache entry)."""
    twin = types.FunctionType(func.__code__, func.__globals__, name, func.__defaults__,
                              func.__closure__)
    twin.__qualname__ = name
    return twin


_run_windows_parallel = pjit(_twin(_run_windows, "_run_windows_parallel"))
_run_windows_serial = jit(_twin(_run_windows, "_run_windows_serial"))
"""The window loop compiled twice: with parallel regions, and serial (``prange`` runs as
``range``) for runs with one chunk of cells. The parallel build costs about 15 s more to
compile, which a small network on one thread never needs."""


class GridRun:
    """Everything the compiled loop needs for one run, in the layout it wants.

    Built from a :class:`~spikegauge.integrate.engine.CellState` (state and
    parameters become structure-of-arrays copies; :meth:`write_back` returns
    them) and the network's synapses (delays as whole steps for spikes on the
    grid; receptors as ring planes). ``replay``, a
    :class:`~spikegauge.integrate.replay.ReplayRaster`, makes the run open loop.
    """

    def __init__(self, network, state, dt, stepper, crossing, t_stop, tile=TILE, replay=None):
        n = network.n_cells
        self.network = network
        self.state = state
        self.dt = float(dt)
        self.stepper = int(stepper)
        self.crossing = int(crossing)
        self.t_stop = float(t_stop)
        self.n_total = int(math.ceil(t_stop / dt - 1e-9))
        self.Y = np.ascontiguousarray(state.y.T)
        self.P = np.ascontiguousarray(state.p.T)
        width = self.Y.shape[0]
        # Tiles: runs of one model, cut into TILE cells; chunks: consecutive tiles per thread.
        change = np.flatnonzero(np.diff(state.code)) + 1
        lo, hi, code = [], [], []
        for a, b in zip(np.concatenate([[0], change]), np.concatenate([change, [n]])):
            cuts = np.arange(a, b, tile, dtype=np.int64)
            lo.append(cuts)
            hi.append(np.minimum(cuts + tile, b))
            code.append(np.full(cuts.size, state.code[a]))
        self.tile_lo = np.concatenate(lo).astype(np.int64)
        self.tile_hi = np.concatenate(hi).astype(np.int64)
        self.tile_code = np.concatenate(code).astype(np.int64)
        self.tile_nst = state.n_states[self.tile_lo].astype(np.int64)
        self.D = np.zeros((N_DERIVED, n))
        for c, a, b in zip(self.tile_code, self.tile_lo, self.tile_hi):
            derive_cols(c, self.P, a, b, self.D)
        self.rstate = receptor_state_table()
        self.lower_t, self.upper_t = state_bounds()
        # Synapses: planes for the receptors in use (network and drive).
        used = set(np.unique(network.syn_receptor).tolist())
        used |= {int(d.receptor) for d in network.poisson}
        used |= set(np.unique(network.events.receptor).tolist())
        self.plane_rec = np.array(sorted(used), dtype=np.int64)
        plane_of = np.full(3, -1, dtype=np.int64)
        plane_of[self.plane_rec] = np.arange(self.plane_rec.size)
        self.plane_of = plane_of
        # The plane that adds to each state of each model (-1: none), and to the current.
        self.state_plane = np.full((self.rstate.shape[0], width), -1, dtype=np.int64)
        for code in range(self.rstate.shape[0]):
            for rec in range(self.rstate.shape[1]):
                if plane_of[rec] >= 0:
                    self.state_plane[code, self.rstate[code, rec]] = plane_of[rec]
        self.current_plane = int(plane_of[RECEPTOR_CURRENT])
        self.syn_offset = plane_of[network.syn_receptor] * n + network.syn_target
        self.syn_steps = grid_indices(network.syn_delay_ms, self.dt)
        d_max = int(self.syn_steps.max()) if self.syn_steps.size else 0
        # Windows: whole steps, no longer than the smallest delay, spike buffer bounded.
        if math.isfinite(network.d_min_ms):
            w = max(1, int(math.floor(network.d_min_ms / self.dt + 1e-9)))
        else:
            w = max(1, int(round(100.0 / self.dt)))
        self.spikes_per_step = 1
        resets = np.isfinite(state.p[:, P_VRESET])
        if crossing != CROSS_STEP and resets.any() and (state.p[resets, P_TREF] < self.dt).any():
            self.spikes_per_step = MAX_RESETS_PER_STEP + 1
        w = max(1, min(w, MAX_WINDOW_SPIKE_SLOTS // max(1, n * self.spikes_per_step)))
        self.steps_per_window = w
        ring_len = 1 << int(math.ceil(math.log2(max(d_max + 3, w + 1))))
        self.mask = ring_len - 1
        self.ring = np.zeros((ring_len, max(1, self.plane_rec.size) * n))
        # Per-thread scratch.
        self.n_chunks = max(1, min(numba.get_num_threads(), self.tile_lo.size))
        bounds = np.linspace(0, self.tile_lo.size, self.n_chunks + 1).round().astype(np.int64)
        self.chunk_tiles = bounds
        k = self.n_chunks
        cells_per_chunk = max(int(self.tile_hi[b - 1] - self.tile_lo[a]) if b > a else 0
                              for a, b in zip(bounds[:-1], bounds[1:]))
        self.chunk_cap = max(1, cells_per_chunk * w * self.spikes_per_step)
        self.buf_step = np.empty(k * self.chunk_cap, dtype=np.int64)
        self.buf_cell = np.empty(k * self.chunk_cap, dtype=np.int64)
        self.buf_time = np.empty(k * self.chunk_cap)
        self.buf_n = np.zeros(k, dtype=np.int64)
        self.late = np.zeros(k, dtype=np.int64)
        self.pend_n = np.zeros(1, dtype=np.int64)
        self.pend_step = np.empty(k * self.chunk_cap, dtype=np.int64)
        self.pend_cell = np.empty(k * self.chunk_cap, dtype=np.int64)
        self.pend_time = np.empty(k * self.chunk_cap)
        self.counters = np.zeros((k, N_COUNTERS), dtype=np.int64)
        self.X = np.zeros((k, 3, width, tile))
        self.XF = np.zeros((k, 5, width, tile))
        self.clamp = np.zeros((k, tile), dtype=np.bool_)
        self.S1 = np.zeros((k, 13, max(width, self.P.shape[0])))  # row 1 holds a parameter column
        self.SJ = np.zeros((k, width, width))
        self.spk1 = np.zeros((k, 1, self.spikes_per_step))
        self.ncount = np.zeros((k, 1), dtype=np.int64)
        self.cnt1 = np.zeros((k, N_COUNTERS), dtype=np.int64)
        self.out_cap = 4 * k * self.chunk_cap
        # Open loop: the replayed spikes by step of emission, and the cursor of the next one.
        self.replay = replay is not None
        if self.replay:
            self.rp_step, self.rp_cell, self.rp_time = replay.by_step(self.dt)
        else:
            self.rp_step = np.empty(0, dtype=np.int64)
            self.rp_cell = np.empty(0, dtype=np.int64)
            self.rp_time = np.empty(0)
        self.rp_at = np.zeros(1, dtype=np.int64)

    def advance(self, n0, n1, drive):
        """Run steps n0..n1-1 (window edges inside); returns (cells, times, status) of the spikes.

        ``drive`` is (step, cell, receptor, weight) of the drive events acting in
        these steps, sorted by step. ``status`` is "ok", "diverged" or "late".
        """
        d_step, d_cell, d_rec, d_weight = drive
        edges = np.append(np.arange(n0, n1, self.steps_per_window, dtype=np.int64), n1)
        drv_ptr = np.searchsorted(d_step, edges, side="left").astype(np.int64)
        d_offset = self.plane_of[d_rec] * self.network.n_cells + d_cell
        cells, times = [], []
        net = self.network
        while True:
            out_step = np.empty(self.out_cap, dtype=np.int64)
            out_cell = np.empty(self.out_cap, dtype=np.int64)
            out_time = np.empty(self.out_cap)
            loop = _run_windows_parallel if self.n_chunks > 1 else _run_windows_serial
            done, n_out = loop(
                edges, self.n_total, self.t_stop, self.dt, self.mask, self.stepper, self.crossing,
                self.chunk_tiles, self.tile_code, self.tile_lo, self.tile_hi, self.tile_nst,
                self.Y, self.P, self.D, self.state.refractory_until, self.state.div_time,
                self.state.div_code, self.lower_t, self.upper_t, self.state.scale,
                self.rstate, self.ring, self.state_plane, self.current_plane,
                net.syn_ptr, net.syn_target, self.syn_steps, net.syn_delay_ms, self.syn_offset,
                net.syn_weight, d_step, d_cell, d_offset, d_weight, drv_ptr,
                self.pend_n, self.pend_step, self.pend_cell, self.pend_time,
                self.replay, self.rp_step, self.rp_cell, self.rp_time, self.rp_at,
                self.buf_step, self.buf_cell, self.buf_time, self.chunk_cap, self.buf_n, self.late,
                out_step, out_cell, out_time, self.counters,
                self.X, self.XF, self.clamp, self.S1, self.SJ, self.spk1,
                self.ncount, self.cnt1)
            cells.append(out_cell[:n_out])
            times.append(out_time[:n_out])
            if self.late.any():
                return np.concatenate(cells), np.concatenate(times), "late"
            if np.isfinite(self.state.div_time).any():
                return np.concatenate(cells), np.concatenate(times), "diverged"
            if done == edges.size - 1:
                return np.concatenate(cells), np.concatenate(times), "ok"
            edges = edges[done:]
            drv_ptr = drv_ptr[done:]

    def write_back(self):
        """Copy the structure-of-arrays state and parameters back into the CellState."""
        self.state.y[:] = self.Y.T
        self.state.p[:] = self.P.T



SEGMENTS = 50
"""A run is handed to the compiled loop in about this many pieces (progress, drive blocks)."""


def run_grid(kernel, network, t_stop_ms, state, progress=None, on_window=None, extra_edges=None,
             tile=TILE, work_limit=None, replay=None):
    """Integrate with the fixed step and grid delivery; returns a WindowLoopResult.

    ``kernel`` is the :class:`~spikegauge.integrate.fixed.FixedStepKernel` of the
    setting; ``progress``, ``on_window`` and ``extra_edges`` as in
    :func:`spikegauge.integrate.engine.run_windows` (``on_window`` is called at
    the end of every piece, and pieces end at every extra edge). ``tile``: cells
    per block (tests use small blocks to spread small networks over threads).
    ``work_limit``: as in ``run_windows``, checked at the end of every piece.
    ``replay``: a :class:`~spikegauge.integrate.replay.ReplayRaster` to replay
    as the recurrent input (open loop), or None.
    """
    import time as _time

    from ..errors import ComputationError
    from ..network.drive import DriveStream
    from .engine import COUNTER_NAMES, WindowLoopResult, past_work_limit, work_limit_message

    run = GridRun(network, state, kernel.dt, kernel.stepper, kernel.crossing, t_stop_ms, tile,
                  replay)
    n_total = run.n_total
    piece = max(run.steps_per_window, int(math.ceil(n_total / SEGMENTS)))
    cuts = set(range(0, n_total, piece)) | {n_total}
    if extra_edges is not None:
        extra = grid_indices(np.asarray(extra_edges, dtype=np.float64), run.dt)
        cuts |= {int(k) for k in extra if 0 < k < n_total}
    cuts = sorted(cuts)
    stream = DriveStream(network)
    carry = _no_drive()
    out_cells, out_times = [], []
    status, message, t_reached = "ok", "", float(t_stop_ms)
    wall = 0.0
    for n0, n1 in zip(cuts[:-1], cuts[1:]):
        t0, t1 = n0 * run.dt, min(n1 * run.dt, t_stop_ms)
        drive, carry = _drive_for(stream, carry, t0, t1, n1, run.dt)
        tic = _time.perf_counter()
        cells, times, outcome = run.advance(n0, n1, drive)
        wall += _time.perf_counter() - tic
        if outcome == "late":
            raise ComputationError("an arrival reached a cell after the step it was due in: the "
                                   "windows are longer than the smallest delay")
        if outcome == "diverged":
            keep, t_reached, message = divergence(state, times)
            out_cells.append(cells[keep])
            out_times.append(times[keep])
            status = "diverged"
            break
        out_cells.append(cells)
        out_times.append(times)
        if on_window is not None:
            run.write_back()
            on_window(t0, t1, state)
        if progress is not None:
            progress(t1)
        if past_work_limit(run.counters, work_limit) and n1 < n_total:
            status, t_reached, message = "stopped", t1, work_limit_message(t1, work_limit)
            break
    run.write_back()
    totals = run.counters.sum(axis=0)
    return WindowLoopResult(
        cell=np.concatenate(out_cells) if out_cells else np.empty(0, dtype=np.int64),
        time_ms=np.concatenate(out_times) if out_times else np.empty(0),
        counters={name: int(v) for name, v in zip(COUNTER_NAMES, totals)},
        status=status, t_reached_ms=t_reached, message=message, wall_s=wall)


def _no_drive():
    return (np.empty(0, dtype=np.int64), np.empty(0, dtype=np.int64),
            np.empty(0, dtype=np.int64), np.empty(0))


def _drive_for(stream, carry, t0, t1, n1, dt):
    """Drive events acting in steps before ``n1``, sorted by step; and those carried past it.

    Events are taken from the stream for [t0, t1); one whose grid point lies at
    or after step ``n1`` acts in a later piece.
    """
    time, cell, receptor, weight, _source = stream.take(t0, t1)
    step = grid_indices(time, dt)
    c_step, c_cell, c_rec, c_w = carry
    step = np.concatenate([c_step, step])
    cell = np.concatenate([c_cell, cell])
    receptor = np.concatenate([c_rec, receptor])
    weight = np.concatenate([c_w, weight])
    order = np.argsort(step, kind="stable")  # within a step: carried first, then (cell, time, source)
    step, cell, receptor, weight = step[order], cell[order], receptor[order], weight[order]
    now = step < n1
    return ((step[now], cell[now], receptor[now], weight[now]),
            (step[~now], cell[~now], receptor[~now], weight[~now]))
