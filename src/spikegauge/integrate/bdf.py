"""Variable-order, variable-step BDF (orders 1-5) for one cell (numba).

The backward differentiation formulas in the form of Shampine & Reichelt
(1997), "The MATLAB ODE suite", SIAM J Sci Comput 18:1-22 (their NDF family
with kappa = 0, i.e. the BDFs themselves; scipy.integrate's ``BDF`` solver
implements the same and guided the structure here), with the order and step
selection of the Byrne & Hindmarsh (1975, ACM TOMS 1:71-96) and Brown, Byrne
& Hindmarsh (1989, SIAM J Sci Stat Comput 10:1038-1051) codes:

* History: the backward differences of the solution at equal spacing h,
  ``D[j]`` (``D[0]`` the current state). A change of step size re-interpolates
  them onto the new spacing (:func:`change_D`); a change of step or order
  makes the controller wait ``order + 1`` steps before the next change.
* Predictor: the interpolating polynomial extrapolated one step; corrector:
  the BDF of the current order solved by a simplified Newton iteration with
  ``I - h/alpha_k J``, at most four iterations with a convergence-rate test.
  The Jacobian is kept across steps and re-evaluated (at the predicted state)
  only when Newton fails to converge with the old one; when it fails with a
  fresh one, the step is halved.
* Error estimate: ``1/(k+1)`` times the difference of corrector and
  predictor, in the weighted RMS norm of the adaptive strategies
  (:mod:`spikegauge.integrate.step_control`); a step of norm <= 1 is
  accepted, a rejected one shrinks by ``max(0.2, safety err^(-1/(k+1)))``.
* Order selection: after ``order + 1`` equal steps, the error estimates at
  orders k-1, k, k+1 (from the differences) each propose a step; the order
  with the largest step wins, growth bounded by 10.
* Dense output: the interpolating polynomial of the current order through the
  last k+1 points, in the power basis of theta in [0, 1] over the last step
  (for crossings, :mod:`spikegauge.integrate.dense`).
* Restart: after every event that changes the state or the right-hand side
  (arrival, reset, refractory start or end) the history is discarded and
  the method starts again at order 1 with a small step (the initial-step
  estimate of :func:`~spikegauge.integrate.step_control.initial_step`): a
  multistep method cannot step across a discontinuity (Lytton & Hines 2005,
  Neural Comput 17:903-921).

Per-cell record ``BF`` (float64, ``N_BDF``): ``[B_ORDER]`` current order (0:
no valid history, restart before the next step: set at the start and by
every event), ``[B_EQUAL]`` steps since the last change of step or order,
``[B_H]`` the spacing of ``D`` (ms), ``[B_CLAMPED]`` 1.0 when the history was
built under the refractory clamp, ``[B_JAC]`` 1.0 once the cell's Jacobian
has been evaluated.

Scratch rows of ``K`` (shape (N_ROWS, width), :mod:`adaptive_steppers`):
row 0 f(y) at a restart, ``ROW_PRED`` the predicted state, ``ROW_PSI`` the
history term, ``ROW_D`` the corrector - predictor difference, ``ROW_F`` f at
an iterate, ``ROW_DY`` the Newton update, ``ROW_Y1`` the new state,
``ROW_ERR`` the error estimate.
"""
import numpy as np

from .._numba import jit
from ..models.kernels import jac, rhs
from .adaptive_steppers import ROW_ERR, ROW_Y1
from .engine import C_JACOBIAN, C_NEWTON, C_RHS
from .linsolve import lu_factor, lu_solve

MAX_ORDER = 5
D_ROWS = MAX_ORDER + 3
"""Rows of the difference array: orders up to 5, plus the two differences order selection needs."""
NEWTON_MAXITER = 4
MIN_FACTOR = 0.2
MAX_FACTOR = 10.0
NEWTON_FAIL_FACTOR = 0.5
"""Step reduction after a Newton failure with a fresh Jacobian."""

ROW_PRED = 1
ROW_PSI = 2
ROW_D = 3
ROW_F = 4
ROW_DY = 5

B_ORDER = 0
B_EQUAL = 1
B_H = 2
B_CLAMPED = 3
B_JAC = 4
N_BDF = 5

