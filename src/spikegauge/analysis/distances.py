"""Spike-train distances per cell: van Rossum, Victor–Purpura, coincidence factor.

Each measure is one two-train function (a serial numba kernel) plus a
parallel driver over the cells of two rasters that writes one value per cell,
so the result does not depend on the thread count.
"""
from __future__ import annotations

import warnings

import numpy as np
from numba import prange

from .._numba import jit, pjit
from ..errors import InputError
from .matching import _match_cells, match_trains
from .rasters import Raster


# ---------------------------------------------------------------------------
# van Rossum


@jit
def _exp_sum(x, y, inv_tau):
    """``sum_{i,j} exp(-|x_i - y_j| / tau)`` for sorted x, y in linear time.

    One sweep through both trains in time order carries two decaying sums,
    ``ax = sum over x seen of exp(-(t - x_i) / tau)`` and likewise ``ay``;
    each spike adds the other train's sum, so every pair is counted once, at
    its later spike. At equal times y goes first: x_i sees y_j (``y_j <= x_i``)
    and y_j does not see x_i. One exponential per spike, none of a positive
    number.
    """
    total = 0.0
    ax = 0.0
    ay = 0.0
    t_prev = -np.inf      # the first decay multiplies zeros: no overflow for early (negative) times
    i = 0
    j = 0
    while i < x.size or j < y.size:
        take_y = j < y.size and (i == x.size or y[j] <= x[i])
        t = y[j] if take_y else x[i]
        decay = np.exp(-(t - t_prev) * inv_tau)
        ax *= decay
        ay *= decay
        t_prev = t
        if take_y:
            total += ax
            ay += 1.0
            j += 1
        else:
            total += ay
            ax += 1.0
            i += 1
    return total


@jit
def _van_rossum_sq(x, y, tau):
    """Squared van Rossum distance (van Rossum 2001 normalisation), unclamped."""
    inv_tau = 1.0 / tau
    # The self terms go through the same routine as the cross term, so
    # identical trains give exactly zero.
    return 0.5 * (_exp_sum(x, x, inv_tau) + _exp_sum(y, y, inv_tau) - 2.0 * _exp_sum(x, y, inv_tau))


@pjit
def _van_rossum_cells(r_time, r_off, s_time, s_off, tau, out):
    for c in prange(r_off.size - 1):
        out[c] = _van_rossum_sq(r_time[r_off[c]:r_off[c + 1]], s_time[s_off[c]:s_off[c + 1]], tau)


def _finish_squared(d2: np.ndarray, name: str) -> np.ndarray:
    """Clamp rounding negatives of squared distances to zero (with a warning); return the root."""
    neg = d2 < 0
    if neg.any():
        warnings.warn(f"{name}: {int(neg.sum())} squared distance(s) slightly below zero from rounding "
                      f"(smallest {d2[neg].min():.3g}) set to 0; the trains agree to rounding error",
                      RuntimeWarning, stacklevel=3)
        d2 = np.where(neg, 0.0, d2)
    return np.sqrt(d2)


def _limits_van_rossum(n_ref, n_test, tau_ms):
    """Closed forms at tau = 0 and tau = inf (the kernel's own limits)."""
    if tau_ms == 0:
        return np.sqrt(0.5 * (n_ref + n_test))
    return np.abs(n_ref - n_test) / np.sqrt(2.0)


def van_rossum_distance(train_a, train_b, tau_ms: float = 5.0) -> float:
    """van Rossum distance between two spike trains.

    Each train is filtered with a causal exponential kernel
    ``f(t) = sum_i H(t - t_i) exp(-(t - t_i) / tau)`` and

        D^2 = (1 / tau) * integral (f - g)^2 dt
            = 1/2 [ sum_ij e^{-|t_i - t_j|/tau} + sum_ij e^{-|u_i - u_j|/tau}
                    - 2 sum_ij e^{-|t_i - u_j|/tau} ]

    (van Rossum 2001, Neural Comput 13:751-763). With this normalisation a
    single spike against an empty train gives ``D = 1/sqrt(2)``;
    ``elephant.spike_train_dissimilarity.van_rossum_distance`` omits the 1/2
    and is larger by ``sqrt(2)``. Limits: ``tau = 0`` gives
    ``sqrt((n_a + n_b) / 2)``, ``tau = inf`` gives ``|n_a - n_b| / sqrt(2)``.
    Linear time in the spike count (sorted trains).

    Parameters
    ----------
    train_a, train_b : array_like of float
        Sorted spike times (ms).
    tau_ms : float
        Kernel time constant (ms), >= 0 (``inf`` allowed).

    Returns
    -------
    float
        D (dimensionless). A squared value a rounding error below zero is set
        to zero with a warning.
    """
    a = _sorted_train(train_a)
    b = _sorted_train(train_b)
    tau_ms = _check_nonneg(tau_ms, "tau_ms")
    if tau_ms == 0 or np.isinf(tau_ms):
        return float(_limits_van_rossum(a.size, b.size, tau_ms))
    return float(_finish_squared(np.array([_van_rossum_sq(a, b, tau_ms)]), "van Rossum")[0])


