"""compare(), compare_many(), horizon, population statistics and the figures."""
import json

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from spikegauge.analysis import (Raster, coincidence_factor_per_cell, compare, compare_many, pareto_front,
                                 perturbed, poisson_raster)
from spikegauge.analysis.population import golomb_chi, isi_cv, ks_distance, population_counts, spectral_peak
from spikegauge.report import raster_plots


def frame(cells, times):
    return pd.DataFrame({"cell": cells, "time_ms": times})


# --- pen and paper -------------------------------------------------------------------------------

def test_identical_rasters():
    rng = np.random.default_rng(0)
    ref = poisson_raster(20, 20.0, 1000.0, rng)
    c = compare(ref, ref)
    s = c.summary
    assert (s["matched"], s["missed"], s["extra"]) == (ref.n_spikes, 0, 0)
    assert s["mismatch_fraction"] == 0.0 and s["shift_rms_ms"] == 0.0 and s["shift_max_abs_ms"] == 0.0
    assert s["first_error_ms"] == 1000.0 and s["horizon_ms"] == 1000.0 and not s["diverged"]
    assert s["van_rossum_mean"] == 0.0 and s["victor_purpura_mean"] == 0.0
    assert abs(s["coincidence_factor_mean"] - 1.0) < 1e-12
    assert s["cv_ks_distance"] == 0.0 and s["pop_rate_correlation"] == pytest.approx(1.0)
    assert s["fano_ref"] == s["fano_test"] and s["chi_ref"] == s["chi_test"]


def test_one_shifted_one_missing_one_extra():
    # cell 0: 10 -> 10.5 (shift +0.5); cell 1: 20 missed; cell 2: 30 kept, 45 extra
    ref = frame([0, 1, 2], [10.0, 20.0, 30.0])
    test = frame([0, 2, 2], [10.5, 30.0, 45.0])
    c = compare(ref, test, n_cells=4, t_stop_ms=100.0)
    s = c.summary
    assert (s["n_ref"], s["n_test"], s["matched"], s["missed"], s["extra"]) == (3, 3, 2, 1, 1)
    assert s["missed_fraction"] == pytest.approx(1 / 3) and s["extra_fraction"] == pytest.approx(1 / 3)
    assert s["mismatch_fraction"] == pytest.approx(2 / 3)
    assert s["shift_mean_ms"] == pytest.approx(0.25)
    assert s["shift_rms_ms"] == pytest.approx(np.sqrt(0.125))
    assert s["shift_max_abs_ms"] == 0.5
    assert s["first_error_ms"] == 20.0                    # the missed spike at 20 ms
    assert c.pairs.to_dict("list") == {"cell": [0, 2], "ref_time_ms": [10.0, 30.0],
                                       "test_time_ms": [10.5, 30.0], "shift_ms": [0.5, 0.0]}
    pc = c.per_cell.set_index("cell")
    assert pc["matched"].tolist() == [1, 0, 1, 0] and pc["missed"].tolist() == [0, 1, 0, 0]
    assert pc["extra"].tolist() == [0, 0, 1, 0]
    assert pc.loc[3, "n_ref"] == 0                        # a cell silent in both still counts
    assert pc["rate_error_hz"].tolist() == pytest.approx([0.0, -10.0, 10.0, 0.0])
    assert c.missed.to_dict("list") == {"cell": [1], "time_ms": [20.0]}
    assert c.extra.to_dict("list") == {"cell": [2], "time_ms": [45.0]}
    # VP with the default cost 2 / 2 ms: a 0.5 ms move costs 0.5; the missed and the extra spike 1 each
    assert pc["victor_purpura"].tolist() == pytest.approx([0.5, 1.0, 1.0, 0.0])


