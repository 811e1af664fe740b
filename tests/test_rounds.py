"""The sweep in rounds (profile/rounds.py) on made-up outcomes: no network is run.

Each test plays the runner's part: it asks the plan for a round, records an outcome for every
entry from a made-up accuracy and work model, closes the round, and looks at what the plan did.
"""
from __future__ import annotations

import math

from spikegauge.profile.rounds import MAX_REFINEMENTS, RTOL_MAX, SweepPlan, family_key


def _fixed(stepper, dt, delivery="exact"):
    return dict(strategy="fixed", stepper=stepper, dt_ms=dt, crossing="linear", delivery=delivery)


def _adaptive(strategy, rtol):
    return dict(strategy=strategy, stepper="dp54", crossing="dense", rtol=rtol, atol=rtol)


def _play(plan, outcome, pilot_work=None, max_rounds=30):
    """Run the plan to the end; ``outcome(settings, work_limit) -> (status, work, meets)``."""
    rounds = []
    for _ in range(max_rounds):
        entries, pilots = plan.next_round()
        for p in pilots:
            p.status, p.t_reached_ms = "ok", p.t_stop_ms
            p.work = pilot_work(p.settings) * p.t_stop_ms / plan.duration_ms
        if not entries and not pilots:
            return rounds
        rounds.append([(e.settings, e.work_limit) for e in entries])
        for e in entries:
            plan.record(e, *outcome(e.settings, e.work_limit))
        plan.close_round()
    raise AssertionError("the plan did not end")


def _with_limit(work, meets):
    """An outcome model: work and target from the setting, the limit applied as the engine does."""
    def outcome(s, limit):
        w = work(s)
        if limit is not None and w > limit:
            return "stopped", limit * 1.01, False
        return "ok", w, meets(s)
    return outcome


def test_families_run_cheap_to_dear_one_per_round_and_the_coarse_edge_extends():
    sweep = [_fixed("rk2", dt) for dt in (0.1, 0.05, 0.025)] + [_fixed("rk4", dt) for dt in (0.1, 0.05)]
    plan = SweepPlan(sweep, d_min_ms=0.8, duration_ms=100.0)
    rounds = _play(plan, _with_limit(lambda s: 1.0 / s["dt_ms"], lambda s: s["dt_ms"] <= 0.4))
    first = [s for s, _ in rounds[0]]
    assert first == [_fixed("rk2", 0.1), _fixed("rk4", 0.1)]  # the coarsest of each family first
    assert rounds[0][0][1] is None  # no limit before anything met the target
    # both coarsest points met the target: dt doubles up to the smallest delay, not past it
    dts = {fam: sorted(e.settings["dt_ms"] for e in plan.entries if family_key(e.settings) == fam)
           for fam in {family_key(s) for s in sweep}}
    assert dts[family_key(_fixed("rk2", 1))] == [0.025, 0.05, 0.1, 0.2, 0.4, 0.8]
    assert {e.origin for e in plan.entries if e.settings["dt_ms"] > 0.1} == {"coarser"}
    # extension stops where the target is missed: dt 0.8 missed it, nothing coarser was tried
    assert not any(e.settings["dt_ms"] > 0.8 for e in plan.entries)


def test_coarse_extension_stops_at_a_missed_target_and_rtol_max():
    plan = SweepPlan([_adaptive("local-adaptive", r) for r in (1e-4, 1e-5)], d_min_ms=1.0, duration_ms=100.0)
    _play(plan, _with_limit(lambda s: -math.log10(s["rtol"]), lambda s: True))
    assert max(e.settings["rtol"] for e in plan.entries) == RTOL_MAX
    assert all(e.settings["atol"] == e.settings["rtol"] for e in plan.entries)  # atol follows rtol
    plan = SweepPlan([_adaptive("local-adaptive", r) for r in (1e-4, 1e-5)], d_min_ms=1.0, duration_ms=100.0)
    _play(plan, _with_limit(lambda s: -math.log10(s["rtol"]), lambda s: s["rtol"] <= 1e-3))
    assert sorted(e.settings["rtol"] for e in plan.entries) == [1e-5, 1e-4, 1e-3, 1e-2]


def test_a_run_past_the_limit_is_stopped_and_its_finer_settings_skipped():
    # fixed rk2 meets the target cheaply; rk4's finer points cost a hundred times more
    sweep = [_fixed("rk2", 0.1), _fixed("rk2", 0.05)] + [_fixed("rk4", dt) for dt in (0.1, 0.05, 0.025, 0.0125)]
    plan = SweepPlan(sweep, d_min_ms=0.1, duration_ms=100.0, factor=10.0)

    def work(s):
        return 10.0 / s["dt_ms"] if s["stepper"] == "rk2" else 4000.0 / s["dt_ms"]
    _play(plan, _with_limit(work, lambda s: s["stepper"] == "rk2"))
    status = {(e.settings["stepper"], e.settings["dt_ms"]): e.status for e in plan.entries}
    assert status[("rk4", 0.1)] == "ok"  # round 0: no limit yet
    assert status[("rk4", 0.05)] == "stopped"  # 80000 > 10 x 100
    assert status[("rk4", 0.025)] == status[("rk4", 0.0125)] == "skipped"
    skipped = [e for e in plan.entries if e.status == "skipped"]
    assert all(e.predicted_work > 1000.0 and "already passed the work limit" in e.message for e in skipped)


