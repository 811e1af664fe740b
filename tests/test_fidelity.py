"""Statistical fidelity: the yardstick's parts against pen-and-paper cases and scipy.stats."""
import math

import numpy as np
import pytest
from scipy import stats

from spikegauge.analysis import Raster, poisson_raster
from spikegauge.analysis.fidelity import (Yardstick, default_runs, group_isis, holm_adjust,
                                          perturbed_network, population_statistics,
                                          prediction_p_value, statistic_names)


def _regular(rates_hz, duration_ms=1000.0, groups=None):
    """Clock-like trains: cell i fires every 1000 / rates_hz[i] ms from half a period."""
    cell, time = [], []
    for c, r in enumerate(rates_hz):
        period = 1000.0 / r
        t = np.arange(0.5 * period, duration_ms, period)
        cell.append(np.full(t.size, c))
        time.append(t)
    names, first = groups or (("all",), [0])
    return Raster.from_arrays(np.concatenate(cell), np.concatenate(time), n_cells=len(rates_hz),
                              t_start_ms=0.0, t_stop_ms=duration_ms, group_names=names,
                              group_first=first)


def test_prediction_p_value_on_the_interval_edge():
    # Student's t with 2 degrees of freedom has the closed-form CDF 1/2 + t / (2 sqrt(2 + t^2)),
    # so its 97.5 % quantile is q sqrt(2 / (1 - q^2)) with q = 0.95 (pen and paper).
    t975 = 0.95 * math.sqrt(2 / (1 - 0.95 ** 2))
    assert stats.t.ppf(0.975, 2) == pytest.approx(t975, rel=1e-12)
    values = [1.0, 2.0, 3.0]                      # mean 2, s = 1, K = 3
    edge = 2.0 + t975 * math.sqrt(1 + 1 / 3)      # prediction interval edge at a = 0.05
    assert prediction_p_value(values, edge) == pytest.approx(0.05, rel=1e-10)
    assert prediction_p_value(values, 2.0 - (edge - 2.0)) == pytest.approx(0.05, rel=1e-10)
    assert prediction_p_value(values, 2.0) == pytest.approx(1.0)


def test_prediction_p_value_agrees_with_scipy_interval():
    # Inside scipy.stats.t.interval(1 - a, K - 1, mean, s sqrt(1 + 1/K)) exactly when p > a.
    rng = np.random.default_rng(3)
    x = rng.normal(5.0, 2.0, size=12)
    lo, hi = stats.t.interval(0.99, x.size - 1, loc=x.mean(),
                              scale=x.std(ddof=1) * math.sqrt(1 + 1 / x.size))
    for y, inside in ((lo + 1e-9, True), (hi - 1e-9, True), (lo - 1e-6, False), (hi + 1e-6, False)):
        assert (prediction_p_value(x, y) > 0.01) is inside


def test_prediction_p_value_limits():
    assert prediction_p_value([2.0, 2.0, 2.0], 2.0) == 1.0
    assert prediction_p_value([2.0, 2.0, 2.0], 2.0 + 1e-12) == 0.0
    assert prediction_p_value([1.0, 2.0, 3.0], math.nan) == 0.0
    with pytest.raises(ValueError):
        prediction_p_value([1.0, 2.0], 1.5)


def test_holm_by_hand():
    # Holm 1979: sorted 0.005, 0.01, 0.03, 0.04 times 4, 3, 2, 1 = 0.02, 0.03, 0.06, 0.04;
    # running maximum 0.02, 0.03, 0.06, 0.06 (pen and paper).
    adj = holm_adjust([0.01, 0.04, 0.03, 0.005])
    np.testing.assert_allclose(adj, [0.03, 0.06, 0.06, 0.02])
    # Capped at one; a single test is unchanged.
    np.testing.assert_allclose(holm_adjust([0.5, 0.6]), [1.0, 1.0])
    np.testing.assert_allclose(holm_adjust([0.2]), [0.2])
    with pytest.raises(ValueError):
        holm_adjust([0.1, math.nan])


