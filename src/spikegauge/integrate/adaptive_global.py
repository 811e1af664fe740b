"""Global adaptive stepping: one step size for the whole network (numba kernel).

Every cell takes the same steps. The error norm of a trial step is the
maximum over cells of the per-cell norms (so a tolerance means the same
per-cell accuracy as in local adaptive stepping), and a step ends for every
cell at every arrival, refractory end and reset crossing anywhere in the
network. A reset crossing is found after the trial step on each cell's dense
output; the earliest one shortens the accepted step for everyone: every cell
takes its dense-output state at that time (rather than a re-integrated one:
the step was accepted for the longer length, and the dense output is what
local stepping uses at a crossing too, so a single cell gets identical steps
under both strategies), the crossing cell is reset, and the network carries on
from there. Crossings of cells without a reset end nothing.

With the multistep ``bdf`` the network is one BDF system: one step size and
one order for all cells (each cell keeps its own differences, Jacobian and
LU factors, all rescaled alike), the error and the order-selection estimates
the maximum over cells, and every event anywhere (an arrival, a reset, a
refractory start or end) restarts every cell at order 1, as a single solver
for the network's equations must (Lytton & Hines 2005, Neural Comput 17:903).

The kernel is serial: cells are synchronised at every step, and a step ends
at every arrival anywhere, so a busy network takes a few microseconds of work
per cell and step between synchronisations. Parallel regions per step (one
per phase) were tried and cost far more than they saved: bench-hh's first
4 ms took 389 s with them on the 2-core shared machine (7262 network steps,
53 ms each) against seconds serially. Reductions (maximum norm, earliest
crossing, next event) run in cell order, so the result does not depend on
the thread count either.
"""
import numpy as np

from .._numba import jit
from ..models.base import P_TREF, P_VRESET, P_VTH
from ..models.kernels import jac, reset, rhs
from .adaptive_local import record_step, spike_time
from .bdf import (B_H, B_JAC, B_ORDER, B_EQUAL, bdf_apply_selection, bdf_dense_coefficients,
                  bdf_dense_state, bdf_needs_start, bdf_order_norms, bdf_rejected_step,
                  bdf_set_step, bdf_start, bdf_trial, bdf_update_differences, newton_tolerance)
from .adaptive_steppers import (DENSE_DEGREE, F1_ROW, JACOBIANS_PER_TRIAL, ROW_DENSE, ROW_ERR, ROW_Y1,
                                dense_coefficients, dense_state, finish_step, trial_step)
from .dense import upward_crossings
from .engine import (C_ARRIVALS, C_JACOBIAN, C_NEWTON, C_REJECTED, C_RHS, C_STEPS, DIV_BOUNDS,
                     DIV_MAX_STEPS, DIV_MIN_STEP, DIV_NEWTON)
from .fixed import _apply, _in_bounds, fires_on_arrival
from .step_control import (error_norm, initial_step, next_step_accepted, next_step_rejected,
                           step_to_end)
from .tableaux import BDF


@jit
def _window_start(P, spk_count):
    """Reset flags per cell (a reset voltage that is not NaN) and spike counts zeroed for the window."""
    has_reset = np.empty(spk_count.size, dtype=np.bool_)
    for i in range(spk_count.size):
        has_reset[i] = P[i, P_VRESET] == P[i, P_VRESET]
        spk_count[i] = 0
    return has_reset


@jit
def _next_event(t, t1, aidx, arr_ptr, arr_time, refr):
    """End of the step from ``t``: the next arrival of any cell, a refractory end, or ``t1``."""
    t_end = t1
    for i in range(aidx.size):
        if aidx[i] < arr_ptr[i + 1] and arr_time[aidx[i]] < t_end:
            t_end = arr_time[aidx[i]]
        if t < refr[i] and refr[i] < t_end:
            t_end = refr[i]
    return t_end


@jit
def _worst(norms):
    """(largest error norm over the cells, the first cell that has it)."""
    err = norms[0]
    worst = 0
    for i in range(1, norms.size):
        if norms[i] > err:
            err = norms[i]
            worst = i
    return err, worst


