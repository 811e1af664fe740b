"""Threshold crossings on a stepper's dense output (crossing ``dense``).

The adaptive steppers give, over each accepted step, the voltage as a
polynomial in theta = (t - t_step) / h of degree at most five (the cubic
Hermite interpolant of ``bs32`` and ``rodas3``, the quartic continuous
extension of ``dp54``, the interpolating polynomial of ``bdf`` of its current
order, 1 to 5), in the power basis ``c[0] + c[1] th + ... + c[5] th^5``.

Upward crossings are found the way :func:`spikegauge.integrate.crossing.hermite_first_crossing`
finds them, generalised to degree four: the polynomial's critical points split
[0, 1] into monotone pieces, and a piece that starts below the level and ends
at or above it holds exactly one upward crossing. A crossing and recrossing
inside one step (a short spike whose peak lies between the step's ends) is
therefore found even when both step ends lie below threshold. Critical points
of a quartic are the roots of a cubic, found the same way one degree down
(roots of its quadratic derivative bracket them), and those of a quintic the
roots of a quartic, one degree further down, so no closed-form cubic or
quartic formula with its cancellation problems is needed.
"""
import numpy as np

from .._numba import jit

MAX_DEGREE = 5


@jit
def poly_value(c, deg, th):
    """Horner evaluation of ``sum_k c[k] th^k``, k = 0..deg."""
    v = c[deg]
    for k in range(deg - 1, -1, -1):
        v = v * th + c[k]
    return v


@jit
def poly_slope(c, deg, th):
    """Derivative of :func:`poly_value` with respect to ``th``."""
    if deg == 0:
        return 0.0
    v = deg * c[deg]
    for k in range(deg - 1, 0, -1):
        v = v * th + k * c[k]
    return v


@jit
def _root_in(c, deg, a, b, rising):
    """Root of the polynomial on [a, b] where it is monotone and changes sign.

    ``rising``: the polynomial goes from < 0 at ``a`` to >= 0 at ``b`` (else
    from > 0 to <= 0). Safeguarded Newton: a Newton iterate outside the bracket
    is replaced by bisection. Returns the left end of the final bracket's
    sign change to about 1e-16 in theta.
    """
    lo = a
    hi = b
    x = 0.5 * (lo + hi)
    for _ in range(200):
        g = poly_value(c, deg, x)
        if (g >= 0.0) == rising:
            hi = x
        else:
            lo = x
        if hi - lo <= 4e-16:
            break
        d = poly_slope(c, deg, x)
        xn = x - g / d if d != 0.0 else 0.5 * (lo + hi)
        if not (lo < xn < hi):
            xn = 0.5 * (lo + hi)
        if xn == x:
            break
        x = xn
    # the crossing point itself: the first point of the bracket on the far side
    g = poly_value(c, deg, x)
    if (g >= 0.0) != rising:
        return hi
    return x


@jit
def unit_critical_points(c, deg, out):
    """Sorted roots in (0, 1) of the derivative of a polynomial of degree <= 5.

    Parameters
    ----------
    c : ndarray, shape (>= deg + 1,)
        Power-basis coefficients.
    deg : int
    out : ndarray, shape (>= 4,)
        Receives the critical points.

    Returns
    -------
    int
        Number of critical points written.
    """
    # derivative coefficients, degree deg - 1
    d = np.zeros(MAX_DEGREE)
    dd = deg - 1
    for k in range(1, deg + 1):
        d[k - 1] = k * c[k]
    while dd > 0 and d[dd] == 0.0:
        dd -= 1
    if dd <= 0:
        return 0
    if dd == 1:
        r = -d[0] / d[1]
        if 0.0 < r < 1.0:
            out[0] = r
            return 1
        return 0
    if dd == 2:
        return _quadratic_unit_roots(d[2], d[1], d[0], out)
    if dd == 3:
        return _cubic_unit_roots(d, out)
    return _quartic_unit_roots(d, out)


@jit
def _cubic_unit_roots(d, out):
    """Sorted distinct roots in (0, 1) of the cubic ``d[0] + ... + d[3] x^3`` (``d[3] != 0``).

    The roots of its own derivative (a quadratic) split [0, 1] into monotone
    pieces, each holding at most one root.
    """
    brk = np.empty(4)
    nb = _quadratic_unit_roots(3.0 * d[3], 2.0 * d[2], d[1], brk[1:])
    return _roots_of_monotone_pieces(d, 3, brk, nb, out)


