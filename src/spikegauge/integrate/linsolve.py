"""Small dense linear systems inside kernels (a cell's states: at most a few unknowns).

Written out rather than ``np.linalg``: for these sizes they are as accurate,
never raise (a singular or non-finite system is a return value the drivers
turn into a divergence status), and numba compiles LAPACK's binding in about
5 s, a sixth of a cold start. Checked against ``numpy.linalg.solve`` in
tests/test_engine_parts.py.
"""
import numpy as np

from .._numba import jit


@jit
def lu_factor(M, piv, n):
    """In-place LU with partial pivoting of ``M[:n, :n]``; False when singular."""
    for k in range(n):
        pk = k
        big = abs(M[k, k])
        for r in range(k + 1, n):
            if abs(M[r, k]) > big:
                big = abs(M[r, k])
                pk = r
        if not (big > 0.0) or not np.isfinite(big):
            return False
        piv[k] = pk
        if pk != k:
            for q in range(n):
                tmp = M[k, q]
                M[k, q] = M[pk, q]
                M[pk, q] = tmp
        for r in range(k + 1, n):
            f = M[r, k] / M[k, k]
            M[r, k] = f
            for q in range(k + 1, n):
                M[r, q] -= f * M[k, q]
    return True


@jit
def lu_solve(M, piv, b, n):
    """Solve with the factors of :func:`lu_factor`, overwriting ``b[:n]``."""
    for k in range(n):
        pk = piv[k]
        if pk != k:
            tmp = b[k]
            b[k] = b[pk]
            b[pk] = tmp
    for r in range(n):
        acc = b[r]
        for q in range(r):
            acc -= M[r, q] * b[q]
        b[r] = acc
    for r in range(n - 1, -1, -1):
        acc = b[r]
        for q in range(r + 1, n):
            acc -= M[r, q] * b[q]
        b[r] = acc / M[r, r]
