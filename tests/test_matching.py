"""Optimal spike matching: pen-and-paper cases, a slow obvious twin, an assignment solver, properties."""
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import linear_sum_assignment

from spikegauge.analysis import Raster, match_rasters, match_trains
from spikegauge.errors import InputError


def slow_match(r, s, w):
    """The obvious O(n m) dynamic programme over the full table: (pairs, summed |shift|)."""
    n, m = len(r), len(s)
    best = [[(0, 0.0)] * (m + 1) for _ in range(n + 1)]
    for i in range(1, n + 1):
        for j in range(1, m + 1):
            options = [best[i - 1][j], best[i][j - 1]]
            d = abs(s[j - 1] - r[i - 1])
            if d <= w:
                p, c = best[i - 1][j - 1]
                options.append((p + 1, c + d))
            best[i][j] = max(options, key=lambda pc: (pc[0], -pc[1]))
    return best[n][m]


def assignment_match(r, s, w):
    """Best one-to-one matching without the order constraint, by scipy's assignment solver.

    A pair within the window costs |shift| - BIG, any other assignment 0, so the
    solver first maximises the pairs, then minimises the summed shift.
    """
    if len(r) == 0 or len(s) == 0:
        return 0, 0.0
    big = 1e6
    d = np.abs(np.subtract.outer(np.asarray(r), np.asarray(s)))
    cost = np.where(d <= w, d - big, 0.0)
    rows, cols = linear_sum_assignment(cost)
    ok = d[rows, cols] <= w
    return int(ok.sum()), float(d[rows, cols][ok].sum())


def greedy_match(r, s, w):
    """Greedy: repeatedly pair the closest remaining (reference, test) spikes within the window."""
    cand = sorted((abs(b - a), i, j) for i, a in enumerate(r) for j, b in enumerate(s) if abs(b - a) <= w)
    used_r, used_s, pairs = set(), set(), 0
    for _, i, j in cand:
        if i not in used_r and j not in used_s:
            used_r.add(i)
            used_s.add(j)
            pairs += 1
    return pairs


def summary(r, s, w):
    rp, sp = match_trains(r, s, w)
    ok = rp >= 0
    return int(ok.sum()), float(np.abs(np.asarray(s)[rp[ok]] - np.asarray(r)[ok]).sum())


# --- pen and paper -----------------------------------------------------------------------------

def test_identical_trains_match_one_to_one():
    r = [1.0, 5.0, 5.5, 20.0]
    rp, sp = match_trains(r, r, 2.0)
    assert rp.tolist() == [0, 1, 2, 3] and sp.tolist() == [0, 1, 2, 3]


def test_one_shifted_one_missing_one_extra():
    # reference 10, 20, 30; test moves 20 to 20.5, drops 30 and adds 45
    rp, sp = match_trains([10.0, 20.0, 30.0], [10.0, 20.5, 45.0], 2.0)
    assert rp.tolist() == [0, 1, -1]       # 30 missed
    assert sp.tolist() == [0, 1, -1]       # 45 extra


def test_window_is_inclusive_and_exclusive_beyond():
    assert match_trains([0.0], [2.0], 2.0)[0].tolist() == [0]
    assert match_trains([0.0], [2.0 + 1e-9], 2.0)[0].tolist() == [-1]


def test_greedy_nearest_neighbour_is_wrong_here():
    # Pen and paper: r = 1.0, 2.0; s = 1.9, 2.9; w = 1. The closest pair (2.0, 1.9)
    # leaves 1.0 and 2.9 apart by 1.9 > w: greedy finds 1 pair. Pairing (1.0, 1.9)
    # and (2.0, 2.9) gives 2 pairs with shifts +0.9, +0.9.
    r, s = [1.0, 2.0], [1.9, 2.9]
    assert greedy_match(r, s, 1.0) == 1
    rp, _ = match_trains(r, s, 1.0)
    assert rp.tolist() == [0, 1]


def test_equal_count_prefers_smaller_shift():
    # one reference spike at 1.0; test spikes at 0.2 (|shift| 0.8) and 1.5 (0.5)
    rp, sp = match_trains([1.0], [0.2, 1.5], 1.0)
    assert rp.tolist() == [1] and sp.tolist() == [-1, 0]


def test_more_pairs_beat_smaller_shift():
    # r = 0, 1; s = 0.9. Pairing 1 with 0.9 (0.1) or 0 with 0.9 (0.9): one pair either way,
    # the smaller shift wins. Adding s = -0.5 makes two pairs possible only via (0, -0.5), (1, 0.9).
    assert match_trains([0.0, 1.0], [0.9], 1.0)[0].tolist() == [-1, 0]
    assert match_trains([0.0, 1.0], [-0.5, 0.9], 1.0)[0].tolist() == [0, 1]


def test_empty_trains():
    rp, sp = match_trains([], [1.0, 2.0], 2.0)
    assert rp.size == 0 and sp.tolist() == [-1, -1]
    rp, sp = match_trains([1.0], [], 2.0)
    assert rp.tolist() == [-1] and sp.size == 0


