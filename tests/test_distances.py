"""Spike-train distances against elephant, brute-force integrals, slow twins and pen and paper."""
import warnings

import neo
import numpy as np
import pytest
import quantities as pq
from elephant.spike_train_dissimilarity import van_rossum_distance as elephant_van_rossum
from elephant.spike_train_dissimilarity import victor_purpura_distance as elephant_victor_purpura
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import simpson

from spikegauge.analysis import (Raster, coincidence_factor, coincidence_factor_per_cell,
                                 poisson_raster, van_rossum_distance, van_rossum_per_cell,
                                 victor_purpura_distance, victor_purpura_per_cell)
from spikegauge.analysis.distances import _finish_squared
from spikegauge.errors import InputError


def poisson_train(rng, rate_hz, duration_ms):
    return np.sort(rng.uniform(0.0, duration_ms, rng.poisson(rate_hz * duration_ms * 1e-3)))


def neo_train(t, duration_ms):
    return neo.SpikeTrain(np.asarray(t) * pq.ms, t_start=0 * pq.ms, t_stop=duration_ms * pq.ms)


def slow_van_rossum(a, b, tau):
    """Closed form of van Rossum (2001) summed over all pairs, O(n^2)."""
    def k(x, y):
        return np.exp(-np.abs(np.subtract.outer(x, y)) / tau).sum() if len(x) and len(y) else 0.0
    return np.sqrt(max(0.5 * (k(a, a) + k(b, b) - 2 * k(a, b)), 0.0))


def slow_victor_purpura(a, b, q):
    """The textbook O(n m) edit-distance table of Victor & Purpura (1996)."""
    n, m = len(a), len(b)
    g = np.zeros((n + 1, m + 1))
    g[:, 0] = np.arange(n + 1)
    g[0, :] = np.arange(m + 1)
    for i in range(1, n + 1):
        for j in range(1, m + 1):
            g[i, j] = min(g[i - 1, j] + 1, g[i, j - 1] + 1, g[i - 1, j - 1] + q * abs(a[i - 1] - b[j - 1]))
    return g[n, m]


# --- van Rossum ----------------------------------------------------------------------------------

def test_van_rossum_matches_elephant_on_poisson_trains():
    # elephant.spike_train_dissimilarity.van_rossum_distance omits van Rossum's 1/2:
    # divide it by sqrt(2) (shared/CHECKS.md).
    rng = np.random.default_rng(10)
    duration = 2000.0
    for tau in (0.5, 5.0, 20.0, 200.0):
        for _ in range(10):
            a, b = poisson_train(rng, 20.0, duration), poisson_train(rng, 20.0, duration)
            ref = elephant_van_rossum([neo_train(a, duration), neo_train(b, duration)], tau * pq.ms)[0, 1]
            assert van_rossum_distance(a, b, tau) == pytest.approx(ref / np.sqrt(2), rel=1e-9)


def test_van_rossum_per_cell_matches_elephant():
    rng = np.random.default_rng(11)
    ref = poisson_raster(30, 15.0, 3000.0, rng)
    test = poisson_raster(30, 15.0, 3000.0, rng)
    ours = van_rossum_per_cell(ref, test, 5.0)
    for c in range(30):
        theirs = elephant_van_rossum([neo_train(ref.train(c), 3000.0), neo_train(test.train(c), 3000.0)],
                                     5.0 * pq.ms)[0, 1] / np.sqrt(2)
        assert ours[c] == pytest.approx(theirs, rel=1e-9)


def test_van_rossum_matches_brute_force_integral():
    # D^2 = (1/tau) * integral of (f - g)^2, f and g the causally filtered trains
    # (van Rossum 2001), integrated numerically with Simpson's rule
    # (scipy.integrate.simpson) on a fine grid between consecutive spikes, up to
    # the last spike + 20 tau.
    rng = np.random.default_rng(12)
    for tau in (2.0, 10.0):
        a, b = poisson_train(rng, 40.0, 300.0), poisson_train(rng, 40.0, 300.0)
        edges = np.unique(np.concatenate([a, b, [0.0, max(a.max(), b.max()) + 20 * tau]]))
        total = 0.0
        for lo, hi in zip(edges[:-1], edges[1:]):
            t = np.linspace(lo, hi, 401)
            # No spike inside (lo, hi): filter the spikes up to lo, extended to the left limit at hi.
            f = np.exp(-(t[:, None] - a[a <= lo][None, :]) / tau).sum(axis=1)
            g = np.exp(-(t[:, None] - b[b <= lo][None, :]) / tau).sum(axis=1)
            total += simpson((f - g) ** 2, x=t)
        assert van_rossum_distance(a, b, tau) == pytest.approx(np.sqrt(total / tau), rel=1e-4)


