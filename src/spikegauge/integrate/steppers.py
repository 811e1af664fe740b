"""One-step formulas of the fixed-step strategy, for a single cell.

Each stepper advances ``y`` (in place) over ``h`` ms and returns the number of
right-hand-side evaluations it made. Synaptic states are ordinary states here,
so every stage sees them at the stage time: a fourth-order stepper stays fourth
order in a network (freezing them over a step would make it first order).

Scratch comes as separate 1-D arrays, each at least ``n`` long: ``f0``..``f3``
stage derivatives, ``ys`` a stage state, ``y0`` the state at the step start
(written by backward Euler only). Separate 1-D arrays rather than rows of one
2-D array, because every row view taken in a hot loop costs a reference-count
update, and those updates were a large part of the per-step cost. ``f0`` may
hold ``f(y)`` already (``have_f0=True``): the driver caches it from the
crossing check of the previous step, so Hermite crossing costs no extra
evaluation per step.

Codes (runtime, so one compiled kernel serves every stepper):

``trapezoidal`` is the implicit trapezoidal rule (Crank-Nicolson; second
order and A-stable, textbook facts; not L-stable, so a step much longer than
a fast time constant leaves that component oscillating, where backward Euler
damps it):
z = y + h/2 (f(y) + f(z)), solved by Newton's method with the model's
Jacobian. Its spike times are second order with the Hermite crossing, which
has the derivative at both step ends (Hansel et al. 1998 for the
interpolation).
"""
import numpy as np

from .._numba import inline_jit, jit
from ..models.kernels import jac, rhs, split
from .linsolve import lu_factor, lu_solve

EULER = 0
EXPEULER = 1
RK2 = 2
RK4 = 3
BACKWARD_EULER = 4
TRAPEZOIDAL = 5
STEPPER_CODES = {"euler": EULER, "expeuler": EXPEULER, "rk2": RK2, "rk4": RK4,
                 "backward-euler": BACKWARD_EULER, "trapezoidal": TRAPEZOIDAL}
STEPPER_ORDER = {"euler": 1, "expeuler": 1, "rk2": 2, "rk4": 4, "backward-euler": 1,
                 "trapezoidal": 2}

NEWTON_MAX_ITERS = 12
NEWTON_TOL = 1e-10
"""Newton converges when every |update_i| <= NEWTON_TOL * scale_i."""


@jit
def phi1(z):
    """(exp(z) - 1) / z, continuous at 0."""
    if abs(z) < 1e-8:
        return 1.0 + 0.5 * z
    return np.expm1(z) / z


@inline_jit
def fixed_step(stepper, code, y, p, clamped, h, n, f0, f1, f2, f3, ys, y0, have_f0, scale, J,
               newton_count):
    """Advance one cell's state ``y[:n]`` over ``h`` ms with the given stepper.

    Returns the number of right-hand-side evaluations, or -1 when the Newton
    iteration of backward Euler or the trapezoidal rule failed (``y`` is then left at the last iterate).
    ``newton_count[0]`` is incremented by the Newton iterations made.

    Inlined into its caller: as a separate function, the reference counts of
    its dozen array arguments cost more than a whole step of a LIF cell.
    """
    nf = 0
    if stepper == BACKWARD_EULER:
        return _implicit(code, y, p, clamped, h, n, f0, f1, y0, have_f0, scale, J, newton_count,
                         False)
    if stepper == TRAPEZOIDAL:
        return _implicit(code, y, p, clamped, h, n, f0, f1, y0, have_f0, scale, J, newton_count,
                         True)
    if stepper == EXPEULER:
        split(code, y, p, clamped, f0, f1)
        for s in range(n):
            y[s] += h * (f0[s] + f1[s] * y[s]) * phi1(f1[s] * h)
        return 1
    if not have_f0:
        rhs(code, y, p, clamped, f0)
        nf += 1
    if stepper == EULER:
        for s in range(n):
            y[s] += h * f0[s]
        return nf
    if stepper == RK2:
        # Heun's method (explicit trapezoid): the midpoint rule is the other common
        # choice; Heun's endpoint stage also serves the error-free reuse of f.
        for s in range(n):
            ys[s] = y[s] + h * f0[s]
        rhs(code, ys, p, clamped, f1)
        for s in range(n):
            y[s] += 0.5 * h * (f0[s] + f1[s])
        return nf + 1
    # RK4 (classic)
    for s in range(n):
        ys[s] = y[s] + 0.5 * h * f0[s]
    rhs(code, ys, p, clamped, f1)
    for s in range(n):
        ys[s] = y[s] + 0.5 * h * f1[s]
    rhs(code, ys, p, clamped, f2)
    for s in range(n):
        ys[s] = y[s] + h * f2[s]
    rhs(code, ys, p, clamped, f3)
    for s in range(n):
        y[s] += h / 6.0 * (f0[s] + 2.0 * f1[s] + 2.0 * f2[s] + f3[s])
    return nf + 3


@jit
def _implicit(code, y, p, clamped, h, n, f0, f1, y0, have_f0, scale, J, newton_count, trapezoid):
    """Backward Euler, G(z) = z - y - h f(z) = 0, or the trapezoidal rule,
    G(z) = z - y - h/2 (f(y) + f(z)) = 0: Newton from the explicit Euler guess,
    with the Jacobian at every iterate (full Newton: a step's few iterations
    converge quadratically, where a frozen Jacobian would need more of them
    at the large steps these steppers are chosen for).

    ``f0`` keeps f(y) (the trapezoidal rule needs it in every residual).
    """
    nf = 0
    if not have_f0:
        rhs(code, y, p, clamped, f0)
        nf += 1
    c = 0.5 * h if trapezoid else h
    for s in range(n):
        y0[s] = y[s]                      # y at the step start
        y[s] = y[s] + h * f0[s]           # initial iterate
    A = np.empty((n, n))
    r = np.empty(n)
    piv = np.empty(n, dtype=np.int64)
    for it in range(NEWTON_MAX_ITERS):
        rhs(code, y, p, clamped, f1)
        nf += 1
        jac(code, y, p, clamped, J)
        newton_count[0] += 1
        for s in range(n):
            g = y[s] - y0[s] - c * f1[s]
            if trapezoid:
                g -= c * f0[s]
            r[s] = -g
            for q in range(n):
                A[s, q] = -c * J[s, q]
            A[s, s] += 1.0
        if not lu_factor(A, piv, n):
            return -1
        lu_solve(A, piv, r, n)
        done = True
        for s in range(n):
            if not np.isfinite(r[s]):
                return -1
            y[s] += r[s]
            if abs(r[s]) > NEWTON_TOL * scale[s]:
                done = False
        if done:
            return nf
    return -1
