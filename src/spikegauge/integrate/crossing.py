"""Threshold-crossing location inside a step, from the step's end values.

Times are in units of the step, theta in [0, 1]. ``linear`` interpolates the
voltage between the step ends; ``hermite`` uses the cubic Hermite interpolant
built from values and derivatives at both ends, which is fourth-order accurate
and can reveal a crossing and recrossing inside one step through its interior
maximum (Hansel et al. 1998; Shelley & Tao 2001).
"""
import numpy as np

from .._numba import jit

CROSS_STEP = 0
CROSS_LINEAR = 1
CROSS_HERMITE = 2
CROSS_DENSE = 3
CROSSING_CODES = {"step": CROSS_STEP, "linear": CROSS_LINEAR, "hermite": CROSS_HERMITE,
                  "dense": CROSS_DENSE}


@jit
def hermite_value(y0, y1, f0, f1, h, th):
    """Cubic Hermite interpolant at ``th`` (0..1) over a step of length ``h``."""
    th2 = th * th
    th3 = th2 * th
    h00 = 2.0 * th3 - 3.0 * th2 + 1.0
    h10 = th3 - 2.0 * th2 + th
    h01 = -2.0 * th3 + 3.0 * th2
    h11 = th3 - th2
    return h00 * y0 + h10 * h * f0 + h01 * y1 + h11 * h * f1


@jit
def hermite_slope(y0, y1, f0, f1, h, th):
    """d/dtheta of :func:`hermite_value`."""
    th2 = th * th
    return ((6.0 * th2 - 6.0 * th) * y0 + (3.0 * th2 - 4.0 * th + 1.0) * h * f0
            + (-6.0 * th2 + 6.0 * th) * y1 + (3.0 * th2 - 2.0 * th) * h * f1)


@jit
def _bracketed_root(y0, y1, f0, f1, h, level, a, b):
    """Root of hermite_value - level on [a, b], where it changes from < 0 to >= 0.

    Safeguarded Newton: a Newton step that leaves the bracket is replaced by
    bisection. Converges to about 1e-15 in theta.
    """
    x = 0.5 * (a + b)
    for _ in range(200):
        g = hermite_value(y0, y1, f0, f1, h, x) - level
        if g >= 0.0:
            b = x
        else:
            a = x
        if b - a <= 4e-16:
            return b
        d = hermite_slope(y0, y1, f0, f1, h, x)
        xn = x - g / d if d != 0.0 else 0.5 * (a + b)
        if abs(xn - x) <= 1e-15 * max(1.0, abs(x)):  # Newton has converged
            return min(max(xn, a), b)
        if not (a < xn < b):
            xn = 0.5 * (a + b)
        x = xn
    return b


@jit
def hermite_first_crossing(y0, y1, f0, f1, h, level):
    """First upward crossing of ``level`` by the cubic Hermite interpolant in (0, 1].

    Returns theta, or -1.0 when the cubic stays below ``level``. Requires
    ``y0 < level``. The cubic's critical points split [0, 1] into monotone
    pieces; the first piece that ends at or above ``level`` holds the crossing,
    so a crossing and recrossing inside one step is found too.
    """
    # d/dth = A th^2 + B th + C
    A = 6.0 * y0 + 3.0 * h * f0 - 6.0 * y1 + 3.0 * h * f1
    B = -6.0 * y0 - 4.0 * h * f0 + 6.0 * y1 - 2.0 * h * f1
    C = h * f0
    # Interior critical points in (0, 1), ascending; NaN marks "none". Scalars
    # rather than a small array: this runs every step, and an allocation per
    # step costs more than the whole search.
    c1 = np.nan
    c2 = np.nan
    if A != 0.0:
        disc = B * B - 4.0 * A * C
        if disc >= 0.0:
            sq = np.sqrt(disc)
            # numerically stable quadratic roots
            q = -0.5 * (B + np.copysign(sq, B))
            r1 = q / A
            r2 = C / q if q != 0.0 else r1
            lo = min(r1, r2)
            hi = max(r1, r2)
            if 0.0 < lo < 1.0:
                c1 = lo
            if 0.0 < hi < 1.0 and hi != lo:
                if c1 == c1:
                    c2 = hi
                else:
                    c1 = hi
    elif B != 0.0:
        r = -C / B
        if 0.0 < r < 1.0:
            c1 = r
    left = 0.0
    for j in range(3):
        right = c1 if j == 0 else (c2 if j == 1 else 1.0)
        if right != right:
            continue
        if hermite_value(y0, y1, f0, f1, h, right) >= level:
            return _bracketed_root(y0, y1, f0, f1, h, level, left, right)
        left = right
    return -1.0


@jit
def linear_crossing(v0, v1, level):
    """Fraction of the step at which the straight line from v0 to v1 reaches ``level``."""
    th = (level - v0) / (v1 - v0)
    if not (th >= 0.0):
        return 0.0
    if th > 1.0:
        return 1.0
    return th