def test_per_group_summary():
    ref = Raster.from_arrays([0, 1, 2, 3], [1.0, 2.0, 3.0, 4.0], n_cells=4, t_start_ms=0.0, t_stop_ms=50.0,
                             group_names=("exc", "inh"), group_first=(0, 2))
    test = Raster.from_arrays([0, 1, 3], [1.0, 2.5, 4.0], n_cells=4, t_start_ms=0.0, t_stop_ms=50.0)
    c = compare(ref, test)
    g = c.per_group
    assert g.loc["exc", "matched"] == 2 and g.loc["exc", "missed"] == 0
    assert g.loc["exc", "shift_mean_ms"] == pytest.approx(0.25)
    assert g.loc["inh", "matched"] == 1 and g.loc["inh", "missed"] == 1
    assert g.loc["inh", "first_error_ms"] == 3.0 and g.loc["exc", "first_error_ms"] == 50.0
    assert c.per_cell["group"].tolist() == ["exc", "exc", "inh", "inh"]


def test_percentiles_of_absolute_shift_match_numpy():
    rng = np.random.default_rng(1)
    ref = poisson_raster(50, 20.0, 2000.0, rng)
    test = perturbed(ref, rng, jitter_ms=0.3, drop=0.0, add=0.0)
    c = compare(ref, test)
    a = np.abs(c.pairs["shift_ms"].to_numpy())
    assert c.summary["shift_median_abs_ms"] == pytest.approx(np.median(a))
    assert c.summary["shift_p99_abs_ms"] == pytest.approx(np.percentile(a, 99))
    # Gaussian jitter of 0.3 ms, nothing dropped: RMS close to 0.3 (many pairs)
    assert c.summary["shift_rms_ms"] == pytest.approx(0.3, rel=0.05)


def test_coincidence_factor_in_comparison_agrees_with_per_cell_function():
    rng = np.random.default_rng(11)
    ref = poisson_raster(20, 30.0, 1000.0, rng)
    test = perturbed(ref, rng, jitter_ms=1.0, drop=0.1, add=0.1)
    for window in (2.0, 1.0):      # equal to the match window (pairs reused) and not
        got = compare(ref, test, coincidence_window_ms=window).per_cell["coincidence_factor"]
        np.testing.assert_allclose(got, coincidence_factor_per_cell(ref, test, window)[0], rtol=1e-14)


# --- properties ----------------------------------------------------------------------------------

spikes = st.lists(st.tuples(st.integers(0, 4), st.floats(0.0, 99.0, allow_nan=False)), max_size=40)


@settings(max_examples=20, deadline=None)
@given(spikes, spikes)
def test_counts_add_up_and_swap_swaps_missed_and_extra(a, b):
    ref = frame([c for c, _ in a], [t for _, t in a]).astype({"cell": "int64", "time_ms": "float64"})
    test = frame([c for c, _ in b], [t for _, t in b]).astype({"cell": "int64", "time_ms": "float64"})
    one = compare(ref, test, n_cells=5, t_stop_ms=100.0).summary
    two = compare(test, ref, n_cells=5, t_stop_ms=100.0).summary
    assert one["matched"] + one["missed"] == len(a)
    assert one["matched"] + one["extra"] == len(b)
    assert (one["missed"], one["extra"]) == (two["extra"], two["missed"])
    assert one["victor_purpura_mean"] == pytest.approx(two["victor_purpura_mean"], rel=1e-12)


@settings(max_examples=15, deadline=None)
@given(st.integers(0, 2**32 - 1))
def test_swap_negates_shifts(seed):
    rng = np.random.default_rng(seed)
    ref = poisson_raster(5, 30.0, 500.0, rng)
    test = perturbed(ref, rng, jitter_ms=0.5, drop=0.1, add=0.1)
    one, two = compare(ref, test), compare(test, ref)
    assert two.summary["shift_mean_ms"] == pytest.approx(-one.summary["shift_mean_ms"], abs=1e-12)
    np.testing.assert_allclose(np.sort(-two.pairs["shift_ms"]), np.sort(one.pairs["shift_ms"]), atol=1e-12)


# --- horizon -------------------------------------------------------------------------------------