def test_holm_controls_the_family_wise_level():
    # Under the null, uniform p-values: Holm rejects anything at most as often as Bonferroni,
    # whose family-wise rate is at most a (Boole's inequality); 20000 families of 10 tests.
    rng = np.random.default_rng(0)
    p = rng.uniform(size=(20000, 10))
    rejected_any = np.array([(holm_adjust(row) <= 0.05).any() for row in p])
    rate = rejected_any.mean()
    # Independent tests: the rate is 1 - (1 - 0.05/10)^10 = 0.0489 for Bonferroni's first step,
    # which decides whether Holm rejects anything (pen and paper); binomial 99.9 % bounds.
    expected = 1 - (1 - 0.005) ** 10
    lo, hi = stats.binom.ppf([0.0005, 0.9995], 20000, expected) / 20000
    assert lo <= rate <= hi


def test_default_runs_by_hand():
    # 11 tests at 5 %: Holm's strictest level 0.05/11, so 1/(pairs + 1) <= 1/220 needs 219 pairs:
    # K = 21 gives 210, K = 22 gives 231 (pen and paper).
    assert default_runs(11, 0.05) == 22
    level = 0.05 / 11
    assert stats.t.ppf(1 - level / 2, 21) * math.sqrt(1 + 1 / 22) <= 1.2 * stats.norm.ppf(1 - level / 2)
    # One test at 5 %: 19 pairs are enough from K = 7, but t_{0.975, K-1} sqrt(1 + 1/K) <= 1.2 * 1.96
    # first holds at K = 11 (t tables: 2.228 * 1.0445 = 2.327 <= 2.352 < 2.262 * 1.049 = 2.373).
    assert default_runs(1, 0.05) == 11
    with pytest.raises(ValueError):
        default_runs(0)


def test_population_statistics_of_clocks():
    # Two groups of clock-like cells: rates exact, CV 0 (pen and paper).
    r = _regular([10.0, 10.0, 20.0, 40.0], groups=(("a", "b"), [0, 2]))
    s = population_statistics(r)
    assert list(s) == statistic_names(("a", "b"))
    assert s["rate_a_hz"] == pytest.approx(10.0)
    assert s["rate_b_hz"] == pytest.approx(30.0)
    assert s["cv_a"] == pytest.approx(0.0, abs=1e-12)
    assert s["cv_b"] == pytest.approx(0.0, abs=1e-12)


def test_population_statistics_of_poisson_trains():
    # Independent Poisson trains: CV about 1, Fano factor of the population count about 1,
    # pair correlation about 0, chi about 1/sqrt(N) (Golomb & Rinzel 1993) (textbook Poisson facts).
    r = poisson_raster(200, 20.0, 20000.0, np.random.default_rng(1))
    s = population_statistics(r)
    assert s["cv_all"] == pytest.approx(1.0, abs=0.03)
    assert s["fano"] == pytest.approx(1.0, abs=0.1)
    assert abs(s["pair_correlation"]) < 0.01
    assert s["chi"] == pytest.approx(1 / math.sqrt(200), rel=0.2)


def test_group_isis_by_hand():
    r = Raster.from_arrays([0, 0, 0, 1, 1, 2], [1.0, 4.0, 10.0, 2.0, 3.5, 7.0], n_cells=3,
                           t_start_ms=0.0, t_stop_ms=20.0, group_names=("a", "b"), group_first=[0, 1])
    isi = group_isis(r)
    np.testing.assert_allclose(isi["a"], [3.0, 6.0])
    np.testing.assert_allclose(isi["b"], [1.5])


def test_perturbed_network_moves_only_initial_voltages():
    from spikegauge.network import build_network
    from spikegauge.scenario import load_scenario
    from pathlib import Path
    net = build_network(load_scenario(Path(__file__).parents[1] / "scenarios" / "demo-profile.toml"))
    assert perturbed_network(net, 0) is net
    a, b = perturbed_network(net, 1), perturbed_network(net, 1)
    np.testing.assert_array_equal(a.y0, b.y0)                 # seeded
    dv = a.y0[:, 0] - net.y0[:, 0]
    assert 0.5 < np.abs(dv).max() <= 1.0 + 1e-9       # up to 1 mV by default
    np.testing.assert_array_equal(a.y0[:, 1:], net.y0[:, 1:])
    assert not np.array_equal(perturbed_network(net, 2).y0, a.y0)


def _poisson_runs(k, rate_hz, seed):
    rng = np.random.default_rng(seed)
    return [poisson_raster(60, rate_hz, 2000.0, rng) for _ in range(k)]


