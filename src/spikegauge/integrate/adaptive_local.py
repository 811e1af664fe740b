"""Local adaptive stepping: every cell its own step size and history (numba kernels).

Inside a window each cell integrates independently (DESIGN.md: every arrival
before the window end is known), so cells can run in parallel, in fixed
chunks, each writing only its own rows: the result is bit-identical for any
thread count and for a serial pass (the Python layer picks which).

A cell's step ends exactly at each of its arrival times (arrivals at the same
time are applied together, in the order the window hands them over), at the
end of its refractory clamp and at the window end; the step size it would
have taken is kept for the step after. A threshold crossing is located on the
accepted step's dense output (:mod:`spikegauge.integrate.dense`); a model
with a reset is reset at the crossing time and continues from there, one
without (Hodgkin-Huxley) just records the spike.

The multistep ``bdf`` (:mod:`spikegauge.integrate.bdf`) keeps its history
across steps and windows (per-cell arrays) and restarts it at order 1 after
every event that changes the cell's state or right-hand side: an arrival, a
reset, the start or end of a refractory clamp (``BF[B_ORDER] = 0`` marks it,
so an event at a window end restarts the next window). A window end only cuts
the step.
"""
import numba
import numpy as np

from .._numba import inline_jit, jit, pjit
from ..models.base import P_TREF, P_VRESET, P_VTH
from ..models.kernels import jac, reset, rhs
from .adaptive_steppers import (DENSE_DEGREE, F1_ROW, JACOBIANS_PER_TRIAL, N_ROWS, ROW_DENSE,
                                ROW_ERR, ROW_Y1, dense_coefficients, dense_state, finish_step,
                                trial_step)
from .bdf import (B_JAC, B_ORDER, bdf_dense_coefficients, bdf_dense_state, bdf_needs_start,
                  bdf_rejected_step, bdf_select, bdf_set_step, bdf_start, bdf_trial,
                  bdf_update_differences, newton_tolerance)
from .dense import upward_crossings
from .engine import (C_ARRIVALS, C_JACOBIAN, C_NEWTON, C_REJECTED, C_RHS, C_STEPS, DIV_BOUNDS,
                     DIV_MAX_STEPS, DIV_MIN_STEP, DIV_NEWTON)
from .fixed import _apply, _in_bounds, fires_on_arrival
from .step_control import (error_norm, initial_step, next_step_accepted, next_step_rejected,
                           step_to_end)
from .tableaux import BDF


@inline_jit
def record_step(slot, t, h, accepted, order, tr_time, tr_h, tr_acc, tr_ord, tr_count):
    """Append (t, h, accepted, order) to trace row ``slot`` (no-op for slot < 0); counts past
    capacity."""
    if slot < 0:
        return
    k = tr_count[slot]
    if k < tr_time.shape[1]:
        tr_time[slot, k] = t
        tr_h[slot, k] = h
        tr_acc[slot, k] = accepted
        tr_ord[slot, k] = order
    tr_count[slot] = k + 1


@jit
def spike_time(t, th, h, t_new):
    """Crossing time from its theta, never past the step end (rounding)."""
    if th >= 1.0:
        return t_new
    return min(t + th * h, t_new)