@jit
def _first_cut(th_first):
    """Earliest first-crossing theta over the cells (2.0: none inside the step)."""
    th_cut = 2.0
    for i in range(th_first.size):
        if th_first[i] < th_cut:
            th_cut = th_first[i]
    return th_cut


@jit
def _mark_diverged(bad, t, div_time, div_code):
    """Mark every cell out of bounds as diverged at ``t``; whether any was."""
    stop = False
    for i in range(bad.size):
        if bad[i]:
            div_time[i] = t
            div_code[i] = DIV_BOUNDS
            stop = True
    return stop


@jit
def _arrivals_phase(t, code, Y, P, aidx, arr_ptr, arr_time, arr_recep, arr_weight, rstate,
                    counters, have_f, refr, has_reset, spk_count, spk_time):
    """Arrivals due at ``t``; a cell whose spike state they carry past the threshold fires at ``t``."""
    cap = spk_time.shape[1]
    for i in range(code.size):
        v_before = Y[i, 0]
        held = t < refr[i]
        while aidx[i] < arr_ptr[i + 1] and arr_time[aidx[i]] <= t:
            _apply(code[i], Y[i], P[i], arr_recep[aidx[i]], arr_weight[aidx[i]], rstate, held)
            counters[i, C_ARRIVALS] += 1
            aidx[i] += 1
            have_f[i] = False
        if fires_on_arrival(v_before, Y[i], P[i], held):
            if spk_count[i] < cap:
                spk_time[i, spk_count[i]] = t
            spk_count[i] += 1
            if has_reset[i]:
                reset(code[i], Y[i], P[i])
                if P[i, P_TREF] > 0.0:
                    refr[i] = t + P[i, P_TREF]


@jit
def _start_phase(t, need_h0, code, Y, P, refr, nst, KK, WORK, have_f, f_cl, h0s, counters,
                 order, rtol, atol, scale, pzero, h_max):
    for i in range(code.size):
        clamped = t < refr[i]
        if have_f[i] and f_cl[i] != clamped:
            have_f[i] = False
        if not have_f[i]:
            rhs(code[i], Y[i], P[i], clamped, KK[i, 0])
            counters[i, C_RHS] += 1
            have_f[i] = True
            f_cl[i] = clamped
        if need_h0:
            h0, nfi = initial_step(code[i], Y[i], P[i], clamped, KK[i, 0], nst[i], order,
                                   rtol, atol, scale[i], pzero[i], h_max, WORK[i])
            h0s[i] = h0
            counters[i, C_RHS] += nfi


@jit
def _trial_phase(t, h, method, code, Y, P, refr, nst, KK, MM, PIV, JJ, norms, counters,
                 rtol, atol, scale, pzero):
    for i in range(code.size):
        clamped = t < refr[i]
        nf, nls = trial_step(method, code[i], Y[i], P[i], clamped, h, nst[i], KK[i], MM[i], PIV[i],
                             JJ[i])
        counters[i, C_JACOBIAN] += JACOBIANS_PER_TRIAL[method]
        if nf < 0:
            norms[i] = np.inf
        else:
            counters[i, C_RHS] += nf
            counters[i, C_NEWTON] += nls
            e = error_norm(Y[i], KK[i, ROW_Y1], KK[i, ROW_ERR], nst[i], rtol, atol, scale[i],
                           pzero[i])
            norms[i] = e if e <= np.inf else np.inf


@jit
def _cross_phase(t, h, method, code, Y, P, refr, nst, KK, has_reset, th_first, ncross,
                 cross, counters):
    deg = DENSE_DEGREE[method]
    c = np.empty(5)
    for i in range(code.size):
        clamped = t < refr[i]
        counters[i, C_RHS] += finish_step(method, code[i], P[i], clamped, nst[i], KK[i])
        counters[i, C_STEPS] += 1
        th_first[i] = 2.0
        ncross[i] = 0
        if not clamped:
            dense_coefficients(method, Y[i], KK[i], h, 0, c)
            m = upward_crossings(c, deg, P[i, P_VTH], 1.0, cross[i])
            ncross[i] = m
            if has_reset[i] and m > 0:
                th_first[i] = cross[i, 0]


