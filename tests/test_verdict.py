"""The verdict's rules on constructed results tables: ranking by CPU seconds, the 10 % tie rule,
the accuracy margin, honest order fits; and the repeat rule of cost measurement.

Nothing here reads a clock: the tables and run costs are made up for the rules they test.
"""
from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from spikegauge.profile.cost import MAX_REPEATS, MIN_TOTAL_CPU_S, timed_run
from spikegauge.profile.front import EVENT_SET_NOTE, event_set_families, fitted_orders
from spikegauge.profile.verdict import accuracy_margin, seed_verdict, tied

TARGET = dict(target_jitter_ms=0.1, target_mismatch_frac=0.01)


def _row(point, strategy, cpu_s, work, jitter, mismatch=0.0, **kw):
    base = dict(point=point, seed=1, strategy=strategy, stepper=kw.pop("stepper", "rk2"),
                dt_ms=kw.pop("dt_ms", math.nan), crossing=kw.pop("crossing", "linear"),
                delivery=kw.pop("delivery", "exact"), rtol=kw.pop("rtol", math.nan), status="ok",
                cpu_s=cpu_s, cpu_spread=0.0, work=work, rhs_evals=work, steps=kw.pop("steps", work / 2),
                arrivals=100.0, arrivals_per_ms=10.0, steps_per_cell_ms=kw.pop("steps_per_cell_ms", 5.0),
                target_shift_rms_ms=jitter, target_mismatch_fraction=mismatch)
    base["label"] = f"{strategy} #{point}"
    base["meets_target"] = jitter <= TARGET["target_jitter_ms"] and mismatch <= TARGET["target_mismatch_frac"]
    base.update(kw)
    return base


def _verdict(rows):
    return seed_verdict(pd.DataFrame(rows), n_cells=10, duration_ms=100.0, **TARGET)


def test_ranking_is_by_cpu_seconds_not_work():
    # the local-adaptive point needs less work but more seconds: fixed wins, and the reason says why
    v = _verdict([_row(0, "fixed", cpu_s=0.010, work=4000, jitter=0.05),
                  _row(1, "local-adaptive", cpu_s=0.040, work=1000, jitter=0.05, steps=300)])
    assert v["outcome"] == "fixed" and v["recommended"]["point"] == 0
    # the same pair in work: below 1, work alone would reverse the ranking
    assert v["ratio"] == pytest.approx(4.0) and v["work_ratio"] == pytest.approx(0.25)
    assert "4x less" in v["text"] and "10 cells, 100 ms" in v["text"] and "advise" in v["text"]
    assert "work alone would rank local-adaptive first" in v["reason"]


def test_tie_between_fixed_and_adaptive_prefers_the_larger_margin():
    # 5 % apart: a tie; the adaptive point is further below the target, so it is recommended
    v = _verdict([_row(0, "fixed", cpu_s=0.0100, work=4000, jitter=0.08),
                  _row(1, "local-adaptive", cpu_s=0.0105, work=1000, jitter=0.01)])
    assert v["outcome"] == "tie" and v["recommended"]["point"] == 1
    assert "fixed #0" in v["text"] and "local-adaptive #1" in v["text"] and "more accuracy margin" in v["text"]
    # 11 % apart: no tie, the cheaper wins whatever its margin
    v = _verdict([_row(0, "fixed", cpu_s=0.0100, work=4000, jitter=0.08),
                  _row(1, "local-adaptive", cpu_s=0.0111, work=1000, jitter=0.01)])
    assert v["outcome"] == "fixed" and v["recommended"]["point"] == 0


def test_tie_inside_a_strategy_names_both_and_prefers_the_margin():
    rows = [_row(0, "fixed", cpu_s=0.0100, work=4000, jitter=0.09, dt_ms=0.2),
            _row(1, "fixed", cpu_s=0.0108, work=8000, jitter=0.001, dt_ms=0.1),
            _row(2, "fixed", cpu_s=0.0300, work=16000, jitter=0.0001, dt_ms=0.05),
            _row(3, "fixed", cpu_s=0.0050, work=2000, jitter=0.5, dt_ms=0.4)]  # misses the target
    v = _verdict(rows)
    assert v["recommended"]["point"] == 1
    assert v["cheapest"]["fixed"]["tied_with"] == ["fixed #0"]
    assert "ties" in v["text"] and "fixed #0" in v["text"]


def test_margin_and_tie_helpers():
    assert tied(1.0, 1.1) and tied(1.1, 1.0) and not tied(1.0, 1.1001)
    r = dict(target_shift_rms_ms=0.02, target_mismatch_fraction=0.005)
    assert accuracy_margin(r, 0.1, 0.01) == pytest.approx(2.0)  # the mismatch is the closer to its limit
    assert accuracy_margin(dict(target_shift_rms_ms=0.0, target_mismatch_fraction=0.0), 0.1, 0.01) == math.inf


def test_nothing_meets_the_target():
    v = _verdict([_row(0, "fixed", cpu_s=0.01, work=10, jitter=1.0)])
    assert v["outcome"] == "none" and v["recommended"] is None


def test_fits_leave_out_points_below_the_reference_uncertainty():
    # rk2 + linear with error 2 * dt^2; the two finest points lie below 3x the reference's 1e-4 ms
    dts = 0.2 / 2.0 ** np.arange(6)
    rows = [_row(i, "fixed", cpu_s=0.01, work=1.0 / dt, jitter=2.0 * dt ** 2, dt_ms=dt) for i, dt in enumerate(dts)]
    rows[-2]["target_shift_rms_ms"] = rows[-1]["target_shift_rms_ms"] = 2.5e-4  # the reference's floor
    table = pd.DataFrame(rows)
    loose = fitted_orders(table, reference_rms_ms=0.0)[0]
    honest = fitted_orders(table, reference_rms_ms=1e-4)[0]
    assert loose["n"] == 6 and loose["slope"] < 1.9  # the floor drags the slope down
    assert honest["n"] == 4 and honest["excluded"] == 2 and honest["slope"] == pytest.approx(2.0)
    assert honest["expected"] == 2.0


