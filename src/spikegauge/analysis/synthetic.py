"""Synthetic rasters with known differences, for benchmarks and demonstrations."""
from __future__ import annotations

import time

import numpy as np

from .rasters import Raster


def poisson_raster(n_cells: int, rate_hz: float, duration_ms: float, rng: np.random.Generator,
                   t_start_ms: float = 0.0) -> Raster:
    """Independent homogeneous Poisson trains, one per cell.

    Parameters
    ----------
    n_cells : int
    rate_hz : float
        Rate of every cell (Hz).
    duration_ms : float
        Interval length (ms), starting at ``t_start_ms``.
    rng : numpy.random.Generator
    """
    counts = rng.poisson(rate_hz * duration_ms * 1e-3, size=n_cells)
    cell = np.repeat(np.arange(n_cells, dtype=np.int64), counts)
    time_ms = t_start_ms + rng.uniform(0.0, duration_ms, size=cell.size)
    return Raster.from_arrays(cell, time_ms, n_cells=n_cells, t_start_ms=t_start_ms,
                              t_stop_ms=t_start_ms + duration_ms, source="poisson")


def perturbed(raster: Raster, rng: np.random.Generator, *, jitter_ms: float = 0.1,
              drop: float = 0.01, add: float = 0.01) -> Raster:
    """A copy of ``raster`` with Gaussian jitter, dropped spikes and added spikes.

    Parameters
    ----------
    jitter_ms : float
        Standard deviation of the shift of each kept spike (ms).
    drop : float
        Probability that a spike is dropped.
    add : float
        Added spikes, as a fraction of the spike count, at uniform random
        cells and times.
    """
    keep = rng.random(raster.n_spikes) >= drop
    n_add = int(round(add * raster.n_spikes))
    cell = np.concatenate([raster.cell[keep], rng.integers(0, max(raster.n_cells, 1), n_add)])
    time_ms = np.concatenate([raster.time_ms[keep] + rng.normal(0.0, jitter_ms, keep.sum()),
                              rng.uniform(raster.t_start_ms, raster.t_stop_ms, n_add)])
    inside = (time_ms >= raster.t_start_ms) & (time_ms < raster.t_stop_ms)
    return Raster.from_arrays(cell[inside], time_ms[inside], n_cells=raster.n_cells,
                              t_start_ms=raster.t_start_ms, t_stop_ms=raster.t_stop_ms,
                              source="perturbed")


def bench_rasters(n_cells: int = 10_000, n_spikes: int = 1_000_000, seed: int = 0):
    """Reference and test rasters for the speed benchmark.

    The reference has about ``n_spikes`` Poisson spikes at 10 Hz per cell (the
    interval is chosen to match); the test is the reference with 0.1 ms
    Gaussian jitter, 1 % of spikes dropped and 1 % added.

    Returns
    -------
    reference, test : Raster
    """
    rng = np.random.default_rng(seed)
    duration_ms = n_spikes / max(n_cells, 1) / 10.0 * 1e3
    reference = poisson_raster(n_cells, 10.0, duration_ms, rng)
    return reference, perturbed(reference, rng)


def bench_analysis(n_cells: int = 10_000, n_spikes: int = 1_000_000, seed: int = 0,
                   elephant_cells: int = 200) -> dict:
    """Time the analysis on :func:`bench_rasters` data (seconds; compilation excluded).

    Returns
    -------
    dict
        ``match_summary_s``: matching plus the full summary of
        :func:`~spikegauge.analysis.comparison.compare` (no files, no
        figures); ``match_s``: matching alone; ``van_rossum_s``: van Rossum
        over all cells; ``van_rossum_per_cell_s``: that time over the cell count;
        ``elephant_per_cell_s``: mean time per cell of
        ``elephant.spike_train_dissimilarity.van_rossum_distance`` on the same
        data (first ``elephant_cells`` cells, one call per cell);
        ``elephant_ratio``: elephant's time over ours (NaN values if elephant
        is not installed).
    """
    from .comparison import compare
    from .distances import van_rossum_per_cell
    from .matching import match_rasters

    ref, test = bench_rasters(n_cells, n_spikes, seed)
    small_ref, small_test = bench_rasters(20, 2000, seed)
    compare(small_ref, small_test)                      # compile (or load cached kernels)
    out = {"n_cells": n_cells, "n_ref": ref.n_spikes, "n_test": test.n_spikes}

    def timed(fn):
        t0 = time.perf_counter()
        fn()
        return time.perf_counter() - t0

    out["match_s"] = timed(lambda: match_rasters(ref, test, 2.0))
    out["match_summary_s"] = timed(lambda: compare(ref, test))
    out["van_rossum_s"] = timed(lambda: van_rossum_per_cell(ref, test, 5.0))
    out["van_rossum_per_cell_s"] = out["van_rossum_s"] / max(n_cells, 1)
    k = min(elephant_cells, n_cells)
    try:
        import neo
        import quantities as pq
        from elephant.spike_train_dissimilarity import van_rossum_distance
    except ImportError:
        out["elephant_per_cell_s"] = out["elephant_ratio"] = float("nan")
        return out

    def run_elephant():
        for c in range(k):
            trains = [neo.SpikeTrain(r.train(c) * pq.ms, t_start=r.t_start_ms * pq.ms,
                                     t_stop=r.t_stop_ms * pq.ms) for r in (ref, test)]
            van_rossum_distance(trains, 5.0 * pq.ms)
    out["elephant_per_cell_s"] = timed(run_elephant) / k
    out["elephant_ratio"] = out["elephant_per_cell_s"] / out["van_rossum_per_cell_s"]
    return out