@jit
def _update_phase(t, h, t_new, t_next, th_cut, method, code, Y, P, refr, nst, KK, has_reset,
                  th_first, ncross, cross, spk_count, spk_time, have_f, f_cl, bad, lower, upper):
    f1row = F1_ROW[method]
    cap = spk_time.shape[1]
    for i in range(code.size):
        n = nst[i]
        clamped = t < refr[i]
        fires = has_reset[i] and th_cut <= 1.0 and th_first[i] == th_cut
        m = ncross[i]
        if has_reset[i]:
            m = 1 if fires else 0
        for k in range(m):
            if th_cut <= 1.0 and cross[i, k] > th_cut:
                break
            if spk_count[i] < cap:
                spk_time[i, spk_count[i]] = spike_time(t, cross[i, k], h, t_new)
            spk_count[i] += 1
        if th_cut <= 1.0:
            dense_state(method, Y[i], KK[i], h, n, th_cut, KK[i, ROW_DENSE])
            for q in range(n):
                Y[i, q] = KK[i, ROW_DENSE, q]
            have_f[i] = False
            if fires:
                reset(code[i], Y[i], P[i])
                if P[i, P_TREF] > 0.0:
                    refr[i] = t_next + P[i, P_TREF]
        else:
            for q in range(n):
                Y[i, q] = KK[i, ROW_Y1, q]
                KK[i, 0, q] = KK[i, f1row, q]
            f_cl[i] = clamped
        bad[i] = not _in_bounds(Y[i], n, lower[i], upper[i])


@jit
def _bdf_start_phase(t, code, Y, P, refr, nst, KK, WORK, BD, BJ, BF, LUC, counters, rtol, atol,
                     scale, pzero, h_max):
    """Restart every cell's history at order 1 with the network's common initial step."""
    h0 = h_max
    for i in range(code.size):
        clamped = t < refr[i]
        rhs(code[i], Y[i], P[i], clamped, KK[i, 0])
        counters[i, C_RHS] += 1
        if BF[i, B_JAC] == 0.0:
            jac(code[i], Y[i], P[i], clamped, BJ[i])
            counters[i, C_JACOBIAN] += 1
            BF[i, B_JAC] = 1.0
        h, nfi = initial_step(code[i], Y[i], P[i], clamped, KK[i, 0], nst[i], 1, rtol, atol,
                              scale[i], pzero[i], h_max, WORK[i])
        counters[i, C_RHS] += nfi
        h0 = min(h0, h)
    for i in range(code.size):
        bdf_start(Y[i], KK[i, 0], h0, nst[i], BD[i], BF[i], t < refr[i])
        LUC[i] = np.nan
    return h0


@jit
def _bdf_trial_phase(t, h, code, Y, P, refr, nst, KK, MM, PIV, BD, BJ, BF, LUC, norms, iters,
                     counters, rtol, atol, scale, pzero, ntol):
    """A trial step of every cell at the common step ``h``; returns whether Newton failed in
    any cell."""
    failed = False
    for i in range(code.size):
        clamped = t < refr[i]
        bdf_set_step(BD[i], BF[i], h, nst[i])
        ok, n_iter, err, luc = bdf_trial(code[i], Y[i], P[i], clamped, nst[i], BD[i], BF[i], BJ[i],
                                         MM[i], PIV[i], LUC[i], rtol, atol, scale[i], pzero[i],
                                         ntol, KK[i], counters[i])
        LUC[i] = luc
        norms[i] = err
        iters[i] = n_iter
        if not ok:
            failed = True
    return failed


@jit
def _bdf_cross_phase(t, code, Y, P, refr, nst, KK, BD, BF, has_reset, th_first, ncross, cross,
                     counters):
    """Fold the accepted step into every history; crossings on each cell's interpolant."""
    order = np.int64(BF[0, B_ORDER])
    c = np.empty(6)
    for i in range(code.size):
        bdf_update_differences(BD[i], BF[i], KK[i], nst[i])
        counters[i, C_STEPS] += 1
        th_first[i] = 2.0
        ncross[i] = 0
        if t >= refr[i]:
            bdf_dense_coefficients(BD[i], order, 0, c)
            m = upward_crossings(c, order, P[i, P_VTH], 1.0, cross[i])
            ncross[i] = m
            if has_reset[i] and m > 0:
                th_first[i] = cross[i, 0]