def test_horizon_finds_where_rasters_become_independent():
    rng = np.random.default_rng(2)
    ref = poisson_raster(200, 20.0, 2000.0, rng)
    other = poisson_raster(200, 20.0, 2000.0, rng)
    # identical up to 800 ms, independent afterwards
    cell = np.concatenate([ref.cell[ref.time_ms < 800], other.cell[other.time_ms >= 800]])
    time = np.concatenate([ref.time_ms[ref.time_ms < 800], other.time_ms[other.time_ms >= 800]])
    test = Raster.from_arrays(cell, time, n_cells=200, t_start_ms=0.0, t_stop_ms=2000.0)
    c = compare(ref, test, horizon_window_ms=50.0)
    # The first window reaching past 800 ms starts at 775 ms (stride 25 ms); it is
    # still mostly identical, so the horizon lands within one window of 800 ms.
    assert c.summary["diverged"] and 750.0 <= c.summary["horizon_ms"] <= 800.0
    late = c.over_time[c.over_time["start_ms"] >= 800.0]["corrected"]
    # independent Poisson rasters: chance-corrected agreement about 0
    assert abs(late.mean()) < 0.03
    early = c.over_time[c.over_time["stop_ms"] <= 800.0]["corrected"]
    assert np.all(early == 1.0)
    assert c.summary["first_error_ms"] >= 800.0


def test_chance_corrected_agreement_of_unrelated_rasters_at_high_rate():
    # Independent Poisson rasters at 100 Hz, window 2 ms: a test spike lies within
    # +-2 ms by chance with probability 1 - exp(-0.4) = 0.33 (Poisson, textbook);
    # after the correction the agreement is near 0, far below the 0.5 threshold.
    rng = np.random.default_rng(12)
    a, b = poisson_raster(100, 100.0, 2000.0, rng), poisson_raster(100, 100.0, 2000.0, rng)
    ot = compare(a, b).over_time
    assert ot["chance"].mean() == pytest.approx(1 - np.exp(-0.4), rel=0.02)
    assert -0.15 < ot["corrected"].mean() < 0.05


def test_horizon_from_jitter_limit_and_window_counts():
    rng = np.random.default_rng(3)
    ref = poisson_raster(100, 20.0, 1000.0, rng)
    shift = np.where(ref.time_ms < 500.0, 0.05, 1.0)
    test = Raster.from_arrays(ref.cell, ref.time_ms + shift, n_cells=100, t_start_ms=0.0, t_stop_ms=1001.0)
    test = test.restricted(0.0, 1000.0)
    c = compare(ref, test, jitter_limit_ms=0.5)
    assert 450.0 <= c.summary["horizon_ms"] <= 500.0
    ot = c.over_time
    assert (ot["matched"] + ot["missed"] == ot["n_ref"]).all()
    assert (ot["matched_test"] + ot["extra"] == ot["n_test"]).all()
    assert ot["matched"].sum() == pytest.approx(ot["matched_test"].sum(), rel=0.05)
    # each spike lies in two half-overlapping windows (one at the ends)
    assert ot["n_ref"].sum() == pytest.approx(2 * ref.n_spikes, rel=0.05)