def test_bad_arguments():
    with pytest.raises(InputError):
        match_trains([2.0, 1.0], [1.0], 1.0)
    with pytest.raises(InputError):
        match_trains([1.0], [1.0], -1.0)
    with pytest.raises(InputError):
        match_trains([1.0], [1.0], float("nan"))


# --- against the slow twin and an assignment solver --------------------------------------------

def test_against_slow_twin_and_assignment_solver():
    rng = np.random.default_rng(3)
    for k in range(400):
        n, m = rng.integers(0, 14, size=2)
        r = np.sort(rng.uniform(0.0, 20.0, n))
        s = np.sort(rng.uniform(0.0, 20.0, m))
        if k % 4 == 0:                     # ties and equal times
            r, s = np.round(r), np.round(s)
        w = rng.uniform(0.0, 4.0)
        pairs, shift = summary(r, s, w)
        p_slow, c_slow = slow_match(r, s, w)
        assert pairs == p_slow
        assert shift == pytest.approx(c_slow, rel=1e-12, abs=1e-12)
        # The order constraint costs nothing (scipy.optimize.linear_sum_assignment, unconstrained).
        p_lsa, c_lsa = assignment_match(r, s, w)
        assert pairs == p_lsa
        assert shift == pytest.approx(c_lsa, rel=1e-9, abs=1e-9)


def test_pairs_are_order_preserving_and_within_window():
    rng = np.random.default_rng(4)
    r = np.sort(rng.uniform(0, 1000, 300))
    kept = r[rng.random(300) < 0.9]
    s = np.sort(np.concatenate([kept + rng.normal(0, 0.7, kept.size), rng.uniform(0, 1000, 30)]))
    rp, sp = match_trains(r, s, 2.0)
    idx = rp[rp >= 0]
    assert np.all(np.diff(idx) > 0)
    assert np.all(np.abs(s[idx] - r[rp >= 0]) <= 2.0)
    assert np.array_equal(sp[idx], np.flatnonzero(rp >= 0))


def test_rasters_match_cell_by_cell_with_global_indices():
    ref = Raster.from_arrays([0, 0, 1, 2], [1.0, 5.0, 1.0, 3.0], n_cells=4, t_stop_ms=10.0)
    test = Raster.from_arrays([0, 1, 1, 2], [5.2, 0.9, 1.5, 8.0], n_cells=4, t_stop_ms=10.0)
    m = match_rasters(ref, test, 1.0)
    # cell 0: 5.0 <-> 5.2 ; cell 1: 1.0 <-> 0.9 (smaller shift than 1.5) ; cell 2: none
    assert m.ref_partner.tolist() == [-1, 0, 1, -1]
    assert m.test_partner.tolist() == [1, 2, -1, -1]
    assert m.n_matched == 2


def test_parallel_result_does_not_depend_on_thread_count():
    import numba
    from spikegauge.analysis import bench_rasters
    ref, test = bench_rasters(200, 20_000, 1)
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = match_rasters(ref, test, 2.0)
        numba.set_num_threads(numba.config.NUMBA_NUM_THREADS)
        many = match_rasters(ref, test, 2.0)
    finally:
        numba.set_num_threads(before)
    assert np.array_equal(one.ref_partner, many.ref_partner)
    assert np.array_equal(one.test_partner, many.test_partner)


# --- properties ----------------------------------------------------------------------------------

times = st.lists(st.floats(min_value=0.0, max_value=50.0, allow_nan=False, width=32), max_size=25)


@settings(max_examples=150, deadline=None)
@given(times, times, st.floats(min_value=0.0, max_value=5.0))
def test_counts_add_up_and_swap_is_symmetric(a, b, w):
    r, s = np.sort(np.array(a, dtype=float)), np.sort(np.array(b, dtype=float))
    rp, sp = match_trains(r, s, w)
    matched = int((rp >= 0).sum())
    assert matched + int((rp < 0).sum()) == r.size          # matched + missed = reference count
    assert matched + int((sp < 0).sum()) == s.size          # matched + extra = test count
    assert int((sp >= 0).sum()) == matched
    # Swapping the trains: missed <-> extra, same pair count and summed |shift|.
    rp2, sp2 = match_trains(s, r, w)
    assert int((sp2 < 0).sum()) == int((rp < 0).sum())
    assert int((rp2 < 0).sum()) == int((sp < 0).sum())
    assert summary(s, r, w)[1] == pytest.approx(summary(r, s, w)[1], rel=1e-9, abs=1e-9)


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(0, 40), st.integers(0, 40))
def test_swap_negates_shifts(seed, n, m):
    # Continuous random times: the optimal matching is unique, so the swapped
    # matching has exactly the negated shifts.
    rng = np.random.default_rng(seed)
    r, s = np.sort(rng.uniform(0, 100, n)), np.sort(rng.uniform(0, 100, m))
    rp, _ = match_trains(r, s, 3.0)
    rp2, _ = match_trains(s, r, 3.0)
    shift = s[rp[rp >= 0]] - r[rp >= 0]
    shift2 = r[rp2[rp2 >= 0]] - s[rp2 >= 0]
    np.testing.assert_allclose(np.sort(-shift2), np.sort(shift), rtol=0, atol=1e-12)
