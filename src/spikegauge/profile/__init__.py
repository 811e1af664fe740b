"""Accuracy profiles: reference, sensitivity ladder, sweep, store, executors, results.

Public names::

    run_profile(scenario_path, out_dir, ...) -> dict    (writes results.csv, profile.json, points/)
    default_sweep(scenario, d_min_ms) / quick_sweep(...) / parse_sweep(table, where) -> list[dict]
    load_results(profile_dir) -> (DataFrame, dict)
"""
from .results import load_results
from .runner import run_profile
from .sweep import default_sweep, parse_sweep, quick_sweep

__all__ = ["run_profile", "default_sweep", "parse_sweep", "quick_sweep", "load_results"]