def test_fixed_and_adaptive_do_not_limit_each_other_but_the_two_adaptive_strategies_do():
    sweep = [_fixed("euler", dt, "grid") for dt in (0.1, 0.05)] + \
            [_adaptive("local-adaptive", r) for r in (1e-2, 1e-3)] + \
            [_adaptive("global-adaptive", r) for r in (1e-2, 1e-3)]
    plan = SweepPlan(sweep, d_min_ms=0.1, duration_ms=100.0, factor=10.0)
    work = {"fixed": 1e6, "local-adaptive": 1e3, "global-adaptive": 1e5}
    rounds = _play(plan, _with_limit(lambda s: work[s["strategy"]] * (1 + (s.get("rtol") == 1e-3)),
                                     lambda s: True),
                   pilot_work=lambda s: work[s["strategy"]])
    by = {(e.settings["strategy"], e.settings.get("dt_ms"), e.settings.get("rtol")): e for e in plan.entries}
    # a fixed point a thousand times the local adaptive work is not stopped by it
    assert by[("fixed", 0.05, None)].status == "ok" and by[("fixed", 0.05, None)].work_limit == 1e7
    # global adaptive: the pilot predicts 1e5 work, past 10 x 1e3 of local adaptive: skipped unrun
    glob = [e for e in plan.entries if e.settings["strategy"] == "global-adaptive"]
    assert {e.status for e in glob} == {"skipped"}
    assert all(e.predicted_work == 1e5 and "from a pilot" in e.message for e in glob)
    assert all(s["strategy"] != "global-adaptive" for r in rounds for s, _ in r)


def test_global_adaptive_runs_when_its_prediction_is_within_the_limit():
    sweep = [_adaptive("local-adaptive", 1e-2)] + [_adaptive("global-adaptive", r) for r in (1e-2, 1e-3)]
    plan = SweepPlan(sweep, d_min_ms=1.0, duration_ms=100.0)
    rounds = _play(plan, _with_limit(lambda s: 100.0, lambda s: True), pilot_work=lambda s: 100.0)
    assert rounds[0] == [(_adaptive("local-adaptive", 1e-2), None)]  # the global family waits for its pilot
    glob = [e for e in plan.entries if e.settings["strategy"] == "global-adaptive"]
    assert {e.status for e in glob} == {"ok"} and min(e.round for e in glob) == 1


def test_nothing_meets_the_target_refines_the_fine_edge_a_bounded_number_of_times():
    plan = SweepPlan([_fixed("rk2", dt) for dt in (0.1, 0.05)], d_min_ms=1.0, duration_ms=100.0)
    _play(plan, _with_limit(lambda s: 1.0 / s["dt_ms"], lambda s: False))
    finer = sorted(e.settings["dt_ms"] for e in plan.entries if e.origin == "finer")
    assert finer == [0.0125, 0.025] and len(finer) == MAX_REFINEMENTS
    # a strategy that meets the target is not refined
    plan = SweepPlan([_fixed("rk2", dt) for dt in (0.1, 0.05)], d_min_ms=0.1, duration_ms=100.0)
    _play(plan, _with_limit(lambda s: 1.0 / s["dt_ms"], lambda s: s["dt_ms"] < 0.07))
    assert not [e for e in plan.entries if e.origin != "sweep"]


def test_the_plan_is_the_same_whatever_order_the_results_of_a_round_are_recorded_in():
    sweep = [_fixed("rk2", dt) for dt in (0.2, 0.1, 0.05)] + [_fixed("rk4", dt) for dt in (0.2, 0.1, 0.05)] + \
            [_adaptive("local-adaptive", r) for r in (1e-2, 1e-3, 1e-4)]
    outcome = _with_limit(lambda s: (1.0 / s.get("dt_ms", 1.0)) * (3 if s["stepper"] == "rk4" else 1)
                          + (-100 * math.log10(s["rtol"]) if "rtol" in s else 0),
                          lambda s: s.get("dt_ms", 0) <= 0.1)

    def play(reverse):
        plan = SweepPlan(sweep, d_min_ms=0.4, duration_ms=50.0, factor=3.0)
        while True:
            entries, _ = plan.next_round()
            if not entries:
                break
            for e in (reversed(entries) if reverse else entries):
                plan.record(e, *outcome(e.settings, e.work_limit))
            plan.close_round()
        return [(e.settings, e.status, e.round, e.work_limit) for e in plan.entries]
    assert play(False) == play(True)


def test_without_a_limit_global_adaptive_waits_for_the_local_adaptive_families():
    # local adaptive never meets the target, so there is no limit: the global family runs only
    # once every local setting has run
    sweep = [_adaptive("local-adaptive", r) for r in (1e-2, 1e-3, 1e-4)] + \
            [_adaptive("global-adaptive", r) for r in (1e-2, 1e-3)]
    plan = SweepPlan(sweep, d_min_ms=1.0, duration_ms=100.0)
    rounds = _play(plan, _with_limit(lambda s: 10.0, lambda s: False), pilot_work=lambda s: 10.0)
    last_local = max(i for i, r in enumerate(rounds) for s, _ in r if s["strategy"] == "local-adaptive")
    first_global = min(i for i, r in enumerate(rounds) for s, _ in r if s["strategy"] == "global-adaptive")
    assert first_global > last_local