@jit
def _local_cell(method, code, y, p, refr0, h_start, err_prev0, n, t0, t1, rtol, atol, scale, pzero,
                lower, upper, at, ar, aw, a_lo, a_hi, spk, cnt, rstate, K, M, piv, J, work,
                D, BF, slot, tr_time, tr_h, tr_acc, tr_ord, tr_count, h_min, h_max, max_steps,
                order, expo):
    """Advance one cell from t0 to t1.

    ``D`` (D_ROWS, width), ``J`` (width, width) and ``BF`` (N_BDF,) are the
    cell's own ``bdf`` history, Jacobian and record (unused by the one-step
    methods, whose ``J`` is scratch).

    Returns (refractory_until, n_spikes, next_step, err_prev, div_time, div_code).
    ``h_start`` <= 0 asks for an initial step estimate.
    """
    t = t0
    a = a_lo
    nsp = 0
    cap = spk.size
    refr = refr0
    vth = p[P_VTH]
    has_reset = p[P_VRESET] == p[P_VRESET]
    tref = p[P_TREF]
    h_prop = h_start
    err_prev = err_prev0
    have_f = False
    f_clamped = False
    after_reject = False
    deg = DENSE_DEGREE[method]
    f1row = F1_ROW[method]
    njac = JACOBIANS_PER_TRIAL[method]
    bdf = method == BDF
    lu_c = np.nan               # bdf: h / alpha_k that M is factored for
    ntol = newton_tolerance(rtol)
    n_iter = 0
    c = np.empty(6)
    cross = np.empty(4)
    while True:
        v_before = y[0]
        while a < a_hi and at[a] <= t:
            _apply(code, y, p, ar[a], aw[a], rstate, t < refr)
            cnt[C_ARRIVALS] += 1
            a += 1
            have_f = False
            if bdf:
                BF[B_ORDER] = 0.0   # restart the history
        if fires_on_arrival(v_before, y, p, t < refr):  # a jump of the spike state past threshold
            if nsp < cap:
                spk[nsp] = t
            nsp += 1
            if has_reset:
                reset(code, y, p)
                if tref > 0.0:
                    refr = t + tref
        if t >= t1:
            break
        clamped = t < refr
        t_end = t1
        if a < a_hi and at[a] < t_end:
            t_end = at[a]
        if clamped and refr < t_end:
            t_end = refr
        if bdf:
            if bdf_needs_start(BF, clamped):
                rhs(code, y, p, clamped, K[0])
                cnt[C_RHS] += 1
                if BF[B_JAC] == 0.0:
                    jac(code, y, p, clamped, J)
                    cnt[C_JACOBIAN] += 1
                    BF[B_JAC] = 1.0
                h_prop, nfi = initial_step(code, y, p, clamped, K[0], n, 1, rtol, atol, scale,
                                           pzero, h_max, work)
                cnt[C_RHS] += nfi
                bdf_start(y, K[0], h_prop, n, D, BF, clamped)
        else:
            if have_f and f_clamped != clamped:
                have_f = False
            if not have_f:
                rhs(code, y, p, clamped, K[0])
                cnt[C_RHS] += 1
                have_f = True
                f_clamped = clamped
            if h_prop <= 0.0:
                h_prop, nfi = initial_step(code, y, p, clamped, K[0], n, order, rtol, atol, scale,
                                           pzero, h_max, work)
                cnt[C_RHS] += nfi
        # trial steps until one is accepted
        while True:
            if cnt[C_STEPS] + cnt[C_REJECTED] >= max_steps:
                return refr, nsp, h_prop, err_prev, t, DIV_MAX_STEPS
            h, t_new, cut = step_to_end(t, h_prop, h_max, t_end)
            newton_failed = False
            if bdf:
                bdf_set_step(D, BF, h, n)
                ok, n_iter, err, lu_c = bdf_trial(code, y, p, clamped, n, D, BF, J, M, piv, lu_c,
                                                  rtol, atol, scale, pzero, ntol, K, cnt)
                newton_failed = not ok
            else:
                nf, nls = trial_step(method, code, y, p, clamped, h, n, K, M, piv, J)
                cnt[C_JACOBIAN] += njac
                if nf < 0:
                    err = np.inf
                else:
                    cnt[C_RHS] += nf
                    cnt[C_NEWTON] += nls
                    err = error_norm(y, K[ROW_Y1], K[ROW_ERR], n, rtol, atol, scale, pzero)
                    if not (err <= np.inf):  # NaN: treat as a failed step
                        err = np.inf
            if err <= 1.0:
                break
            cnt[C_REJECTED] += 1
            if bdf:
                record_step(slot, t, h, False, BF[B_ORDER], tr_time, tr_h, tr_acc, tr_ord, tr_count)
                h_prop = bdf_rejected_step(h, err, n_iter, BF[B_ORDER], newton_failed)
            else:
                record_step(slot, t, h, False, order, tr_time, tr_h, tr_acc, tr_ord, tr_count)
                h_prop = next_step_rejected(h, err, expo)
            after_reject = True
            if not h_prop >= h_min:  # also stops a NaN step size
                return refr, nsp, h_prop, err_prev, t, DIV_NEWTON if newton_failed else DIV_MIN_STEP
        step_order = order
        if bdf:
            step_order = np.int64(BF[B_ORDER])
            deg = step_order
            bdf_update_differences(D, BF, K, n)
        else:
            h_new, err_prev = next_step_accepted(h, err, err_prev, expo, after_reject)
            if cut and h_new >= h:
                # the step was shortened by an event, not by its error: keep the longer proposal
                h_new = max(h_new, h_prop)
            h_prop = h_new
            cnt[C_RHS] += finish_step(method, code, p, clamped, n, K)
        after_reject = False
        cnt[C_STEPS] += 1
        th_reset = 2.0
        if not clamped:
            if bdf:
                bdf_dense_coefficients(D, step_order, 0, c)
            else:
                dense_coefficients(method, y, K, h, 0, c)
            ncr = upward_crossings(c, deg, vth, 1.0, cross)
            if has_reset and ncr > 1:
                ncr = 1
            for k in range(ncr):
                if nsp < cap:
                    spk[nsp] = spike_time(t, cross[k], h, t_new)
                nsp += 1
            if has_reset and ncr > 0:
                th_reset = cross[0]
        if th_reset <= 1.0:
            ts = spike_time(t, th_reset, h, t_new)
            if bdf:
                bdf_dense_state(D, step_order, n, th_reset, K[ROW_DENSE])
            else:
                dense_state(method, y, K, h, n, th_reset, K[ROW_DENSE])
            for q in range(n):
                y[q] = K[ROW_DENSE, q]
            reset(code, y, p)
            if tref > 0.0:
                refr = ts + tref
            have_f = False
            if bdf:
                BF[B_ORDER] = 0.0   # restart the history
            record_step(slot, t, ts - t, True, step_order, tr_time, tr_h, tr_acc, tr_ord, tr_count)
            t = ts
        else:
            if bdf:
                for q in range(n):
                    y[q] = D[0, q]
                h_sel = bdf_select(D, BF, err, n_iter, y, K[ROW_Y1], n, rtol, atol, scale, pzero)
                if not cut:
                    h_prop = h_sel   # cut by an event or the window end: keep the longer proposal
            else:
                for q in range(n):
                    y[q] = K[ROW_Y1, q]
                    K[0, q] = K[f1row, q]
                f_clamped = clamped
            record_step(slot, t, h, True, step_order, tr_time, tr_h, tr_acc, tr_ord, tr_count)
            t = t_new
        if not _in_bounds(y, n, lower, upper):
            return refr, nsp, h_prop, err_prev, t, DIV_BOUNDS
    return refr, nsp, h_prop, err_prev, np.inf, 0


