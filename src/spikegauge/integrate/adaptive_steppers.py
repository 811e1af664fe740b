"""Trial steps with an error estimate and dense output, for one cell (numba).

Coefficients: :mod:`spikegauge.integrate.tableaux`. A trial step never touches
``y``: it writes the candidate new state and the local error estimate into
scratch rows, so the driver can reject it at no cost, and keeps the stages
the dense output needs.

Scratch ``K``, shape ``(N_ROWS, width)``:

========  =====================================================================
rows 0-6  stage derivatives; row 0 must hold f(y) on entry (the driver caches
          it: f at the end of an accepted step is the next step's first stage)
          ``rodas3``: rows 1-4 hold the stage solutions u_i
row F1    f at the new point after :func:`finish_step` (``F1_ROW[method]``)
row 7     stage state
row 8     candidate new state y1
row 9     local error estimate (absolute, per state)
row 10    stage right-hand side (``rodas3``)
row 11    dense-output scratch
========  =====================================================================

Synaptic states are integrated in every stage like any other state, so the
steppers keep their order in a network.
"""
import numpy as np

from .._numba import jit
from ..models.kernels import jac, rhs
from .linsolve import lu_factor, lu_solve
from .tableaux import (BS32, BS32_A, BS32_B, BS32_E, DP54, DP54_A, DP54_B, DP54_DENSE_D, DP54_E,
                       RODAS3, RODAS3_A_T, RODAS3_C_T, RODAS3_E_T, RODAS3_GAMMA, RODAS3_M)

N_ROWS = 12
ROW_STAGE = 7
ROW_Y1 = 8
ROW_ERR = 9
ROW_FSTAGE = 10
ROW_DENSE = 11

F1_ROW = np.array([3, 6, 6, 0], dtype=np.int64)
"""Row of f(y1) after :func:`finish_step`, by stepper code (bs32, dp54, rodas3; bdf keeps no
f(y1): its next step does not need it)."""

DENSE_DEGREE = np.array([3, 4, 3, 5], dtype=np.int64)
"""Degree of the dense-output polynomial, by stepper code (bdf: at most; its current order)."""

JACOBIANS_PER_TRIAL = np.array([0, 0, 1, 0], dtype=np.int64)
"""Jacobian evaluations of one trial step, by stepper code (bdf counts its own)."""


@jit
def _explicit_trial(A, B, E, code, y, p, clamped, h, n, K):
    s = B.size
    y1 = K[ROW_Y1]
    st = K[ROW_STAGE]
    for i in range(1, s - 1):
        for q in range(n):
            acc = 0.0
            for j in range(i):
                acc += A[i, j] * K[j, q]
            st[q] = y[q] + h * acc
        rhs(code, st, p, clamped, K[i])
    # last stage: f at the new point (first same as last)
    for q in range(n):
        acc = 0.0
        for j in range(s - 1):
            acc += B[j] * K[j, q]
        y1[q] = y[q] + h * acc
    rhs(code, y1, p, clamped, K[s - 1])
    for q in range(n):
        acc = 0.0
        for j in range(s):
            acc += E[j] * K[j, q]
        K[ROW_ERR, q] = h * acc
    return s - 1


@jit
def _rosenbrock_trial(A_T, C_T, M_W, E_W, gamma, code, y, p, clamped, h, n, K, M, piv, J):
    """A Rosenbrock method in the transformed form (see :mod:`tableaux`).

    Stage solutions u_i go to rows 1..s. A stage whose row of ``A_T`` is zero
    sits at y itself and reuses f(y) from row 0. Returns (rhs evaluations or
    -1 when the matrix is singular or the result non-finite, linear solves).
    """
    s = M_W.size
    jac(code, y, p, clamped, J)
    inv = 1.0 / (h * gamma)
    for r in range(n):
        for q in range(n):
            M[r, q] = -J[r, q]
        M[r, r] += inv
    if not lu_factor(M, piv, n):
        return -1, 0
    st = K[ROW_STAGE]
    fs = K[ROW_FSTAGE]
    nf = 0
    for i in range(s):
        at_y = True
        for j in range(i):
            if A_T[i, j] != 0.0:
                at_y = False
        if at_y:
            for q in range(n):
                fs[q] = K[0, q]
        else:
            for q in range(n):
                acc = 0.0
                for j in range(i):
                    acc += A_T[i, j] * K[1 + j, q]
                st[q] = y[q] + acc
            rhs(code, st, p, clamped, fs)
            nf += 1
        for q in range(n):
            acc = fs[q]
            for j in range(i):
                acc += C_T[i, j] / h * K[1 + j, q]
            K[1 + i, q] = acc
        lu_solve(M, piv, K[1 + i], n)
    for q in range(n):
        acc = 0.0
        err = 0.0
        for j in range(s):
            acc += M_W[j] * K[1 + j, q]
            err += E_W[j] * K[1 + j, q]
        K[ROW_Y1, q] = y[q] + acc
        K[ROW_ERR, q] = err
    for q in range(n):
        if not np.isfinite(K[ROW_Y1, q]):
            return -1, s
    return nf, s