@jit
def _bdf_update_phase(t, h, t_new, t_next, th_cut, order, code, Y, P, refr, nst, KK, BD, BF,
                      has_reset, th_first, ncross, cross, spk_count, spk_time, bad, lower, upper):
    """Spikes up to the cut, states at the step end (or every cell at the cut, then a restart
    of the network), resets."""
    cap = spk_time.shape[1]
    for i in range(code.size):
        n = nst[i]
        fires = has_reset[i] and th_cut <= 1.0 and th_first[i] == th_cut
        m = ncross[i]
        if has_reset[i]:
            m = 1 if fires else 0
        for k in range(m):
            if th_cut <= 1.0 and cross[i, k] > th_cut:
                break
            if spk_count[i] < cap:
                spk_time[i, spk_count[i]] = spike_time(t, cross[i, k], h, t_new)
            spk_count[i] += 1
        if th_cut <= 1.0:
            bdf_dense_state(BD[i], order, n, th_cut, KK[i, ROW_DENSE])
            for q in range(n):
                Y[i, q] = KK[i, ROW_DENSE, q]
            BF[i, B_ORDER] = 0.0
            if fires:
                reset(code[i], Y[i], P[i])
                if P[i, P_TREF] > 0.0:
                    refr[i] = t_next + P[i, P_TREF]
        else:
            for q in range(n):
                Y[i, q] = BD[i, 0, q]
        bad[i] = not _in_bounds(Y[i], n, lower[i], upper[i])


@jit
def _bdf_select_phase(code, Y, nst, KK, BD, BF, err, n_iter, rtol, atol, scale, pzero):
    """The network's order and step: the cells' estimates at orders k-1 and k+1, maximum over
    cells, one decision applied to every cell. Returns the proposed step (ms)."""
    order = np.int64(BF[0, B_ORDER])
    if BF[0, B_EQUAL] < order + 1:
        return BF[0, B_H]
    e_m = 0.0
    e_p = 0.0
    for i in range(code.size):
        a, b = bdf_order_norms(BD[i], BF[i], Y[i], KK[i, ROW_Y1], nst[i], rtol, atol, scale[i],
                               pzero[i])
        e_m = max(e_m, a)
        e_p = max(e_p, b)
    h = BF[0, B_H]
    for i in range(code.size):
        h = bdf_apply_selection(BD[i], BF[i], e_m, err, e_p, n_iter, nst[i])
    return h


