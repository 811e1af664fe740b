"""`spikegauge bench --quick --json`: the keys of issue 9, each a finite number or a reason.

Speed itself is the benchmark's business, not a unit test's: nothing here
asserts a value derived from elapsed time (a loaded machine can make any
timing, or a fit of timings, come out anything). This checks that every piece
runs and reports what it claims, and the scaling fit on made-up timings.
"""
import json
import math

from click.testing import CliRunner

import spikegauge.cli.bench  # noqa: F401  (registers the command on the group)
from spikegauge.bench import BENCH_KEYS, SINGLE_HH_ERR_TARGET_MS, _max_spike_error, fit_exponent, rss_mb
from spikegauge.cli.main import cli

import numpy as np
import pytest


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
    assert out["lif_spikes"] > 0 and out["hh_spikes"] > 0
    # Determinism (DESIGN.md): the thread count never changes a spike.
    assert out["details"]["lif"]["identical_across_threads"]
    assert out["details"]["hh"]["identical_across_threads"]
    # Scaling exponents are fitted on four sizes each; their values (and whether the
    # timings were clean enough to fit) are the benchmark's business.
    scaling = out["details"]["scaling"]
    assert len(scaling["cells"]) == 4 and scaling["cells"] == sorted(scaling["cells"])
    assert len(scaling["duration_ms"]) == 4 and scaling["duration_ms"] == sorted(scaling["duration_ms"])
    for name in ("cells_fit", "duration_fit"):
        fit = scaling[name]
        assert set(fit) == {"exponent", "raw_exponent", "stderr", "r2", "quality"}
        assert fit["quality"] == "ok" or fit["quality"].startswith("too noisy to fit")
        assert (fit["exponent"] is None) == (fit["quality"] != "ok")
    # The adaptive run that is reported is the one that met the error target.
    if out["single_hh_adaptive_err_ms"] is not None:
        assert out["single_hh_adaptive_err_ms"] <= SINGLE_HH_ERR_TARGET_MS


def test_scaling_fit_on_exact_power_laws():
    # t = c * n^p is a straight line of slope p in log-log coordinates (closed form):
    # the fit returns p, r^2 = 1 and a zero standard error.
    n = np.array([250.0, 500.0, 1000.0, 2000.0])
    for p in (1.0, 1.5):
        fit = fit_exponent(n, 3e-4 * n ** p)
        assert fit["quality"] == "ok"
        assert fit["exponent"] == pytest.approx(p, abs=1e-12)
        assert fit["r2"] == pytest.approx(1.0, abs=1e-12) and fit["stderr"] == pytest.approx(0.0, abs=1e-12)


def test_scaling_fit_says_too_noisy_instead_of_a_meaningless_exponent():
    n = np.array([250.0, 500.0, 1000.0, 2000.0])
    # Larger problems taking less time (a disturbed timing): no exponent, the slope kept aside.
    falling = fit_exponent(n, [0.9, 0.5, 0.6, 0.4])
    assert falling["exponent"] is None and falling["raw_exponent"] < 0
    assert falling["quality"].startswith("too noisy to fit") and "not positive" in falling["quality"]
    # A positive slope with scattered points: a poor r^2 and a wide standard error.
    scattered = fit_exponent(n, [0.1, 0.5, 0.12, 0.6])
    assert scattered["exponent"] is None and scattered["raw_exponent"] > 0
    assert "r^2" in scattered["quality"] and "standard error" in scattered["quality"]
    # Fewer than three usable sizes cannot carry a standard error.
    assert fit_exponent([1.0, 2.0], [1.0, 2.0])["quality"].startswith("too noisy to fit")
    assert fit_exponent(n, [0.1, 0.0, 0.2, 0.4])["exponent"] is None     # log(0): unusable


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