def test_agreement_never_exceeds_one_when_pairs_straddle_a_window_edge():
    # Pen and paper, windows of 50 ms with stride 25 ms: ten cells fire at 25.1 and
    # 30 ms in the reference, at 24.9 and 30 ms in the test (every spike matched).
    # The window 25-75 ms holds 20 reference spikes but only the 10 test spikes at
    # 30 ms: all 30 spikes in it are matched, agreement 30/30 = 1 exactly. Counting
    # both spikes of a pair at the reference spike gave 2*20/30 = 1.33.
    cells = np.repeat(np.arange(10), 2)
    ref = Raster.from_arrays(cells, np.tile([25.1, 30.0], 10), n_cells=10, t_start_ms=0.0, t_stop_ms=100.0)
    test = Raster.from_arrays(cells, np.tile([24.9, 30.0], 10), n_cells=10, t_start_ms=0.0, t_stop_ms=100.0)
    ot = compare(ref, test, horizon_window_ms=50.0).over_time.set_index("start_ms")
    w = ot.loc[25.0]
    assert (w["n_ref"], w["n_test"], w["matched"], w["matched_test"], w["extra"]) == (20, 10, 20, 10, 0)
    assert w["agreement"] == 1.0
    assert ot["agreement"].max() == 1.0 and ot["corrected"].max() <= 1.0


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 10_000), st.floats(0.0, 1.9))
def test_agreement_is_at_most_one_for_jittered_rasters(seed, jitter_ms):
    # Property of the definition (each matched count is bounded by its spike count):
    # f <= 1, hence corrected = (f - f0) / (1 - f0) <= 1, and no window has a
    # negative number of extra spikes.
    rng = np.random.default_rng(seed)
    ref = poisson_raster(20, 40.0, 300.0, rng)
    ot = compare(ref, perturbed(ref, rng, jitter_ms=jitter_ms, drop=0.1, add=0.1),
                 horizon_window_ms=10.0).over_time
    assert np.nanmax(ot["agreement"], initial=0.0) <= 1.0
    assert np.nanmax(ot["corrected"], initial=0.0) <= 1.0 + 1e-12
    assert (ot["extra"] >= 0).all() and (ot["missed"] >= 0).all()


# --- population statistics -----------------------------------------------------------------------

def test_isi_cv_against_numpy_loop_and_poisson_value():
    rng = np.random.default_rng(4)
    r = poisson_raster(40, 50.0, 20000.0, rng)
    cv = isi_cv(r)
    for c in range(40):
        isi = np.diff(r.train(c))
        assert cv[c] == pytest.approx(isi.std(ddof=1) / isi.mean(), rel=1e-10)
    # Poisson process: exponential intervals, CV = 1 (textbook)
    assert cv.mean() == pytest.approx(1.0, abs=0.03)


def test_ks_distance_against_scipy():
    rng = np.random.default_rng(10)
    for n, m in ((5, 7), (40, 40), (200, 13)):
        a, b = np.round(rng.normal(size=n), 1), np.round(rng.normal(0.3, 1, size=m), 1)   # with ties
        assert ks_distance(a, b) == pytest.approx(stats.ks_2samp(a, b, method="asymp").statistic, abs=1e-15)
    assert np.isnan(ks_distance(np.array([]), np.array([1.0])))


def test_golomb_chi_against_count_matrix():
    rng = np.random.default_rng(5)
    r = poisson_raster(30, 20.0, 3000.0, rng)
    counts = np.zeros((30, 600))
    for c in range(30):
        np.add.at(counts[c], (r.train(c) / 5.0).astype(int), 1)
    chi = np.sqrt(counts.mean(axis=0).var() / counts.var(axis=1).mean())
    assert golomb_chi(r, 5.0) == pytest.approx(chi, rel=1e-10)
    # fully synchronous cells: chi = 1 (Golomb & Rinzel 1993)
    t = np.sort(rng.uniform(0, 3000, 60))
    sync = Raster.from_arrays(np.repeat(np.arange(30), 60), np.tile(t, 30), n_cells=30,
                              t_start_ms=0.0, t_stop_ms=3000.0)
    assert golomb_chi(sync, 5.0) == pytest.approx(1.0, rel=1e-12)


def test_spectral_peak_finds_a_planted_oscillation():
    # population rate modulated at 40 Hz (thinning of a Poisson process)
    rng = np.random.default_rng(6)
    t = np.sort(rng.uniform(0, 10000.0, 400000))
    keep = rng.random(t.size) < 0.5 * (1 + np.sin(2 * np.pi * 40.0 * t * 1e-3))
    r = Raster.from_arrays(rng.integers(0, 100, keep.sum()), t[keep], n_cells=100, t_start_ms=0.0,
                           t_stop_ms=10000.0)
    freq, ratio = spectral_peak(population_counts(r, 1.0), 1.0)
    assert freq == pytest.approx(40.0, abs=1.0) and ratio > 10.0


# --- several tests, costs and the front ---------------------------------------------------------

