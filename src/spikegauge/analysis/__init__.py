"""Spike-raster comparison: matching, jitter, missed and extra spikes, distances, horizon.

Public names::

    compare(reference, test, ...) -> Comparison
    compare_many(reference, {name: test}, costs=None, ...) -> ComparisonSet
    load_rasters(sources, ...) -> list[Raster];  as_raster(source, ...) -> Raster
    read_run_spikes(run_dir) -> Raster
    match_trains(reference, test, window_ms) / match_rasters(reference, test, window_ms)
    van_rossum_distance, victor_purpura_distance, coincidence_factor (two trains)
    bench_rasters(n_cells, n_spikes, seed) -> (Raster, Raster);  bench_analysis(...) -> dict
    Yardstick.from_runs(reference_runs).judge(test_run) -> (passed, table)  (statistical fidelity)
"""
from .comparison import Comparison, ComparisonSet, compare, compare_many, pareto_front
from .distances import (coincidence_factor, coincidence_factor_per_cell, van_rossum_distance,
                        van_rossum_per_cell, victor_purpura_distance, victor_purpura_per_cell)
from .fidelity import Yardstick
from .matching import Matching, match_rasters, match_trains
from .rasters import Raster, as_raster, load_rasters, read_run_spikes
from .synthetic import bench_analysis, bench_rasters, perturbed, poisson_raster

__all__ = ["Comparison", "ComparisonSet", "compare", "compare_many", "pareto_front",
           "coincidence_factor", "coincidence_factor_per_cell", "van_rossum_distance",
           "van_rossum_per_cell", "victor_purpura_distance", "victor_purpura_per_cell", "Yardstick",
           "Matching", "match_rasters", "match_trains", "Raster", "as_raster", "load_rasters",
           "read_run_spikes", "bench_analysis", "bench_rasters", "perturbed", "poisson_raster"]