def van_rossum_per_cell(reference: Raster, test: Raster, tau_ms: float = 5.0) -> np.ndarray:
    """van Rossum distance of every cell, shape (n_cells,); see :func:`van_rossum_distance`."""
    tau_ms = _check_nonneg(tau_ms, "tau_ms")
    if tau_ms == 0 or np.isinf(tau_ms):
        return _limits_van_rossum(reference.counts(), test.counts(), tau_ms).astype(np.float64)
    out = np.empty(reference.n_cells, np.float64)
    _van_rossum_cells(reference.time_ms, reference.offsets, test.time_ms, test.offsets, tau_ms, out)
    return _finish_squared(out, "van Rossum")


# ---------------------------------------------------------------------------
# Victor–Purpura


@jit
def _victor_purpura(r, s, q):
    """Victor–Purpura distance for cost q > 0 (per ms), banded dynamic programme.

    D = n + m - 2 P + q S for the best order-preserving pairing with P pairs
    and summed |shift| S: a pair saves deleting one spike and inserting
    another (cost 2) and pays its shift. Only pairs with q |dt| < 2 can save
    anything, so each reference spike sees only the test spikes within 2/q;
    outside that band a row copies known values, as in the matching
    programme (:mod:`.matching`). P and q S are carried apart, so D is formed
    without cancelling against n + m (a tiny shift stays visible).
    """
    n = r.size
    m = s.size
    if n == 0 or m == 0:
        return float(n + m)
    w = 2.0 / q
    pairs = np.zeros(m + 1, np.int64)     # P of the best pairing, row last written
    moved = np.zeros(m + 1, np.float64)   # q S of the same pairing
    filled = 0
    a = 0
    b = 0
    for i in range(n):
        while a < m and s[a] <= r[i] - w:
            a += 1
        while b < m and s[b] < r[i] + w:
            b += 1
        while filled < b:
            filled += 1
            pairs[filled] = pairs[filled - 1]
            moved[filled] = moved[filled - 1]
        diag_p = pairs[a]
        diag_m = moved[a]
        left_p = diag_p
        left_m = diag_m
        for jj in range(a + 1, b + 1):
            up_p = pairs[jj]
            up_m = moved[jj]
            best_p = up_p
            best_m = up_m
            if left_m - 2.0 * left_p < best_m - 2.0 * best_p:
                best_p = left_p
                best_m = left_m
            pair_m = diag_m + q * abs(s[jj - 1] - r[i])
            if pair_m - 2.0 * (diag_p + 1) < best_m - 2.0 * best_p:
                best_p = diag_p + 1
                best_m = pair_m
            diag_p = up_p
            diag_m = up_m
            pairs[jj] = best_p
            moved[jj] = best_m
            left_p = best_p
            left_m = best_m
    return (n + m - 2 * pairs[filled]) + moved[filled]


@pjit
def _victor_purpura_cells(r_time, r_off, s_time, s_off, q, out):
    for c in prange(r_off.size - 1):
        out[c] = _victor_purpura(r_time[r_off[c]:r_off[c + 1]], s_time[s_off[c]:s_off[c + 1]], q)


def _limits_victor_purpura(n_ref, n_test, cost_per_ms):
    if cost_per_ms == 0:
        return np.abs(n_ref - n_test)
    return n_ref + n_test


def victor_purpura_distance(train_a, train_b, cost_per_ms: float = 1.0) -> float:
    """Victor–Purpura spike-time distance between two spike trains.

    The least total cost of turning one train into the other, where deleting
    or inserting a spike costs 1 and moving one by ``dt`` costs
    ``cost_per_ms * |dt|`` (Victor & Purpura 1996, J Neurophysiol
    76:1310-1326). Not normalised: units of "spikes". Limits: cost 0 gives
    ``|n_a - n_b|``, cost ``inf`` gives ``n_a + n_b``. Time
    ``O(n_a + n_b + pairs closer than 2 / cost)``; quadratic only when
    ``2 / cost`` spans many spikes.

    Parameters
    ----------
    train_a, train_b : array_like of float
        Sorted spike times (ms).
    cost_per_ms : float
        Cost of moving a spike by 1 ms (1/ms), >= 0 (``inf`` allowed).
    """
    a = _sorted_train(train_a)
    b = _sorted_train(train_b)
    q = _check_nonneg(cost_per_ms, "cost_per_ms")
    if q == 0 or np.isinf(q):
        return float(_limits_victor_purpura(a.size, b.size, q))
    return float(_victor_purpura(a, b, q))


