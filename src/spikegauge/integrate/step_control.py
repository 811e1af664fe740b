"""Error norm, step-size controller and initial step of the adaptive strategies (numba).

Error norm (DESIGN.md): per cell, the weighted RMS over the cell's states of
the local error estimate, weight ``1 / (rtol |y_i| + atol scale_i)``, where
the relative part applies only to states with a physical zero (gates,
conductances) and ``|y_i|`` is the larger of the values at both step ends
(as in Hairer's codes, so a state passing through zero is not over-weighted).
A step of norm <= 1 is accepted (as in SUNDIALS CVODE's weighted RMS test).

Controller: Hairer, Norsett & Wanner, Solving ODEs I (DOPRI5 code): safety
0.9, new/old step ratio bounded to [0.2, 10], PI ("Lund") stabilisation with
beta = 0.04, no growth right after a rejection.
"""
import numpy as np

from .._numba import inline_jit, jit
from ..models.kernels import rhs

SAFETY = 0.9
FAC_MIN = 0.2
FAC_MAX = 10.0
PI_BETA = 0.04
ERR_PREV_FLOOR = 1e-4
"""Floor of the remembered error (Hairer's DOPRI5 uses the same 1e-4)."""


@inline_jit
def error_norm(y0, y1, err, n, rtol, atol, scale, pzero):
    """Weighted RMS norm of ``err[:n]``; ``pzero[i]`` is 1.0 where the relative part applies."""
    acc = 0.0
    for i in range(n):
        mag = max(abs(y0[i]), abs(y1[i])) * pzero[i]
        e = err[i] / (rtol * mag + atol * scale[i])
        acc += e * e
    return np.sqrt(acc / n)


@jit
def controller_exponent(error_order):
    """Exponent of the error in the PI controller: 1/(q+1) - 0.75 beta (Hairer's DOPRI5)."""
    return 1.0 / (error_order + 1.0) - 0.75 * PI_BETA


@jit
def next_step_accepted(h, err, err_prev, expo, after_reject):
    """Proposed step after an accepted step of size ``h`` with error norm ``err``.

    Returns
    -------
    (float, float)
        New step size and the error to remember for the next step.
    """
    fac11 = err ** expo
    fac = fac11 / err_prev ** PI_BETA
    # fac is the inverse step ratio, bounded to [1/FAC_MAX, 1/FAC_MIN]
    fac = max(1.0 / FAC_MAX, min(1.0 / FAC_MIN, fac / SAFETY))
    h_new = h / fac
    if after_reject and h_new > h:
        h_new = h
    return h_new, max(err, ERR_PREV_FLOOR)


@jit
def next_step_rejected(h, err, expo):
    """Smaller step after a rejected step (no PI memory on rejection, as in DOPRI5)."""
    if not np.isfinite(err):
        return FAC_MIN * h
    fac11 = err ** expo
    return h / min(1.0 / FAC_MIN, fac11 / SAFETY)


@jit
def initial_step(code, y, p, clamped, f0, n, order, rtol, atol, scale, pzero, h_max, work):
    """Starting step size (ms), as in Hairer, Norsett & Wanner I, II.4 (and scipy's).

    ``f0`` holds f(y). ``work`` is scratch of shape (2, >= n). Returns the step
    and the right-hand-side evaluations made (one).
    """
    d0 = 0.0
    d1 = 0.0
    for i in range(n):
        w = rtol * abs(y[i]) * pzero[i] + atol * scale[i]
        d0 += (y[i] / w) ** 2
        d1 += (f0[i] / w) ** 2
    d0 = np.sqrt(d0 / n)
    d1 = np.sqrt(d1 / n)
    if d0 < 1e-5 or d1 < 1e-5:
        h0 = 1e-6
    else:
        h0 = 0.01 * d0 / d1
    h0 = min(h0, h_max)
    y1 = work[0]
    f1 = work[1]
    for i in range(n):
        y1[i] = y[i] + h0 * f0[i]
    rhs(code, y1, p, clamped, f1)
    d2 = 0.0
    for i in range(n):
        w = rtol * abs(y[i]) * pzero[i] + atol * scale[i]
        d2 += ((f1[i] - f0[i]) / w) ** 2
    d2 = np.sqrt(d2 / n) / h0
    if d1 <= 1e-15 and d2 <= 1e-15:
        h1 = max(1e-6, h0 * 1e-3)
    else:
        h1 = (0.01 / max(d1, d2)) ** (1.0 / (order + 1.0))
    return min(100.0 * h0, h1, h_max), 1


STRETCH = 1.05
"""A step that would end within this factor of the next event is stretched onto it.

Without it a step landing just short of an event leaves a sliver step behind;
5 % sits well inside the controller's safety factor of 0.9.
"""


@jit
def step_to_end(t, h_prop, h_max, t_end):
    """The next trial step from ``t`` towards an event or window end at ``t_end`` (ms).

    Returns ``(h, t_new, cut)``: the proposed step bounded by ``h_max``, ended exactly
    at ``t_end`` when it would reach within STRETCH of it; ``cut`` is True when that
    shortened the step (the controller then keeps the longer proposal).
    """
    h = min(h_prop, h_max)
    if t + STRETCH * h >= t_end:
        return t_end - t, t_end, t_end - t < h
    return h, t + h, False