@jit
def local_chunk(lo, hi, method, code, Y, P, refr, div_time, div_code, h_cell, err_cell, lower, upper,
                scale, pzero, nst, t0, t1, rtol, atol, arr_ptr, arr_time, arr_recep, arr_weight,
                spk_count, spk_time, counters, rstate, BD, BJ, BF, tr_slot, tr_time, tr_h, tr_acc,
                tr_ord, tr_count, h_min, h_max, max_steps, order, expo):
    """Advance cells lo..hi-1 from t0 to t1, one after the other.

    Per-cell arrays are (n_cells, ...) as in :class:`~spikegauge.integrate.engine.CellState`;
    ``h_cell``, ``err_cell`` (n_cells,) carry each cell's step size and PI memory
    across windows; ``BD`` (n_cells, D_ROWS, width), ``BJ`` (n_cells, width,
    width) and ``BF`` (n_cells, N_BDF) each cell's ``bdf`` history, Jacobian and
    record (for the other steppers ``BD`` and ``BJ`` may be (n_cells, 0, 0));
    ``tr_slot[i]`` is cell i's trace row or -1.
    """
    width = Y.shape[1]
    K = np.empty((N_ROWS, width))
    M = np.empty((width, width))
    Jw = np.empty((width, width))
    piv = np.empty(width, dtype=np.int64)
    work = np.empty((2, width))
    bdf = method == BDF
    for i in range(lo, hi):
        if div_time[i] < np.inf:
            continue
        J = BJ[i] if bdf else Jw
        r, nsp, hn, en, tdiv, dcode = _local_cell(
            method, code[i], Y[i], P[i], refr[i], h_cell[i], err_cell[i], nst[i], t0, t1,
            rtol, atol, scale[i], pzero[i], lower[i], upper[i],
            arr_time, arr_recep, arr_weight, arr_ptr[i], arr_ptr[i + 1],
            spk_time[i], counters[i], rstate, K, M, piv, J, work, BD[i], BF[i],
            tr_slot[i], tr_time, tr_h, tr_acc, tr_ord, tr_count, h_min, h_max, max_steps, order,
            expo)
        refr[i] = r
        spk_count[i] = nsp
        h_cell[i] = hn
        err_cell[i] = en
        if dcode != 0:
            div_time[i] = tdiv
            div_code[i] = dcode


@pjit
def local_window_parallel(n_chunks, method, code, Y, P, refr, div_time, div_code, h_cell, err_cell,
                          lower, upper, scale, pzero, nst, t0, t1, rtol, atol, arr_ptr, arr_time,
                          arr_recep, arr_weight, spk_count, spk_time, counters, rstate, BD, BJ, BF,
                          tr_slot, tr_time, tr_h, tr_acc, tr_ord, tr_count, h_min, h_max,
                          max_steps, order, expo):
    """:func:`local_chunk` over ``n_chunks`` fixed chunks of cells, in parallel.

    Each chunk writes only its own cells' rows (and trace rows), so the
    result is the same bits as one serial pass for any chunking or thread count.
    """
    n_cells = code.size
    for ch in numba.prange(n_chunks):
        local_chunk(ch * n_cells // n_chunks, (ch + 1) * n_cells // n_chunks, method, code, Y, P,
                    refr, div_time, div_code, h_cell, err_cell, lower, upper, scale, pzero, nst,
                    t0, t1, rtol, atol, arr_ptr, arr_time, arr_recep, arr_weight, spk_count,
                    spk_time, counters, rstate, BD, BJ, BF, tr_slot, tr_time, tr_h, tr_acc, tr_ord,
                    tr_count, h_min, h_max, max_steps, order, expo)