def test_pareto_front_against_brute_force():
    rng = np.random.default_rng(7)
    for _ in range(30):
        cost, err = rng.integers(0, 8, 12).astype(float), rng.integers(0, 8, 12).astype(float)
        cost[rng.random(12) < 0.1] = np.nan
        on = pareto_front(cost, err)
        for i in range(12):
            beaten = any(cost[j] <= cost[i] and err[j] <= err[i] and (cost[j] < cost[i] or err[j] < err[i])
                         for j in range(12))
            # equal points: the first in (cost, error) order represents them
            assert on[i] <= (not beaten and np.isfinite(cost[i]))
        assert on.sum() == len({(cost[i], err[i]) for i in range(12)
                                if np.isfinite(cost[i]) and not any(
                                    cost[j] <= cost[i] and err[j] <= err[i]
                                    and (cost[j] < cost[i] or err[j] < err[i]) for j in range(12))})


def test_compare_many_ranks_tests_on_the_front():
    rng = np.random.default_rng(8)
    ref = poisson_raster(50, 20.0, 1000.0, rng)
    tests = {"coarse": perturbed(ref, rng, jitter_ms=0.5, drop=0.2, add=0.2),
             "fine": perturbed(ref, rng, jitter_ms=0.01, drop=0.0, add=0.0),
             "wasteful": perturbed(ref, rng, jitter_ms=0.5, drop=0.3, add=0.3)}
    result = compare_many(ref, tests, costs={"coarse": 1.0, "fine": 10.0, "wasteful": 20.0})
    assert list(result.table.index) == ["coarse", "fine", "wasteful"]
    assert result.table.loc["fine", "mismatch_fraction"] == 0.0
    assert list(result.front.index) == ["coarse", "fine"]
    assert not result.table.loc["wasteful", "on_front"]
    doc = json.loads(result.to_json())
    assert doc["front"] == ["coarse", "fine"] and set(doc["tests"]) == set(tests)
    assert compare_many(ref, tests).front is None


def test_comparison_to_frame_is_the_per_cell_table_with_fixed_dtypes():
    # The pen-and-paper case above: cell 0 shifted by +0.5 ms, cell 1's spike missed,
    # cell 2 with one extra spike, cell 3 silent in both.
    groups = dict(n_cells=4, t_stop_ms=100.0, group_names=("E", "I"), group_first=(0, 2))
    ref = Raster.from_arrays([0, 1, 2, 3], [10.0, 20.0, 30.0, 60.0], **groups)
    test = Raster.from_arrays([0, 2, 2, 3], [10.5, 30.0, 45.0, 60.0], **groups)
    f = compare(ref, test).to_frame()
    assert list(f["cell"]) == [0, 1, 2, 3] and list(f["group"]) == ["E", "E", "I", "I"]
    assert list(f["group"].cat.categories) == ["E", "I"]
    assert list(f["matched"]) == [1, 0, 1, 1] and list(f["missed"]) == [0, 1, 0, 0]
    assert list(f["extra"]) == [0, 0, 1, 0]
    assert f.loc[0, "shift_mean_ms"] == pytest.approx(0.5) and np.isnan(f.loc[1, "shift_mean_ms"])
    ints = ["cell", "n_ref", "n_test", "matched", "missed", "extra"]
    assert all(f[c].dtype == np.int64 for c in ints)
    assert all(f[c].dtype == np.float64 for c in f.columns if c not in ints + ["group"])
    # Tidy: summing the per-cell rows gives the summary's counts.
    assert f[["matched", "missed", "extra"]].sum().tolist() == [3, 1, 1]


