"""`spikegauge bench --quick --json`: the keys of issue 9, each figure positive and finite.

Speed itself is the benchmark's business, not a unit test's; this checks that
every piece runs and reports what it claims.
"""
import json
import math

from click.testing import CliRunner

import spikegauge.cli.bench  # noqa: F401  (registers the command on the group)
from spikegauge.bench import BENCH_KEYS, SINGLE_HH_ERR_TARGET_MS, _max_spike_error, rss_mb
from spikegauge.cli.main import cli

import numpy as np


def test_bench_quick_json_keys_and_figures():
    res = CliRunner().invoke(cli, ["bench", "--quick", "--json"])
    assert res.exit_code == 0, res.output
    out = json.loads(res.output)
    assert list(out)[:len(BENCH_KEYS)] == list(BENCH_KEYS)
    assert set(out) == set(BENCH_KEYS) | {"details"}
    reasons = out["details"]["reasons"]
    for key in BENCH_KEYS:
        value = out[key]
        if value is None:
            # A missing figure must say why (the advice model, elephant, a 1-core machine).
            assert key in reasons and reasons[key], key
            continue
        assert isinstance(value, (int, float)) and math.isfinite(value), (key, value)
        if key != "rss_growth_mb":          # growth may be exactly 0 pages on a short run
            assert value > 0, (key, value)
        else:
            assert value >= 0
    assert out["lif_spikes"] > 0 and out["hh_spikes"] > 0
    # Determinism (DESIGN.md): the thread count never changes a spike.
    assert out["details"]["lif"]["identical_across_threads"]
    assert out["details"]["hh"]["identical_across_threads"]
    # Scaling exponents are fitted on four sizes each (their values are the benchmark's business).
    scaling = out["details"]["scaling"]
    assert len(scaling["cells"]) == 4 and scaling["cells"] == sorted(scaling["cells"])
    assert math.isfinite(scaling["exponent_cells"]) and scaling["exponent_cells"] > 0
    assert math.isfinite(scaling["exponent_duration"]) and scaling["exponent_duration"] > 0
    # The adaptive run that is reported is the one that met the error target.
    if out["single_hh_adaptive_err_ms"] is not None:
        assert out["single_hh_adaptive_err_ms"] <= SINGLE_HH_ERR_TARGET_MS


def test_max_spike_error_matches_by_index():
    ref = np.array([1.0, 2.0, 3.0])
    assert _max_spike_error(np.array([1.0, 2.5, 3.0]), ref) == 0.5
    assert _max_spike_error(np.array([1.0, 2.0]), ref) == math.inf   # a missed spike
    assert _max_spike_error(np.array([]), np.array([])) == 0.0


def test_rss_is_plausible():
    mb = rss_mb()
    if mb is not None:          # /proc is Linux-only
        big = np.ones(50 * 2**20 // 8)           # 50 MB, touched
        grown = rss_mb() - mb
        assert 40 < grown < 80, grown
        del big