BDF_GAMMA = np.concatenate(([0.0], np.cumsum(1.0 / np.arange(1, MAX_ORDER + 1))))
"""gamma_k = sum_{j<=k} 1/j (Shampine & Reichelt 1997, section 2.3)."""
BDF_ALPHA = BDF_GAMMA.copy()
"""alpha_k = (1 - kappa) gamma_k with kappa = 0: the BDFs."""
BDF_ERROR_CONST = 1.0 / np.arange(1, MAX_ORDER + 2)
"""Error constant of the BDF of order k: 1/(k+1) (kappa = 0)."""


def _r_matrix(order: int, factor: float) -> np.ndarray:
    """The matrix that re-interpolates backward differences onto a spacing ``factor`` times
    the old one (Shampine & Reichelt 1997, section 2.3)."""
    i = np.arange(1, order + 1)[:, None]
    j = np.arange(1, order + 1)
    m = np.zeros((order + 1, order + 1))
    m[1:, 1:] = (i - 1 - factor * j) / i
    m[0] = 1.0
    return np.cumprod(m, axis=0)


BDF_U = np.zeros((MAX_ORDER + 1, MAX_ORDER + 1, MAX_ORDER + 1))
"""``BDF_U[k]``: :func:`_r_matrix` of order k at factor 1 (the same for every step)."""
for _k in range(1, MAX_ORDER + 1):
    BDF_U[_k, :_k + 1, :_k + 1] = _r_matrix(_k, 1.0)


@jit
def newton_tolerance(rtol):
    """Tolerance of the Newton iteration in the error norm (as scipy's BDF)."""
    return max(10.0 * np.finfo(np.float64).eps / rtol, min(0.03, rtol ** 0.5))


@jit
def change_D(D, order, factor, n):
    """Re-interpolate ``D[:order + 1]`` onto a spacing ``factor`` times the current one."""
    k1 = order + 1
    R = np.empty((k1, k1))
    for j in range(k1):
        R[0, j] = 1.0
    for i in range(1, k1):
        R[i, 0] = 0.0
        for j in range(1, k1):
            R[i, j] = R[i - 1, j] * (i - 1 - factor * j) / i
    RU = np.empty((k1, k1))
    for i in range(k1):
        for j in range(k1):
            acc = 0.0
            for m in range(k1):
                acc += R[i, m] * BDF_U[order, m, j]
            RU[i, j] = acc
    tmp = np.empty(k1)
    for q in range(n):
        for j in range(k1):
            acc = 0.0
            for i in range(k1):
                acc += RU[i, j] * D[i, q]
            tmp[j] = acc
        for j in range(k1):
            D[j, q] = tmp[j]


@jit
def bdf_needs_start(BF, clamped):
    """Whether the history must be (re)started: none yet, an event since, or the clamp changed."""
    return BF[B_ORDER] == 0.0 or BF[B_CLAMPED] != (1.0 if clamped else 0.0)


@jit
def bdf_start(y, f, h, n, D, BF, clamped):
    """Start (or restart) the history at order 1 with step ``h``: D[0] = y, D[1] = h f(y)."""
    for j in range(D.shape[0]):
        for q in range(n):
            D[j, q] = 0.0
    for q in range(n):
        D[0, q] = y[q]
        D[1, q] = h * f[q]
    BF[B_ORDER] = 1.0
    BF[B_EQUAL] = 0.0
    BF[B_H] = h
    BF[B_CLAMPED] = 1.0 if clamped else 0.0


@jit
def bdf_set_step(D, BF, h, n):
    """Make ``h`` the spacing of the history (no-op when it is already)."""
    if h != BF[B_H]:
        change_D(D, np.int64(BF[B_ORDER]), h / BF[B_H], n)
        BF[B_H] = h
        BF[B_EQUAL] = 0.0


@jit
def _wnorm(coef, v, y0, y1, n, rtol, atol, scale, pzero):
    """Weighted RMS norm of ``coef * v[:n]`` with the adaptive strategies' weights."""
    acc = 0.0
    for i in range(n):
        mag = max(abs(y0[i]), abs(y1[i])) * pzero[i]
        e = coef * v[i] / (rtol * mag + atol * scale[i])
        acc += e * e
    return np.sqrt(acc / n)


