"""Population statistics of a raster, compared between two rasters.

Unlike spike-for-spike matching, these stay meaningful past the divergence
horizon: two runs of a chaotic network soon disagree spike by spike, but a
sound integrator keeps the rates, the irregularity and the synchrony.
Spurious synchrony from a coarse time step shows up in the Fano factor, the
spectral peak of the population rate and Golomb's chi.
"""
from __future__ import annotations

import numpy as np
from scipy import signal

from .rasters import Raster


def rates_hz(raster: Raster) -> np.ndarray:
    """Firing rate per cell (Hz), shape (n_cells,)."""
    return raster.counts() / (raster.duration_ms * 1e-3)


def isi_cv(raster: Raster) -> np.ndarray:
    """Coefficient of variation of the inter-spike intervals per cell, shape (n_cells,).

    NaN for cells with fewer than three spikes (two intervals are the fewest
    that have a spread).
    """
    same = np.diff(raster.cell) == 0
    isi = np.diff(raster.time_ms)[same]
    owner = raster.cell[1:][same]
    n = np.bincount(owner, minlength=raster.n_cells).astype(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = np.bincount(owner, isi, minlength=raster.n_cells) / n
        dev = isi - mean[owner]
        var = np.bincount(owner, dev * dev, minlength=raster.n_cells) / (n - 1)
        cv = np.sqrt(var) / mean
    return np.where(n >= 2, cv, np.nan)


def ks_distance(a: np.ndarray, b: np.ndarray) -> float:
    """Kolmogorov–Smirnov distance: the largest gap between the two empirical CDFs.

    The statistic of ``scipy.stats.ks_2samp`` without its p-value, whose
    approximations warn on small or tied samples we do not need them for.
    NaN if a sample is empty.
    """
    if not (a.size and b.size):
        return float("nan")
    a, b = np.sort(a), np.sort(b)
    z = np.concatenate([a, b])
    gap = np.searchsorted(a, z, side="right") / a.size - np.searchsorted(b, z, side="right") / b.size
    return float(np.abs(gap).max())


def population_counts(raster: Raster, bin_ms: float) -> np.ndarray:
    """Spike count of the whole population in consecutive bins of ``bin_ms`` from the start."""
    n_bins = max(1, int(np.ceil(raster.duration_ms / bin_ms)))
    bins = np.minimum(((raster.time_ms - raster.t_start_ms) / bin_ms).astype(np.int64), n_bins - 1)
    return np.bincount(bins, minlength=n_bins).astype(np.float64)


def fano_factor(counts: np.ndarray) -> float:
    """Variance over mean of binned counts (NaN without spikes)."""
    mean = counts.mean()
    return float(counts.var() / mean) if mean > 0 else float("nan")


def spectral_peak(counts: np.ndarray, bin_ms: float):
    """Largest peak of the power spectrum of the population rate above 0 Hz.

    Welch's method (scipy.signal.welch, segments of up to 2048 bins,
    mean removed).

    Returns
    -------
    freq_hz : float
        Frequency of the largest peak (Hz), NaN if the rate is constant.
    ratio : float
        Peak power over the median power above 0 Hz: about 1 for a flat
        (Poisson-like) spectrum, large for an oscillation.
    """
    if counts.size < 8 or not counts.std() > 0:
        return float("nan"), float("nan")
    freq, power = signal.welch(counts, fs=1000.0 / bin_ms, nperseg=min(counts.size, 2048))
    freq, power = freq[1:], power[1:]
    k = int(np.argmax(power))
    median = np.median(power)
    return float(freq[k]), float(power[k] / median) if median > 0 else float("inf")


def _cell_counts(raster: Raster, cells: np.ndarray, bin_ms: float) -> np.ndarray:
    """Counts of the chosen cells in bins, shape (len(cells), n_bins)."""
    n_bins = max(1, int(np.ceil(raster.duration_ms / bin_ms)))
    out = np.zeros((cells.size, n_bins))
    for k, c in enumerate(cells):
        t = raster.train(c)
        out[k] = np.bincount(np.minimum(((t - raster.t_start_ms) / bin_ms).astype(np.int64), n_bins - 1),
                             minlength=n_bins)
    return out


def mean_pair_correlation(raster: Raster, cells: np.ndarray, bin_ms: float) -> float:
    """Mean Pearson correlation of spike counts over all pairs of ``cells``.

    Cells whose count does not vary are left out (their correlation is
    undefined). NaN if fewer than two cells remain.
    """
    counts = _cell_counts(raster, cells, bin_ms)
    counts = counts[counts.std(axis=1) > 0]
    if counts.shape[0] < 2:
        return float("nan")
    corr = np.corrcoef(counts)
    return float(corr[np.triu_indices_from(corr, k=1)].mean())


def golomb_chi(raster: Raster, bin_ms: float) -> float:
    """Golomb's synchrony measure chi from binned spike counts.

    ``chi^2 = Var_t(mean_i c_i(t)) / mean_i Var_t(c_i(t))`` with ``c_i`` the
    spike count of cell i in bins of ``bin_ms`` (Golomb & Rinzel 1993, with
    counts in place of voltages): 1 for full synchrony, about ``1/sqrt(N)``
    for independent cells. Linear in the spike count (no cell-by-bin matrix).
    """
    n_bins = max(1, int(np.ceil(raster.duration_ms / bin_ms)))
    if raster.n_cells == 0 or raster.n_spikes == 0:
        return float("nan")
    bins = np.minimum(((raster.time_ms - raster.t_start_ms) / bin_ms).astype(np.int64), n_bins - 1)
    pop = np.bincount(bins, minlength=n_bins) / raster.n_cells
    # Spikes are sorted by (cell, time), so equal (cell, bin) keys are adjacent: count runs, no sort.
    key = raster.cell * n_bins + bins
    starts = np.flatnonzero(np.concatenate([[True], key[1:] != key[:-1]]))
    per_cell_bin = np.diff(np.append(starts, key.size))
    mean_sq = (per_cell_bin.astype(np.float64) ** 2).sum() / (n_bins * raster.n_cells)
    mean = raster.counts() / n_bins
    cell_var = mean_sq - np.mean(mean * mean)
    if not cell_var > 0:
        return float("nan")
    return float(np.sqrt(max(pop.var(), 0.0) / cell_var))


def population_statistics(reference: Raster, test: Raster, *, bin_ms: float = 1.0,
                          count_bin_ms: float = 50.0, sync_bin_ms: float = 5.0,
                          n_sample_cells: int = 100, seed: int = 0, cv=None) -> dict:
    """Population statistics of both rasters and how they differ.

    Parameters
    ----------
    reference, test : Raster
        Same cells and interval.
    bin_ms : float
        Bin of the population rate (ms) for its correlation and spectrum.
    count_bin_ms : float
        Bin (ms) for the population Fano factor and the pairwise count correlation.
    sync_bin_ms : float
        Bin (ms) for Golomb's chi.
    n_sample_cells : int
        Cells drawn (without replacement, seeded) for the pairwise count
        correlation; all pairs among them are used.
    seed : int
        Seed of that draw; the same cells serve both rasters.
    cv : tuple of two ndarrays, optional
        :func:`isi_cv` of both rasters, if already computed.

    Returns
    -------
    dict
        ``rate_ref_hz``, ``rate_test_hz`` (population mean rates),
        ``cv_ref``, ``cv_test`` (mean ISI CV), ``cv_ks_distance``
        (:func:`ks_distance` between the per-cell CV distributions), ``pop_rate_correlation``, ``fano_ref``,
        ``fano_test``, ``peak_freq_ref_hz``, ``peak_freq_test_hz``,
        ``peak_ratio_ref``, ``peak_ratio_test``, ``pair_correlation_ref``,
        ``pair_correlation_test``, ``chi_ref``, ``chi_test``.
    """
    out = {"rate_ref_hz": float(rates_hz(reference).mean()) if reference.n_cells else float("nan"),
           "rate_test_hz": float(rates_hz(test).mean()) if test.n_cells else float("nan")}
    cv_r, cv_t = (isi_cv(reference), isi_cv(test)) if cv is None else cv
    cv_r, cv_t = cv_r[np.isfinite(cv_r)], cv_t[np.isfinite(cv_t)]
    out["cv_ref"] = float(cv_r.mean()) if cv_r.size else float("nan")
    out["cv_test"] = float(cv_t.mean()) if cv_t.size else float("nan")
    out["cv_ks_distance"] = ks_distance(cv_r, cv_t)
    pr, pt = population_counts(reference, bin_ms), population_counts(test, bin_ms)
    out["pop_rate_correlation"] = float(np.corrcoef(pr, pt)[0, 1]) if pr.std() > 0 and pt.std() > 0 \
        else float("nan")
    out["fano_ref"] = fano_factor(population_counts(reference, count_bin_ms))
    out["fano_test"] = fano_factor(population_counts(test, count_bin_ms))
    out["peak_freq_ref_hz"], out["peak_ratio_ref"] = spectral_peak(pr, bin_ms)
    out["peak_freq_test_hz"], out["peak_ratio_test"] = spectral_peak(pt, bin_ms)
    rng = np.random.default_rng(seed)
    cells = np.sort(rng.choice(reference.n_cells, size=min(n_sample_cells, reference.n_cells),
                               replace=False))
    out["pair_correlation_ref"] = mean_pair_correlation(reference, cells, count_bin_ms)
    out["pair_correlation_test"] = mean_pair_correlation(test, cells, count_bin_ms)
    out["chi_ref"] = golomb_chi(reference, sync_bin_ms)
    out["chi_test"] = golomb_chi(test, sync_bin_ms)
    return out