def test_van_rossum_pen_and_paper_and_limits():
    # one spike against none: D^2 = (1/tau) * integral e^{-2t/tau} = 1/2
    assert van_rossum_distance([], [3.0], 5.0) == pytest.approx(np.sqrt(0.5), rel=1e-15)
    assert van_rossum_distance([1.0, 4.0], [1.0, 4.0], 5.0) == 0.0
    # far from time zero: an extra spike 10 ms after a shared one still adds exactly 1/2
    assert van_rossum_distance([-1e5, -99990.0], [-1e5], 5.0) == pytest.approx(np.sqrt(0.5), rel=1e-14)
    # two spikes dt apart: D^2 = 1 - exp(-dt / tau)
    assert van_rossum_distance([0.0], [2.0], 5.0) == pytest.approx(np.sqrt(1 - np.exp(-0.4)), rel=1e-14)
    # limits, as elephant defines them after the sqrt(2) conversion
    assert van_rossum_distance([1.0, 2.0], [5.0], 0.0) == pytest.approx(np.sqrt(1.5))
    assert van_rossum_distance([1.0, 2.0, 3.0], [5.0], np.inf) == pytest.approx(2 / np.sqrt(2))
    with pytest.raises(InputError):
        van_rossum_distance([1.0], [np.nan], 5.0)
    with pytest.raises(InputError):
        van_rossum_distance([1.0], [2.0], -1.0)


def test_van_rossum_linear_kernel_against_slow_twin():
    rng = np.random.default_rng(13)
    for _ in range(50):
        a = np.sort(np.round(rng.uniform(0, 50, rng.integers(0, 15)), 1))   # equal times included
        b = np.sort(np.round(rng.uniform(0, 50, rng.integers(0, 15)), 1))
        assert van_rossum_distance(a, b, 3.0) == pytest.approx(slow_van_rossum(a, b, 3.0), rel=1e-9, abs=1e-12)


def test_negative_squares_are_clamped_with_a_warning():
    with pytest.warns(RuntimeWarning, match="below zero"):
        out = _finish_squared(np.array([4.0, -1e-17]), "van Rossum")
    assert out.tolist() == [2.0, 0.0]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _finish_squared(np.array([0.0, 1.0]), "van Rossum")


# --- Victor–Purpura ------------------------------------------------------------------------------

def test_victor_purpura_matches_elephant_on_poisson_trains():
    rng = np.random.default_rng(20)
    duration = 2000.0
    for q in (0.01, 0.1, 1.0, 10.0):        # cost per ms
        for _ in range(8):
            a, b = poisson_train(rng, 20.0, duration), poisson_train(rng, 20.0, duration)
            ref = elephant_victor_purpura([neo_train(a, duration), neo_train(b, duration)],
                                          q / pq.ms)[0, 1]
            assert victor_purpura_distance(a, b, q) == pytest.approx(ref, rel=1e-9)


def test_victor_purpura_per_cell_matches_elephant():
    rng = np.random.default_rng(21)
    ref = poisson_raster(20, 15.0, 2000.0, rng)
    test = poisson_raster(20, 15.0, 2000.0, rng)
    ours = victor_purpura_per_cell(ref, test, 0.5)
    for c in range(20):
        theirs = elephant_victor_purpura([neo_train(ref.train(c), 2000.0), neo_train(test.train(c), 2000.0)],
                                         0.5 / pq.ms)[0, 1]
        assert ours[c] == pytest.approx(theirs, rel=1e-9)


def test_victor_purpura_pen_and_paper_and_limits():
    assert victor_purpura_distance([1.0], [1.5], 1.0) == pytest.approx(0.5)       # move: q|dt|
    assert victor_purpura_distance([1.0], [1.5], 10.0) == pytest.approx(2.0)      # delete + insert
    assert victor_purpura_distance([1.0, 2.0], [1.0, 2.0, 9.0], 1.0) == pytest.approx(1.0)
    # limits (Victor & Purpura 1996): q = 0 -> |n1 - n2|, q = inf -> n1 + n2
    assert victor_purpura_distance([1.0, 2.0, 3.0], [7.0], 0.0) == 2.0
    assert victor_purpura_distance([1.0, 2.0, 3.0], [1.0], np.inf) == 4.0


def test_victor_purpura_banded_kernel_against_slow_twin():
    rng = np.random.default_rng(22)
    for _ in range(80):
        a = np.sort(np.round(rng.uniform(0, 30, rng.integers(0, 12)), 1))
        b = np.sort(np.round(rng.uniform(0, 30, rng.integers(0, 12)), 1))
        q = rng.choice([0.05, 0.4, 1.0, 3.0])
        assert victor_purpura_distance(a, b, q) == pytest.approx(slow_victor_purpura(a, b, q), rel=1e-12)


# --- coincidence factor --------------------------------------------------------------------------