def test_event_set_adaptive_family_is_labelled_not_fitted_against_an_order():
    # steps barely change over four decades of rtol: the input events set the step
    rtols = [1e-2, 1e-3, 1e-4, 1e-5, 1e-6]
    rows = [_row(i, "global-adaptive", cpu_s=0.1, work=5000 + i, jitter=0.01 * (1 + 0.01 * i), rtol=r,
                 stepper="dp54", crossing="dense", steps=1000 + 10 * i) for i, r in enumerate(rtols)]
    rows += [_row(10 + i, "local-adaptive", cpu_s=0.1, work=1000 * 3 ** i, jitter=r, rtol=r, stepper="dp54",
                  crossing="dense", steps=100 * 3 ** i) for i, r in enumerate(rtols)]
    table = pd.DataFrame(rows)
    assert event_set_families(table) == {("global-adaptive", "dp54")}
    fits = {f["strategy"]: f for f in fitted_orders(table)}
    assert fits["global-adaptive"]["note"] == EVENT_SET_NOTE and math.isnan(fits["global-adaptive"]["expected"])
    assert fits["local-adaptive"]["note"] == "" and fits["local-adaptive"]["expected"] > 0
    assert "Higham 1991" in fits["local-adaptive"]["source"]


def test_order_table_expects_order_two_of_trapezoidal_and_proportionality_of_bdf():
    # the trapezoidal rule is second order (textbook; Hermite crossing does not cap it, Hansel et
    # al. 1998); bdf's expected slope on rtol is tolerance proportionality (Shampine & Reichelt 1997)
    dts = 0.2 / 2.0 ** np.arange(4)
    rtols = [1e-3, 1e-4, 1e-5, 1e-6]
    rows = [_row(i, "fixed", cpu_s=0.01, work=1.0 / dt, jitter=0.5 * dt ** 2, dt_ms=dt, stepper="trapezoidal",
                 crossing="hermite") for i, dt in enumerate(dts)]
    for sg in ("local-adaptive", "global-adaptive"):
        rows += [_row(10 + i, sg, cpu_s=0.1, work=1000 * 3 ** i, jitter=r, rtol=r, stepper="bdf",
                      crossing="dense", steps=100 * 3 ** i) for i, r in enumerate(rtols)]
    fits = {(f["strategy"], f["stepper"]): f for f in fitted_orders(pd.DataFrame(rows))}
    trap = fits[("fixed", "trapezoidal")]
    assert trap["expected"] == 2.0 and trap["slope"] == pytest.approx(2.0)
    assert "trapezoidal" in trap["source"]
    for sg in ("local-adaptive", "global-adaptive"):
        f = fits[(sg, "bdf")]
        assert f["expected"] == 1.0 and f["slope"] == pytest.approx(1.0)
        assert "Shampine & Reichelt 1997" in f["source"]


def test_verdict_ranks_trapezoidal_and_bdf_like_the_others():
    # the new steppers go through the same ranking by CPU seconds
    v = _verdict([_row(0, "fixed", cpu_s=0.030, work=4000, jitter=0.05, stepper="trapezoidal",
                       crossing="hermite"),
                  _row(1, "local-adaptive", cpu_s=0.010, work=1000, jitter=0.05, stepper="bdf",
                       crossing="dense", steps=300)])
    assert v["outcome"] == "adaptive" and v["recommended"]["point"] == 1
    assert "local-adaptive #1" in v["text"]


def _fake_runs(cpu_times, status="ok"):
    it = iter(cpu_times)
    calls = []

    def run_once():
        calls.append(1)
        return SimpleNamespace(status=status, cost=dict(cpu_s=next(it)))
    return run_once, calls


def test_timed_run_repeats_short_runs_and_keeps_the_least():
    run_once, calls = _fake_runs([0.012, 0.010, 0.011, 0.015, 0.010, 0.9])
    run = timed_run(run_once)
    assert len(calls) == MAX_REPEATS  # 5 short runs add up to less than MIN_TOTAL_CPU_S
    assert run.cost["cpu_s"] == 0.010 and run.cost["cpu_repeats"] == MAX_REPEATS
    assert run.cost["cpu_spread"] == pytest.approx(0.5)
    # a run of MIN_TOTAL_CPU_S or more runs once; a diverged run is not repeated
    run_once, calls = _fake_runs([MIN_TOTAL_CPU_S, 1.0])
    assert timed_run(run_once).cost["cpu_repeats"] == 1 and len(calls) == 1
    run_once, calls = _fake_runs([0.001, 0.001], status="diverged")
    assert timed_run(run_once).cost["cpu_repeats"] == 1 and len(calls) == 1
    run_once, calls = _fake_runs([0.15, 0.08, 1.0])
    assert timed_run(run_once).cost["cpu_s"] == 0.08 and len(calls) == 2
    # a first run that compiled is repeated once even when long enough, unless very long
    it = iter([dict(cpu_s=0.5, compile_s=3.0), dict(cpu_s=0.4, compile_s=0.0), dict(cpu_s=9.0)])
    calls = []

    def compiling():
        calls.append(1)
        return SimpleNamespace(status="ok", cost=next(it))
    assert timed_run(compiling).cost["cpu_s"] == 0.4 and len(calls) == 2
    it = iter([dict(cpu_s=50.0, compile_s=3.0), dict(cpu_s=50.0)])
    calls.clear()
    assert timed_run(compiling).cost["cpu_repeats"] == 1 and len(calls) == 1