def victor_purpura_per_cell(reference: Raster, test: Raster, cost_per_ms: float = 1.0) -> np.ndarray:
    """Victor–Purpura distance of every cell, shape (n_cells,); see :func:`victor_purpura_distance`."""
    q = _check_nonneg(cost_per_ms, "cost_per_ms")
    if q == 0 or np.isinf(q):
        return _limits_victor_purpura(reference.counts(), test.counts(), q).astype(np.float64)
    out = np.empty(reference.n_cells, np.float64)
    _victor_purpura_cells(reference.time_ms, reference.offsets, test.time_ms, test.offsets, q, out)
    return out


# ---------------------------------------------------------------------------
# Coincidence factor


def gamma_from_counts(n_coinc, n_ref, n_test, duration_ms, window_ms):
    """Coincidence factor from counts (vectorised); see :func:`coincidence_factor`."""
    n_coinc, n_ref, n_test = (np.asarray(v, dtype=np.float64) for v in (n_coinc, n_ref, n_test))
    nu = n_test / duration_ms                      # test rate (1/ms): the test train plays the model
    chance = 2.0 * nu * window_ms
    with np.errstate(divide="ignore", invalid="ignore"):
        gamma = (n_coinc - chance * n_ref) / (0.5 * (n_ref + n_test) * (1.0 - chance))
    gamma = np.where((n_ref == 0) & (n_test == 0), 1.0, gamma)
    return np.where(chance >= 1.0, np.nan, gamma)


def coincidence_factor(reference, test, window_ms: float = 2.0, duration_ms: float | None = None) -> float:
    """Coincidence factor Γ of a test train against a reference train.

        Γ = (N_coinc - 2 ν Δ N_ref) / (½ (N_ref + N_test) (1 - 2 ν Δ))

    (Kistler, Gerstner & van Hemmen 1997, Neural Comput 9:1015-1045; Jolivet
    et al. 2008). The reference plays the data and the test the model: ν is
    the test train's rate ``N_test / duration``, Δ the coincidence window, and
    ``2 ν Δ N_ref`` the coincidences a Poisson train of rate ν would reach by
    chance (to first order in 2νΔ). N_coinc is the number of pairs of the
    optimal one-to-one matching with window Δ (:mod:`.matching`), so no spike
    counts twice; where spikes of a train are more than 2Δ apart this equals
    the number of reference spikes with a test spike within ±Δ.

    Γ = 1 for identical trains and is about 0 at chance; it is not symmetric.
    Defined values: 1 when both trains are empty; 0 when only one is (the
    formula's own value); NaN when 2νΔ >= 1, where chance alone explains any
    coincidence.

    Parameters
    ----------
    reference, test : array_like of float
        Sorted spike times (ms).
    window_ms : float
        Coincidence window Δ (ms).
    duration_ms : float, optional
        Length of the observed interval (ms); default from the first to the
        last spike of both trains. Pass the simulated interval.
    """
    r = _sorted_train(reference)
    s = _sorted_train(test)
    if duration_ms is None:
        both = np.concatenate([r, s])
        duration_ms = float(both.max() - both.min()) if both.size else 1.0
    if not duration_ms > 0:
        raise InputError(f"duration_ms must be > 0, got {duration_ms}")
    rp, _ = match_trains(r, s, window_ms)
    return float(gamma_from_counts(np.count_nonzero(rp >= 0), r.size, s.size, duration_ms, window_ms))


def coincidence_factor_per_cell(reference: Raster, test: Raster, window_ms: float = 2.0):
    """Coincidence factor Γ of every cell, shape (n_cells,); see :func:`coincidence_factor`.

    Returns
    -------
    gamma : ndarray of float64, shape (n_cells,)
    n_coinc : ndarray of int64, shape (n_cells,)
    """
    window_ms = _check_nonneg(window_ms, "coincidence_window_ms")
    rp = np.empty(reference.n_spikes, np.int64)
    sp = np.empty(test.n_spikes, np.int64)
    _match_cells(reference.time_ms, reference.offsets, test.time_ms, test.offsets, window_ms, rp, sp)
    n_coinc = np.bincount(reference.cell[rp >= 0], minlength=reference.n_cells)
    gamma = gamma_from_counts(n_coinc, reference.counts(), test.counts(), reference.duration_ms, window_ms)
    return gamma, n_coinc


# ---------------------------------------------------------------------------


def _sorted_train(x) -> np.ndarray:
    x = np.ascontiguousarray(x, dtype=np.float64).ravel()
    if not np.all(np.isfinite(x)):
        raise InputError("spike times must be finite")
    return np.sort(x)


def _check_nonneg(value, name) -> float:
    value = float(value)
    if not value >= 0:
        raise InputError(f"{name} must be >= 0, got {value}")
    return value