def test_coincidence_factor_is_one_for_identical_trains():
    rng = np.random.default_rng(30)
    for rate in (5.0, 30.0, 100.0):
        t = poisson_train(rng, rate, 5000.0)
        assert abs(coincidence_factor(t, t, 2.0, 5000.0) - 1.0) < 1e-12


def test_coincidence_factor_averages_zero_for_independent_poisson_trains():
    # Kistler, Gerstner & van Hemmen 1997: chance coincidences are subtracted, so
    # independent Poisson trains give Gamma = 0 on average. The formula's chance
    # term is first order in 2*nu*Delta = 0.02 here; the neglected O(0.02^2 / 2)
    # is a third of the standard error below.
    rng = np.random.default_rng(31)
    values = np.array([coincidence_factor(poisson_train(rng, 5.0, 20000.0),
                                          poisson_train(rng, 5.0, 20000.0), 2.0, 20000.0)
                       for _ in range(600)])
    se = values.std(ddof=1) / np.sqrt(values.size)
    assert abs(values.mean()) < 3 * se


def test_coincidence_factor_pen_and_paper_and_defined_values():
    # 4 reference, 4 test spikes, 3 within 2 ms, over 1000 ms:
    # nu = 4/1000 per ms, chance = 2 nu Delta = 0.016;
    # Gamma = (3 - 0.016 * 4) / (0.5 * 8 * (1 - 0.016))
    g = coincidence_factor([100.0, 300.0, 500.0, 700.0], [101.0, 299.0, 505.0, 700.5], 2.0, 1000.0)
    assert g == pytest.approx((3 - 0.016 * 4) / (4 * (1 - 0.016)), rel=1e-14)
    assert coincidence_factor([], [], 2.0, 100.0) == 1.0
    assert coincidence_factor([1.0, 50.0], [], 2.0, 100.0) == 0.0
    assert coincidence_factor([], [1.0, 50.0], 2.0, 100.0) == 0.0
    # 2 nu Delta >= 1: the test fires so fast that chance explains every coincidence
    assert np.isnan(coincidence_factor([1.0], np.arange(0.0, 10.0, 1.0), 2.0, 10.0))


def test_coincidence_factor_per_cell_agrees_with_two_train_function():
    rng = np.random.default_rng(32)
    ref = poisson_raster(25, 20.0, 2000.0, rng)
    test = poisson_raster(25, 20.0, 2000.0, rng)
    gamma, n_coinc = coincidence_factor_per_cell(ref, test, 2.0)
    for c in range(25):
        assert gamma[c] == pytest.approx(coincidence_factor(ref.train(c), test.train(c), 2.0, 2000.0),
                                         rel=1e-14)


# --- properties ----------------------------------------------------------------------------------

trains = st.lists(st.floats(min_value=0.0, max_value=100.0, allow_nan=False), max_size=20)


@settings(max_examples=120, deadline=None)
@given(trains, trains, st.floats(min_value=0.1, max_value=50.0), st.floats(min_value=0.01, max_value=5.0))
def test_distances_are_symmetric_zero_and_positive(a, b, tau, q):
    a, b = np.sort(np.array(a)), np.sort(np.array(b))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)     # clamped rounding negatives
        vr_ab, vr_ba = van_rossum_distance(a, b, tau), van_rossum_distance(b, a, tau)
    # The squared distance is a difference of sums of up to (n_a + n_b)**2 / 2 terms of size
    # <= 1, so it carries a rounding error of order eps (n_a + n_b)**2, and its root one of
    # order sqrt(eps) (n_a + n_b), even when the exact distance is zero.
    rounding = 2.0 * np.sqrt(np.finfo(float).eps) * (a.size + b.size)
    assert vr_ab == pytest.approx(vr_ba, rel=1e-9, abs=rounding)
    assert victor_purpura_distance(a, b, q) == pytest.approx(victor_purpura_distance(b, a, q), rel=1e-12)
    assert van_rossum_distance(a, a, tau) == 0.0
    assert victor_purpura_distance(a, a, q) == 0.0
    if a.size != b.size or not np.array_equal(a, b):
        assert victor_purpura_distance(a, b, q) > 0
        # van Rossum is positive in exact arithmetic; rounding can hide shifts far below tau.
        if a.size != b.size or np.max(np.abs(a - b)) > 1e-6 * tau:
            assert vr_ab > 0


def test_per_cell_functions_on_empty_rasters():
    empty = Raster.from_arrays([], [], n_cells=3, t_start_ms=0.0, t_stop_ms=10.0)
    assert van_rossum_per_cell(empty, empty).tolist() == [0.0, 0.0, 0.0]
    assert victor_purpura_per_cell(empty, empty).tolist() == [0.0, 0.0, 0.0]
    assert coincidence_factor_per_cell(empty, empty)[0].tolist() == [1.0, 1.0, 1.0]