@jit
def global_window(method, code, Y, P, refr, div_time, div_code, g_state, lower, upper, scale, pzero,
                  nst, t0, t1, rtol, atol, arr_ptr, arr_time, arr_recep, arr_weight, spk_count,
                  spk_time, counters, rstate, KK, MM, JJ, PIV, WORK, BD, BF, LUC, tr_on, tr_time,
                  tr_h, tr_acc, tr_ord, tr_count, h_min, h_max, max_steps, order, expo):
    """Advance the whole network from t0 to t1 with one shared step size.

    ``g_state`` (3,) float64 carries across windows: [0] proposed step (<= 0:
    estimate one), [1] PI memory, [2] network steps taken (accepted + rejected).
    ``KK`` (n_cells, N_ROWS, width), ``MM``/``JJ`` (n_cells, width, width),
    ``PIV`` (n_cells, width), ``WORK`` (n_cells, 2, width) are per-cell scratch.
    The trace (row 0) is written when ``tr_on``. For ``bdf``: ``JJ`` holds each
    cell's Jacobian across windows, ``BD`` (n_cells, D_ROWS, width) and ``BF``
    (n_cells, N_BDF) each cell's history and record (:mod:`spikegauge.integrate.bdf`),
    ``LUC`` (n_cells,) scratch.
    """
    if method == BDF:
        _global_window_bdf(code, Y, P, refr, div_time, div_code, g_state, lower, upper, scale,
                           pzero, nst, t0, t1, rtol, atol, arr_ptr, arr_time, arr_recep,
                           arr_weight, spk_count, spk_time, counters, rstate, KK, MM, JJ, PIV,
                           WORK, BD, BF, LUC, tr_on, tr_time, tr_h, tr_acc, tr_ord, tr_count,
                           h_min, h_max, max_steps)
        return
    n_cells = code.size
    aidx = arr_ptr[:-1].copy()
    have_f = np.zeros(n_cells, dtype=np.bool_)
    f_cl = np.zeros(n_cells, dtype=np.bool_)
    norms = np.empty(n_cells)
    th_first = np.empty(n_cells)
    ncross = np.zeros(n_cells, dtype=np.int64)
    cross = np.empty((n_cells, 4))
    h0s = np.empty(n_cells)
    bad = np.zeros(n_cells, dtype=np.bool_)
    has_reset = _window_start(P, spk_count)
    h_prop = g_state[0]
    err_prev = g_state[1]
    after_reject = False
    t = t0
    while True:
        # arrivals due now (ordered per cell by the window)
        _arrivals_phase(t, code, Y, P, aidx, arr_ptr, arr_time, arr_recep, arr_weight, rstate,
                        counters, have_f, refr, has_reset, spk_count, spk_time)
        if t >= t1:
            break
        t_end = _next_event(t, t1, aidx, arr_ptr, arr_time, refr)
        # f at the step start where the cached one is stale
        need_h0 = h_prop <= 0.0
        _start_phase(t, need_h0, code, Y, P, refr, nst, KK, WORK, have_f, f_cl, h0s, counters,
                     order, rtol, atol, scale, pzero, h_max)
        if need_h0:
            h_prop = h0s[0]
            for i in range(1, n_cells):
                h_prop = min(h_prop, h0s[i])
        # trial steps until the network accepts one
        while True:
            if g_state[2] >= max_steps:
                g_state[0] = h_prop
                g_state[1] = err_prev
                div_time[0] = t
                div_code[0] = DIV_MAX_STEPS
                return
            h, t_new, cut = step_to_end(t, h_prop, h_max, t_end)
            _trial_phase(t, h, method, code, Y, P, refr, nst, KK, MM, PIV, JJ, norms, counters,
                         rtol, atol, scale, pzero)
            err, worst = _worst(norms)
            g_state[2] += 1
            if err <= 1.0:
                break
            for i in range(n_cells):
                counters[i, C_REJECTED] += 1
            if tr_on:
                record_step(0, t, h, False, order, tr_time, tr_h, tr_acc, tr_ord, tr_count)
            h_prop = next_step_rejected(h, err, expo)
            after_reject = True
            if not h_prop >= h_min:  # also stops a NaN step size
                g_state[0] = h_prop
                g_state[1] = err_prev
                div_time[worst] = t
                div_code[worst] = DIV_MIN_STEP
                return
        h_new, err_prev = next_step_accepted(h, err, err_prev, expo, after_reject)
        after_reject = False
        if cut and h_new >= h:
            h_new = max(h_new, h_prop)
        h_prop = h_new
        # crossings on every cell's dense output
        _cross_phase(t, h, method, code, Y, P, refr, nst, KK, has_reset, th_first, ncross, cross,
                     counters)
        th_cut = _first_cut(th_first)
        t_next = t_new if th_cut > 1.0 else spike_time(t, th_cut, h, t_new)
        # spikes up to the cut, states at the step end (or the cut), resets
        _update_phase(t, h, t_new, t_next, th_cut, method, code, Y, P, refr, nst, KK, has_reset,
                      th_first, ncross, cross, spk_count, spk_time, have_f, f_cl, bad, lower, upper)
        if tr_on:
            record_step(0, t, t_next - t, True, order, tr_time, tr_h, tr_acc, tr_ord, tr_count)
        t = t_next
        if _mark_diverged(bad, t, div_time, div_code):
            g_state[0] = h_prop
            g_state[1] = err_prev
            return
    g_state[0] = h_prop
    g_state[1] = err_prev


