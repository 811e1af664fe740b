"""Optimal one-to-one matching of test spikes to reference spikes, cell by cell.

Within one cell, a matching pairs reference spikes with test spikes so that
each spike is in at most one pair, pairs keep the order of both trains, and
every pair satisfies ``|test - reference| <= window``. Among all such
matchings we take one that first has the most pairs and then the smallest
summed ``|shift|``. Keeping the order loses nothing: two crossing pairs that
both fit the window can be uncrossed into two pairs that also fit and whose
summed shift is no larger.

Greedy nearest-neighbour matching is not enough: a reference spike may take
the test spike that its neighbour needed and leave that neighbour unmatched.
The dynamic programme below is exact.

Dynamic programme
-----------------
``F(i, j)`` is the best (pairs, -summed shift) using the first ``i`` reference
and first ``j`` test spikes, with
``F(i, j) = max(F(i-1, j), F(i, j-1), F(i-1, j-1) + (1, -|s_j - r_i|))``,
the last term only when the pair fits the window. Reference spike ``i`` can
only pair with the test spikes in its window, ``[lo_i, hi_i)``. Outside that
band a row copies known values (``F(i, j) = F(i-1, j)`` left of it,
``F(i, j) = F(i, hi_i)`` right of it), so one array over ``j`` updated in place
on the band alone holds the whole table. Work and memory are
``O(n_ref + n_test + sum of band widths)``: linear in the spike count for a
fixed window and firing rate.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import prange

from .._numba import jit, pjit
from ..errors import InputError
from .rasters import Raster

_UP, _LEFT, _PAIR = 0, 1, 2


@jit
def _bands(r, s, w, lo, hi):
    """Test-spike index range ``[lo[i], hi[i])`` with ``|s - r[i]| <= w``, for each i.

    Both trains sorted; two pointers, linear time. Returns the summed width.
    """
    a = 0
    b = 0
    total = 0
    for i in range(r.size):
        while a < s.size and s[a] < r[i] - w:
            a += 1
        while b < s.size and s[b] <= r[i] + w:
            b += 1
        lo[i] = a
        hi[i] = b
        total += b - a
    return total


@jit
def _match_train(r, s, w, r_partner, s_partner):
    """Optimal order-preserving matching of one cell (see the module notes).

    Parameters
    ----------
    r, s : ndarray of float64
        Sorted reference and test spike times (ms).
    w : float
        Largest allowed ``|s - r|`` (ms).
    r_partner, s_partner : ndarray of int64
        Output: index of the partner in the other train, or -1.
    """
    n = r.size
    m = s.size
    r_partner[:] = -1
    s_partner[:] = -1
    if n == 0 or m == 0:
        return
    lo = np.empty(n, np.int64)
    hi = np.empty(n, np.int64)
    total = _bands(r, s, w, lo, hi)
    start = np.empty(n, np.int64)
    acc = 0
    for i in range(n):
        start[i] = acc
        acc += hi[i] - lo[i]
    choice = np.empty(total, np.int8)
    pairs = np.zeros(m + 1, np.int64)      # F(., j) pairs for the row last written
    shift = np.zeros(m + 1, np.float64)    # F(., j) summed |shift|
    filled = 0                             # entries beyond `filled` equal entry `filled`
    for i in range(n):
        a = lo[i]
        b = hi[i]
        while filled < b:
            filled += 1
            pairs[filled] = pairs[filled - 1]
            shift[filled] = shift[filled - 1]
        # F(i, a) is F(i-1, a): reference i cannot pair with the first a test spikes.
        diag_p = pairs[a]
        diag_s = shift[a]
        left_p = diag_p
        left_s = diag_s
        for jj in range(a + 1, b + 1):
            up_p = pairs[jj]
            up_s = shift[jj]
            best_p = up_p
            best_s = up_s
            best = _UP
            if left_p > best_p or (left_p == best_p and left_s < best_s):
                best_p = left_p
                best_s = left_s
                best = _LEFT
            pair_p = diag_p + 1
            pair_s = diag_s + abs(s[jj - 1] - r[i])
            if pair_p > best_p or (pair_p == best_p and pair_s < best_s):
                best_p = pair_p
                best_s = pair_s
                best = _PAIR
            choice[start[i] + jj - 1 - a] = best
            diag_p = up_p
            diag_s = up_s
            pairs[jj] = best_p
            shift[jj] = best_s
            left_p = best_p
            left_s = best_s
    # Trace back from F(n, m).
    i = n
    jj = m
    while i > 0 and jj > 0:
        a = lo[i - 1]
        b = hi[i - 1]
        if jj > b:
            jj = b
        elif jj <= a:
            i -= 1
        else:
            c = choice[start[i - 1] + jj - 1 - a]
            if c == _UP:
                i -= 1
            elif c == _LEFT:
                jj -= 1
            else:
                r_partner[i - 1] = jj - 1
                s_partner[jj - 1] = i - 1
                i -= 1
                jj -= 1


@pjit
def _match_cells(r_time, r_off, s_time, s_off, w, r_partner, s_partner):
    """Match every cell in parallel; partners are global spike indices.

    Each cell writes only its own slices, so the result does not depend on
    the thread count.
    """
    for c in prange(r_off.size - 1):
        r0 = r_off[c]
        r1 = r_off[c + 1]
        s0 = s_off[c]
        s1 = s_off[c + 1]
        _match_train(r_time[r0:r1], s_time[s0:s1], w, r_partner[r0:r1], s_partner[s0:s1])
        for k in range(r0, r1):
            if r_partner[k] >= 0:
                r_partner[k] += s0
        for k in range(s0, s1):
            if s_partner[k] >= 0:
                s_partner[k] += r0


def _check_window(window_ms: float, name: str = "match_window_ms") -> float:
    window_ms = float(window_ms)
    if not (window_ms >= 0 and np.isfinite(window_ms)):
        raise InputError(f"{name} must be a finite number >= 0, got {window_ms}")
    return window_ms


def match_trains(reference, test, window_ms: float = 2.0):
    """Optimally match two sorted spike trains of one cell.

    Parameters
    ----------
    reference, test : array_like of float, shape (n,), (m,)
        Sorted spike times (ms).
    window_ms : float
        Largest allowed ``|test - reference|`` (ms), inclusive.

    Returns
    -------
    ref_partner : ndarray of int64, shape (n,)
        Index of the matched test spike, or -1 (missed).
    test_partner : ndarray of int64, shape (m,)
        Index of the matched reference spike, or -1 (extra).
    """
    r = np.ascontiguousarray(reference, dtype=np.float64)
    s = np.ascontiguousarray(test, dtype=np.float64)
    for name, x in (("reference", r), ("test", s)):
        if np.any(np.diff(x) < 0):
            raise InputError(f"{name} spike times must be sorted")
    rp = np.empty(r.size, np.int64)
    sp = np.empty(s.size, np.int64)
    _match_train(r, s, _check_window(window_ms), rp, sp)
    return rp, sp


@dataclass(frozen=True)
class Matching:
    """Result of matching two rasters.

    Attributes
    ----------
    ref_partner : ndarray of int64, shape (n_ref_spikes,)
        For each reference spike, the index of its test spike, or -1 (missed).
    test_partner : ndarray of int64, shape (n_test_spikes,)
        For each test spike, the index of its reference spike, or -1 (extra).
    window_ms : float
        The match window (ms).
    """

    ref_partner: np.ndarray
    test_partner: np.ndarray
    window_ms: float

    @property
    def n_matched(self) -> int:
        """Number of pairs."""
        return int(np.count_nonzero(self.ref_partner >= 0))


def match_rasters(reference: Raster, test: Raster, window_ms: float = 2.0) -> Matching:
    """Match two rasters cell by cell (parallel over cells, deterministic).

    Parameters
    ----------
    reference, test : Raster
        Rasters with the same ``n_cells``.
    window_ms : float
        Largest allowed ``|test - reference|`` (ms), inclusive.
    """
    if reference.n_cells != test.n_cells:
        raise InputError(f"cannot match {reference.source} ({reference.n_cells} cells) with "
                         f"{test.source} ({test.n_cells} cells)")
    rp = np.empty(reference.n_spikes, np.int64)
    sp = np.empty(test.n_spikes, np.int64)
    _match_cells(reference.time_ms, reference.offsets, test.time_ms, test.offsets,
                 _check_window(window_ms), rp, sp)
    return Matching(ref_partner=rp, test_partner=sp, window_ms=float(window_ms))