@jit
def trial_step(method, code, y, p, clamped, h, n, K, M, piv, J):
    """One trial step of length ``h`` ms from ``y``; ``K[0]`` must hold f(y).

    Writes the candidate ``K[ROW_Y1]`` and error estimate ``K[ROW_ERR]``.

    Returns
    -------
    (int, int)
        Right-hand-side evaluations made (-1: the linear system of ``rodas3``
        was singular or produced a non-finite state), and linear solves made.
    """
    if method == BS32:
        return _explicit_trial(BS32_A, BS32_B, BS32_E, code, y, p, clamped, h, n, K), 0
    if method == DP54:
        return _explicit_trial(DP54_A, DP54_B, DP54_E, code, y, p, clamped, h, n, K), 0
    return _rosenbrock_trial(RODAS3_A_T, RODAS3_C_T, RODAS3_M, RODAS3_E_T, RODAS3_GAMMA, code, y, p,
                             clamped, h, n, K, M, piv, J)


@jit
def finish_step(method, code, p, clamped, n, K):
    """Make f(y1) available in row ``F1_ROW[method]``; returns rhs evaluations made.

    The explicit pairs have it already (first same as last); ``rodas3`` pays
    one evaluation, which is also the next step's first stage.
    """
    if method == RODAS3:
        rhs(code, K[ROW_Y1], p, clamped, K[6])
        return 1
    return 0


@jit
def dense_coefficients(method, y0, K, h, q, c):
    """Power-basis coefficients of state ``q`` over the last trial step.

    ``c[k]`` multiplies theta^k, theta = (t - t_start) / h in [0, 1]; the
    polynomial equals ``y0[q]`` at 0 and ``K[ROW_Y1, q]`` at 1. Requires
    :func:`finish_step` for ``rodas3``.
    """
    a = y0[q]
    b = K[ROW_Y1, q]
    if method == DP54:
        dy = b - a
        r3 = h * K[0, q] - dy
        r4 = dy - h * K[6, q] - r3
        acc = 0.0
        for j in range(7):
            acc += DP54_DENSE_D[j] * K[j, q]
        r5 = h * acc
        # a + th (dy + (1 - th) (r3 + th (r4 + (1 - th) r5))) expanded
        c[0] = a
        c[1] = dy + r3
        c[2] = r4 + r5 - r3
        c[3] = -(r4 + 2.0 * r5)
        c[4] = r5
        return
    # cubic Hermite through (y0, f0) and (y1, f1)
    f0 = h * K[0, q]
    f1 = h * K[F1_ROW[method], q]
    c[0] = a
    c[1] = f0
    c[2] = 3.0 * (b - a) - 2.0 * f0 - f1
    c[3] = 2.0 * (a - b) + f0 + f1
    c[4] = 0.0


@jit
def dense_state(method, y0, K, h, n, th, out):
    """Dense output of every state at ``th`` into ``out[:n]`` (th = 1 gives y1 exactly)."""
    c = np.empty(5)
    for q in range(n):
        if th == 1.0:
            out[q] = K[ROW_Y1, q]
            continue
        dense_coefficients(method, y0, K, h, q, c)
        v = c[4]
        for k in range(3, -1, -1):
            v = v * th + c[k]
        out[q] = v