@jit
def _quartic_unit_roots(d, out):
    """Sorted distinct roots in (0, 1) of the quartic ``d[0] + ... + d[4] x^4`` (``d[4] != 0``).

    The roots of its derivative (a cubic, :func:`_cubic_unit_roots`) split
    [0, 1] into monotone pieces, each holding at most one root.
    """
    dd = np.empty(4)
    for k in range(1, 5):
        dd[k - 1] = k * d[k]
    brk = np.empty(5)
    if dd[3] != 0.0:
        nb = _cubic_unit_roots(dd, brk[1:])
    else:
        nb = _quadratic_unit_roots(dd[2], dd[1], dd[0], brk[1:])
    return _roots_of_monotone_pieces(d, 4, brk, nb, out)


@jit
def _roots_of_monotone_pieces(d, deg, brk, nb, out):
    """Sorted distinct roots in (0, 1) of the polynomial ``d`` of degree ``deg``, given the
    ``nb`` breakpoints ``brk[1:nb + 1]`` (sorted, in (0, 1)) between which it is monotone."""
    brk[0] = 0.0
    brk[nb + 1] = 1.0
    m = 0
    for j in range(nb + 1):
        ga = poly_value(d, deg, brk[j])
        gb = poly_value(d, deg, brk[j + 1])
        if ga < 0.0 <= gb and brk[j] < brk[j + 1]:
            r = _root_in(d, deg, brk[j], brk[j + 1], True)
        elif ga > 0.0 >= gb and brk[j] < brk[j + 1]:
            r = _root_in(d, deg, brk[j], brk[j + 1], False)
        else:
            continue
        if 0.0 < r < 1.0 and (m == 0 or r > out[m - 1]):
            out[m] = r
            m += 1
    return m


@jit
def _quadratic_unit_roots(A, B, C, out):
    """Sorted distinct roots in (0, 1) of A x^2 + B x + C (numerically stable form)."""
    if A == 0.0:
        if B == 0.0:
            return 0
        r = -C / B
        if 0.0 < r < 1.0:
            out[0] = r
            return 1
        return 0
    disc = B * B - 4.0 * A * C
    if disc < 0.0:
        return 0
    sq = np.sqrt(disc)
    q = -0.5 * (B + np.copysign(sq, B))
    r1 = q / A
    r2 = C / q if q != 0.0 else r1
    lo = min(r1, r2)
    hi = max(r1, r2)
    m = 0
    if 0.0 < lo < 1.0:
        out[m] = lo
        m += 1
    if 0.0 < hi < 1.0 and hi != lo:
        out[m] = hi
        m += 1
    return m


@jit
def upward_crossings(c, deg, level, th_max, out):
    """Every upward crossing of ``level`` by the polynomial in (0, th_max].

    Parameters
    ----------
    c : ndarray, shape (>= deg + 1,)
        Power-basis coefficients of the voltage over the step.
    deg : int
        Degree, at most 5.
    level : float
        Threshold (same unit as the polynomial).
    th_max : float
        Last theta searched (1 for the whole step).
    out : ndarray, shape (>= 3,)
        Receives the crossing thetas in increasing order (at most three).

    Returns
    -------
    int
        Number of crossings. A crossing is a point where the polynomial passes
        from below ``level`` to at or above it; a start at or above ``level``
        is not one.
    """
    # quick exit: on [0, 1] the polynomial is at most c0 + sum of its positive coefficients
    bound = c[0]
    for k in range(1, deg + 1):
        if c[k] > 0.0:
            bound += c[k]
    if bound < level:
        return 0
    cc = np.empty(MAX_DEGREE + 1)
    for k in range(deg + 1):
        cc[k] = c[k]
    cc[0] -= level
    pts = np.empty(MAX_DEGREE + 1)
    ncrit = unit_critical_points(cc, deg, pts[1:])
    pts[0] = 0.0
    npts = 1 + ncrit
    pts[npts] = 1.0
    npts += 1
    m = 0
    for j in range(1, npts):
        a = pts[j - 1]
        if a >= th_max:
            break
        b = min(pts[j], th_max)
        if poly_value(cc, deg, a) < 0.0 <= poly_value(cc, deg, b):
            out[m] = _root_in(cc, deg, a, b, True)
            m += 1
    return m