@jit
def _global_window_bdf(code, Y, P, refr, div_time, div_code, g_state, lower, upper, scale, pzero,
                       nst, t0, t1, rtol, atol, arr_ptr, arr_time, arr_recep, arr_weight, spk_count,
                       spk_time, counters, rstate, KK, MM, JJ, PIV, WORK, BD, BF, LUC, tr_on,
                       tr_time, tr_h, tr_acc, tr_ord, tr_count, h_min, h_max, max_steps):
    """:func:`global_window` for ``bdf``: the network as one BDF system (module docstring)."""
    n_cells = code.size
    aidx = arr_ptr[:-1].copy()
    have_f = np.ones(n_cells, dtype=np.bool_)   # False: an arrival was applied (restart)
    norms = np.empty(n_cells)
    iters = np.zeros(n_cells, dtype=np.int64)
    th_first = np.empty(n_cells)
    ncross = np.zeros(n_cells, dtype=np.int64)
    cross = np.empty((n_cells, 4))
    bad = np.zeros(n_cells, dtype=np.bool_)
    has_reset = _window_start(P, spk_count)
    ntol = newton_tolerance(rtol)
    h_prop = g_state[0]
    t = t0
    while True:
        _arrivals_phase(t, code, Y, P, aidx, arr_ptr, arr_time, arr_recep, arr_weight, rstate,
                        counters, have_f, refr, has_reset, spk_count, spk_time)
        if t >= t1:
            break
        t_end = _next_event(t, t1, aidx, arr_ptr, arr_time, refr)
        restart = False
        for i in range(n_cells):
            if not have_f[i]:          # an arrival was applied to this cell
                BF[i, B_ORDER] = 0.0
                have_f[i] = True
            if bdf_needs_start(BF[i], t < refr[i]):
                restart = True
        if restart:
            h_prop = _bdf_start_phase(t, code, Y, P, refr, nst, KK, WORK, BD, JJ, BF, LUC,
                                      counters, rtol, atol, scale, pzero, h_max)
        # trial steps until every cell accepts one
        while True:
            if g_state[2] >= max_steps:
                g_state[0] = h_prop
                div_time[0] = t
                div_code[0] = DIV_MAX_STEPS
                return
            h, t_new, cut = step_to_end(t, h_prop, h_max, t_end)
            failed = _bdf_trial_phase(t, h, code, Y, P, refr, nst, KK, MM, PIV, BD, JJ, BF, LUC,
                                      norms, iters, counters, rtol, atol, scale, pzero, ntol)
            err, worst = _worst(norms)
            n_iter = iters.max()
            g_state[2] += 1
            if not failed and err <= 1.0:
                break
            for i in range(n_cells):
                counters[i, C_REJECTED] += 1
            if tr_on:
                record_step(0, t, h, False, BF[0, B_ORDER], tr_time, tr_h, tr_acc, tr_ord,
                            tr_count)
            h_prop = bdf_rejected_step(h, err, n_iter, BF[0, B_ORDER], failed)
            if not h_prop >= h_min:  # also stops a NaN step size
                g_state[0] = h_prop
                div_time[worst] = t
                div_code[worst] = DIV_NEWTON if failed else DIV_MIN_STEP
                return
        step_order = np.int64(BF[0, B_ORDER])
        _bdf_cross_phase(t, code, Y, P, refr, nst, KK, BD, BF, has_reset, th_first, ncross, cross,
                         counters)
        th_cut = _first_cut(th_first)
        t_next = t_new if th_cut > 1.0 else spike_time(t, th_cut, h, t_new)
        _bdf_update_phase(t, h, t_new, t_next, th_cut, step_order, code, Y, P, refr, nst, KK, BD,
                          BF, has_reset, th_first, ncross, cross, spk_count, spk_time, bad, lower,
                          upper)
        if th_cut > 1.0:
            h_sel = _bdf_select_phase(code, Y, nst, KK, BD, BF, err, n_iter, rtol, atol, scale,
                                      pzero)
            if not cut:
                h_prop = h_sel   # cut by an event or the window end: keep the longer proposal
        if tr_on:
            record_step(0, t, t_next - t, True, step_order, tr_time, tr_h, tr_acc, tr_ord, tr_count)
        t = t_next
        if _mark_diverged(bad, t, div_time, div_code):
            g_state[0] = h_prop
            return
    g_state[0] = h_prop