def test_yardstick_passes_the_same_process_and_fails_a_changed_rate():
    # Independent realisations of one Poisson process are "the same activity"; 30 % more rate is not.
    ys = Yardstick.from_runs(_poisson_runs(22, 10.0, 0))
    assert ys.k == 22 and ys.n_distinct == 22 and ys.groups == ("all",)
    passed, table = ys.judge(_poisson_runs(1, 10.0, 99)[0])
    assert passed, table
    assert list(table.columns) == ["statistic", "kind", "scale", "reference_mean", "spread",
                                   "test_value", "p_value", "holm_p", "passed"]
    assert list(table["statistic"]) == list(ys.names) + ["isi_all"]
    passed, table = ys.judge(_poisson_runs(1, 13.0, 99)[0])
    assert not passed
    failed = set(table["statistic"][~table["passed"]])
    assert "rate_all_hz" in failed and "isi_all" in failed


def test_yardstick_ks_p_value_by_hand():
    # Three reference runs whose ISIs are {1, 1}, {1, 1}, {2, 2}: pair distances 0, 1, 1. A test with
    # ISIs {1, 1} is 0, 0, 1 away, mean 1/3: two of three pairs are at least as far, p = (1 + 2) / (3 + 1)
    # (pen and paper).
    def one_cell(isi):
        return Raster.from_arrays([0, 0, 0], [1.0, 1.0 + isi, 1.0 + 2 * isi], n_cells=1,
                                  t_start_ms=0.0, t_stop_ms=10.0)
    ys = Yardstick.from_runs([one_cell(1.0), one_cell(1.0), one_cell(2.0)])
    np.testing.assert_allclose(ys.null_distances["all"], [0.0, 1.0, 1.0])
    _, table = ys.judge(one_cell(1.0))
    row = table.set_index("statistic").loc["isi_all"]
    assert row["test_value"] == pytest.approx(1 / 3)
    assert row["p_value"] == pytest.approx(0.75)


def test_judge_refuses_a_run_of_another_network():
    ys = Yardstick.from_runs(_poisson_runs(3, 10.0, 0))
    with pytest.raises(ValueError, match="does not match"):
        ys.judge(poisson_raster(61, 10.0, 2000.0, np.random.default_rng(5)))
    with pytest.raises(ValueError, match="does not match"):
        ys.judge(poisson_raster(60, 10.0, 1000.0, np.random.default_rng(5)))
    with pytest.raises(ValueError, match="at least 3"):
        Yardstick.from_runs(_poisson_runs(2, 10.0, 0))


def test_ratio_statistics_are_judged_on_a_log_scale():
    # Reference Fano factors e, e^2, e^3: on the log scale the reference values are 1, 2, 3, and the
    # p-value is that of log(test) against them (pen and paper: the t interval of the logarithms).
    from spikegauge.analysis.fidelity import LOG_SCALE
    assert set(LOG_SCALE) == {"fano", "peak_ratio"}
    ys = Yardstick.from_runs(_poisson_runs(3, 10.0, 0))
    j = ys.names.index("fano")
    values = ys.values.copy()
    values[:, j] = np.exp([1.0, 2.0, 3.0])
    ys = Yardstick(names=ys.names, values=values, groups=ys.groups, isis=ys.isis,
                   null_distances=ys.null_distances, options=ys.options, n_distinct=ys.n_distinct,
                   shape=ys.shape)
    test = _poisson_runs(1, 10.0, 7)[0]
    fano = population_statistics(test)["fano"]
    row = ys.judge(test)[1].set_index("statistic").loc["fano"]
    assert row["scale"] == "log"
    assert row["p_value"] == pytest.approx(prediction_p_value([1.0, 2.0, 3.0], math.log(fano)))


def test_log_scale_statistic_left_out_when_not_positive():
    # Clocks at 20 Hz put exactly one spike of every cell in each 50 ms bin: the population count
    # does not vary and the Fano factor is 0 (pen and paper), which a log scale cannot take.
    runs = _poisson_runs(2, 20.0, 0) + [_regular([20.0] * 60, duration_ms=2000.0)]
    assert population_statistics(runs[2])["fano"] == 0.0
    ys = Yardstick.from_runs(runs)
    assert "fano" not in ys.names
    assert "log scale" in ys.left_out["fano"]
