"""One-step formulas of the fixed-step strategy, for a single cell.

Each stepper advances ``y`` (in place) over ``h`` ms and returns the number of
right-hand-side evaluations it made. Synaptic states are ordinary states here,
so every stage sees them at the stage time: a fourth-order stepper stays fourth
order in a network (freezing them over a step would make it first order).

``k`` is scratch of shape ``(8, n)``: rows 0-3 stage derivatives, row 4 a
stage state, rows 5-7 free for the caller. Row 0 may hold ``f(y)`` already
(``have_f0=True``): the driver caches it from the crossing check of the
previous step, so Hermite crossing costs no extra evaluation per step.

Codes (runtime, so one compiled kernel serves every stepper):
"""
import numpy as np

from .._numba import jit
from ..models.kernels import jac, rhs, split

EULER = 0
EXPEULER = 1
RK2 = 2
RK4 = 3
BACKWARD_EULER = 4
STEPPER_CODES = {"euler": EULER, "expeuler": EXPEULER, "rk2": RK2, "rk4": RK4,
                 "backward-euler": BACKWARD_EULER}
STEPPER_ORDER = {"euler": 1, "expeuler": 1, "rk2": 2, "rk4": 4, "backward-euler": 1}

NEWTON_MAX_ITERS = 12
NEWTON_TOL = 1e-10
"""Newton converges when every |update_i| <= NEWTON_TOL * scale_i."""


@jit
def phi1(z):
    """(exp(z) - 1) / z, continuous at 0."""
    if abs(z) < 1e-8:
        return 1.0 + 0.5 * z
    return np.expm1(z) / z


@jit
def fixed_step(stepper, code, y, p, clamped, h, n, k, have_f0, scale, J, newton_count):
    """Advance one cell's state ``y[:n]`` over ``h`` ms with the given stepper.

    Returns the number of right-hand-side evaluations, or -1 when the Newton
    iteration of backward Euler failed (``y`` is then left at the last iterate).
    ``newton_count[0]`` is incremented by the Newton iterations made.
    """
    nf = 0
    if stepper == EXPEULER:
        a = k[0]
        b = k[1]
        split(code, y, p, clamped, a, b)
        for s in range(n):
            y[s] += h * (a[s] + b[s] * y[s]) * phi1(b[s] * h)
        return 1
    if not have_f0:
        rhs(code, y, p, clamped, k[0])
        nf += 1
    if stepper == EULER:
        for s in range(n):
            y[s] += h * k[0, s]
        return nf
    if stepper == RK2:
        # Heun's method (explicit trapezoid): the midpoint rule is the other common
        # choice; Heun's endpoint stage also serves the error-free reuse of f.
        for s in range(n):
            k[4, s] = y[s] + h * k[0, s]
        rhs(code, k[4], p, clamped, k[1])
        for s in range(n):
            y[s] += 0.5 * h * (k[0, s] + k[1, s])
        return nf + 1
    if stepper == RK4:
        for s in range(n):
            k[4, s] = y[s] + 0.5 * h * k[0, s]
        rhs(code, k[4], p, clamped, k[1])
        for s in range(n):
            k[4, s] = y[s] + 0.5 * h * k[1, s]
        rhs(code, k[4], p, clamped, k[2])
        for s in range(n):
            k[4, s] = y[s] + h * k[2, s]
        rhs(code, k[4], p, clamped, k[3])
        for s in range(n):
            y[s] += h / 6.0 * (k[0, s] + 2.0 * k[1, s] + 2.0 * k[2, s] + k[3, s])
        return nf + 3
    # Backward Euler: Newton on G(z) = z - y - h f(z) = 0 from the explicit Euler guess.
    for s in range(n):
        k[5, s] = y[s]                    # y at the step start
        y[s] = y[s] + h * k[0, s]         # initial iterate
    for it in range(NEWTON_MAX_ITERS):
        rhs(code, y, p, clamped, k[1])
        nf += 1
        jac(code, y, p, clamped, J)
        newton_count[0] += 1
        A = np.empty((n, n))
        r = np.empty(n)
        for s in range(n):
            r[s] = -(y[s] - k[5, s] - h * k[1, s])
            for q in range(n):
                A[s, q] = -h * J[s, q]
            A[s, s] += 1.0
        dz = np.linalg.solve(A, r)
        done = True
        for s in range(n):
            if not np.isfinite(dz[s]):
                return -1
            y[s] += dz[s]
            if abs(dz[s]) > NEWTON_TOL * scale[s]:
                done = False
        if done:
            return nf
    return -1