@jit
def _newton(code, p, clamped, n, c, M, piv, K, rtol, atol, scale, pzero, tol, cnt):
    """Simplified Newton iteration of the corrector from the predicted state.

    Returns (converged, iterations). ``K[ROW_Y1]`` holds the last iterate and
    ``K[ROW_D]`` its difference from the prediction.
    """
    yp = K[ROW_PRED]
    psi = K[ROW_PSI]
    d = K[ROW_D]
    f = K[ROW_F]
    dy = K[ROW_DY]
    y = K[ROW_Y1]
    for q in range(n):
        y[q] = yp[q]
        d[q] = 0.0
    dy_old = -1.0
    for k in range(NEWTON_MAXITER):
        rhs(code, y, p, clamped, f)
        cnt[C_RHS] += 1
        for q in range(n):
            if not np.isfinite(f[q]):
                return False, k + 1
        for q in range(n):
            dy[q] = c * f[q] - psi[q] - d[q]
        lu_solve(M, piv, dy, n)
        cnt[C_NEWTON] += 1
        dy_norm = _wnorm(1.0, dy, yp, yp, n, rtol, atol, scale, pzero)
        rate = -1.0
        if dy_old >= 0.0:
            rate = dy_norm / dy_old
            if rate >= 1.0 or rate ** (NEWTON_MAXITER - k) / (1.0 - rate) * dy_norm > tol:
                return False, k + 1
        for q in range(n):
            y[q] += dy[q]
            d[q] += dy[q]
        if dy_norm == 0.0 or (rate >= 0.0 and rate / (1.0 - rate) * dy_norm < tol):
            return True, k + 1
        if not dy_norm <= np.inf:   # NaN
            return False, k + 1
        dy_old = dy_norm
    return False, NEWTON_MAXITER


@jit
def bdf_trial(code, y, p, clamped, n, D, BF, J, M, piv, lu_c, rtol, atol, scale, pzero, tol, K,
              cnt):
    """One trial step of the current order at the history's spacing ``BF[B_H]``.

    ``lu_c`` is the ``h/alpha_k`` that ``M`` was last factored for (NaN: none).
    Writes ``K[ROW_Y1]`` (new state), ``K[ROW_D]`` (corrector - predictor) and
    ``K[ROW_ERR]`` (local error estimate); counts rhs evaluations, linear
    solves (``C_NEWTON``) and Jacobian evaluations into ``cnt``.

    Returns
    -------
    (bool, int, float, float)
        Newton converged, its iterations, the error norm (inf when Newton
        failed), and the ``lu_c`` now factored.
    """
    order = np.int64(BF[B_ORDER])
    h = BF[B_H]
    yp = K[ROW_PRED]
    psi = K[ROW_PSI]
    for q in range(n):
        acc = 0.0
        for j in range(order + 1):
            acc += D[j, q]
        yp[q] = acc
        acc = 0.0
        for j in range(1, order + 1):
            acc += BDF_GAMMA[j] * D[j, q]
        psi[q] = acc / BDF_ALPHA[order]
    c = h / BDF_ALPHA[order]
    fresh = False
    while True:
        ok = True
        if lu_c != c:
            for r in range(n):
                for s in range(n):
                    M[r, s] = -c * J[r, s]
                M[r, r] += 1.0
            ok = lu_factor(M, piv, n)
            lu_c = c if ok else np.nan
        n_iter = 0
        if ok:
            conv, n_iter = _newton(code, p, clamped, n, c, M, piv, K, rtol, atol, scale, pzero,
                                   tol, cnt)
            if conv:
                break
        if fresh:
            return False, n_iter, np.inf, lu_c
        jac(code, yp, p, clamped, J)
        cnt[C_JACOBIAN] += 1
        fresh = True
        lu_c = np.nan
    ec = BDF_ERROR_CONST[order]
    d = K[ROW_D]
    for q in range(n):
        K[ROW_ERR, q] = ec * d[q]
    err = _wnorm(1.0, K[ROW_ERR], y, K[ROW_Y1], n, rtol, atol, scale, pzero)
    if not err <= np.inf:
        err = np.inf
    return True, n_iter, err, lu_c


@jit
def bdf_safety(n_iter):
    """Safety factor of the step size, lower after a slow Newton iteration."""
    return 0.9 * (2 * NEWTON_MAXITER + 1) / (2 * NEWTON_MAXITER + n_iter)


@jit
def bdf_rejected_step(h, err, n_iter, order, newton_failed):
    """Step after a rejected trial: halved after a Newton failure, else from the error."""
    if newton_failed:
        return NEWTON_FAIL_FACTOR * h
    return h * max(MIN_FACTOR, bdf_safety(n_iter) * err ** (-1.0 / (order + 1)))