def test_comparison_set_to_frame_one_row_per_test():
    rng = np.random.default_rng(8)
    ref = poisson_raster(30, 20.0, 500.0, rng)
    tests = {"fine": perturbed(ref, rng, jitter_ms=0.01, drop=0.0, add=0.0),
             "silent": frame([], []),
             "coarse": perturbed(ref, rng, jitter_ms=0.5, drop=0.2, add=0.2)}
    result = compare_many(ref, tests, costs={"fine": 10.0, "coarse": 1.0})
    f = result.to_frame()
    assert list(f["test"]) == ["fine", "silent", "coarse"] and f["test"].dtype == "string"
    for name, row in zip(f["test"], f.itertuples(index=False)):
        s = result.comparisons[name].summary
        assert (row.n_ref, row.n_test, row.matched, row.missed, row.extra) == (
            s["n_ref"], s["n_test"], s["matched"], s["missed"], s["extra"])
    silent = f.set_index("test").loc["silent"]
    assert silent["n_test"] == 0 and silent["missed_fraction"] == 1.0 and np.isnan(silent["shift_rms_ms"])
    assert np.isnan(silent["cost"]) and not silent["on_front"]
    assert f["matched"].dtype == np.int64 and f["diverged"].dtype == bool and f["on_front"].dtype == bool
    assert f["shift_rms_ms"].dtype == np.float64 and f["cost"].dtype == np.float64
    assert set(f.columns) == {"test"} | set(result.table.columns)


def test_to_json_writes_nan_as_null(tmp_path):
    c = compare(frame([0], [1.0]), frame([1], [5.0]), n_cells=2, t_stop_ms=10.0)
    doc = json.loads(c.to_json(tmp_path / "c.json"))
    assert doc["summary"]["shift_rms_ms"] is None and doc["summary"]["matched"] == 0
    assert json.loads((tmp_path / "c.json").read_text()) == doc
    assert doc["settings"]["cost_per_ms"] == 1.0


# --- figures -------------------------------------------------------------------------------------

def test_figures_are_drawn_and_written(tmp_path):
    rng = np.random.default_rng(9)
    ref = poisson_raster(30, 20.0, 1000.0, rng)
    c = compare(ref, perturbed(ref, rng, jitter_ms=0.3, drop=0.05, add=0.05))
    fig = raster_plots.plot_raster_difference(c, t_start_ms=0.0, t_stop_ms=300.0, cells=range(10))
    labels = fig.axes[0].get_legend_handles_labels()[1]
    assert labels == ["reference, matched", "test, matched", "missed (reference only)", "extra (test only)"]
    hist = raster_plots.plot_jitter_histogram(c)
    assert hist.axes[0].get_yscale() == "log"
    paths = raster_plots.write_figures(c, tmp_path / "figures", dpi=40)
    assert [p.name for p in paths] == ["raster_difference.png", "jitter_histogram.png",
                                       "jitter_vs_rate.png", "error_over_time.png"]
    assert all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in paths)
    many = compare_many(ref, {"a": c.test, "b": ref}, costs={"a": 1.0, "b": 2.0})
    assert raster_plots.write_front(many, tmp_path / "figures", dpi=40).read_bytes()[:4] == b"\x89PNG"


def test_raster_difference_says_which_subset_it_shows():
    rng = np.random.default_rng(10)
    ref = poisson_raster(80, 20.0, 1000.0, rng)
    c = compare(ref, perturbed(ref, rng, jitter_ms=0.3))
    firing = np.flatnonzero(ref.counts() + c.test.counts() > 0)
    view = raster_plots.raster_difference_view(c)
    assert list(view.cells) == list(firing[:50]) and (view.t_start_ms, view.t_stop_ms) == (0.0, 500.0)
    assert view.description == (f"the first 50 of {firing.size} firing cells (ids {firing[0]}-{firing[49]}), "
                                 "0-500 ms of 0-1000 ms")
    title = raster_plots.plot_raster_difference(c).axes[0].get_title()
    assert title == "Raster difference: " + view.description
    whole = raster_plots.raster_difference_view(c, t_stop_ms=1000.0, max_cells=1000)
    assert whole.description == f"all {firing.size} firing cells of 80, 0-1000 ms (the whole interval)"
    chosen = raster_plots.raster_difference_view(c, cells=[3, 5], t_start_ms=100.0, t_stop_ms=200.0)
    assert chosen.description == "2 chosen cells of 80, 100-200 ms of 0-1000 ms"