@jit
def bdf_update_differences(D, BF, K, n):
    """Fold an accepted step's corrector - predictor difference into the history."""
    order = np.int64(BF[B_ORDER])
    d = K[ROW_D]
    for q in range(n):
        D[order + 2, q] = d[q] - D[order + 1, q]
        D[order + 1, q] = d[q]
        for i in range(order, -1, -1):
            D[i, q] += D[i + 1, q]
    BF[B_EQUAL] += 1.0


@jit
def bdf_order_norms(D, BF, y0, y1, n, rtol, atol, scale, pzero):
    """Error estimates at orders k-1 and k+1 from the differences (inf where that order does
    not exist)."""
    order = np.int64(BF[B_ORDER])
    if order > 1:
        e_m = _wnorm(BDF_ERROR_CONST[order - 1], D[order], y0, y1, n, rtol, atol, scale, pzero)
    else:
        e_m = np.inf
    if order < MAX_ORDER:
        e_p = _wnorm(BDF_ERROR_CONST[order + 1], D[order + 2], y0, y1, n, rtol, atol, scale, pzero)
    else:
        e_p = np.inf
    return e_m, e_p


@jit
def bdf_select(D, BF, err, n_iter, y0, y1, n, rtol, atol, scale, pzero):
    """Order and step for the next step, once ``order + 1`` equal steps have been taken.

    Applies the change to ``D`` and ``BF``; returns the proposed step (ms),
    ``BF[B_H]`` unchanged when it is too early to change.
    """
    order = np.int64(BF[B_ORDER])
    if BF[B_EQUAL] < order + 1:
        return BF[B_H]
    e_m, e_p = bdf_order_norms(D, BF, y0, y1, n, rtol, atol, scale, pzero)
    return bdf_apply_selection(D, BF, e_m, err, e_p, n_iter, n)


@jit
def bdf_apply_selection(D, BF, e_m, e_0, e_p, n_iter, n):
    """Move to the order whose error estimate (``e_m``, ``e_0``, ``e_p`` at orders k-1, k,
    k+1) allows the longest step, and to that step; returns it (ms)."""
    order = np.int64(BF[B_ORDER])
    f_m = e_m ** (-1.0 / order)
    f_0 = e_0 ** (-1.0 / (order + 1))
    f_p = e_p ** (-1.0 / (order + 2))
    best = f_m
    delta = -1
    if f_0 > best:
        best = f_0
        delta = 0
    if f_p > best:
        best = f_p
        delta = 1
    if not best > 0.0:          # all NaN: keep order and step
        BF[B_EQUAL] = 0.0
        return BF[B_H]
    order += delta
    factor = min(MAX_FACTOR, bdf_safety(n_iter) * best)
    BF[B_ORDER] = order
    h = BF[B_H] * factor
    change_D(D, order, factor, n)
    BF[B_H] = h
    BF[B_EQUAL] = 0.0
    return h


@jit
def bdf_dense_coefficients(D, order, q, c):
    """Power-basis coefficients (theta^0..theta^order) of state ``q`` over the last step.

    The interpolating polynomial through the last ``order + 1`` points,
    sum_j D[j] prod_{m<j} (theta - 1 + m) / (m + 1) with theta = (t - t_old)/h:
    ``D[0]`` (the new state) at theta = 1, the old state at theta = 0.
    ``c`` needs ``MAX_ORDER + 1`` entries; the rest are zeroed.
    """
    b = np.zeros(MAX_ORDER + 1)
    b[0] = 1.0
    for k in range(MAX_ORDER + 1):
        c[k] = 0.0
    c[0] = D[0, q]
    for j in range(1, order + 1):
        m = j - 1
        a0 = (m - 1.0) / (m + 1.0)
        a1 = 1.0 / (m + 1.0)
        for k in range(j, 0, -1):
            b[k] = b[k] * a0 + b[k - 1] * a1
        b[0] = b[0] * a0
        for k in range(j + 1):
            c[k] += D[j, q] * b[k]


@jit
def bdf_dense_state(D, order, n, th, out):
    """Dense output of every state at ``th`` into ``out[:n]`` (th = 1 gives D[0] exactly)."""
    c = np.empty(MAX_ORDER + 1)
    for q in range(n):
        if th == 1.0:
            out[q] = D[0, q]
            continue
        bdf_dense_coefficients(D, order, q, c)
        v = c[order]
        for k in range(order - 1, -1, -1):
            v = v * th + c[k]
        out[q] = v
