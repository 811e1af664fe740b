"""The sweep in rounds: cheap points first, edges found, hopeless points stopped or skipped.

The settings of a sweep fall into families: the same strategy, stepper,
crossing and delivery (and tolerance rule), differing only in the time step
(fixed) or the tolerance (adaptive). A family is run from its cheapest
setting (largest dt, loosest rtol) to its dearest, one setting per round, all
families side by side; after each round every new point is compared with the
reference, and the next round is planned from what the earlier rounds found:

* **Work limit.** Once some point meets the target, a run whose work (rhs
  evaluations, Newton iterations and Jacobian evaluations) passes ``factor`` times the least work
  of the points of earlier rounds that meet it cannot win: it is stopped at
  that limit (status ``stopped``, its work a lower bound) and the finer
  settings of its family are not run (status ``skipped``). Work is compared
  only between strategies whose steps cost alike per unit of work
  (:data:`COMPARABLE`): the fixed step's block loop spends some fifty times
  less per right-hand side than an adaptive step with its error control and
  event handling (measured on the demo: about 0.01 against 0.2-0.5 µs), so a
  fixed point ten times the work of an adaptive one can still be the cheaper
  in seconds, while between the two adaptive strategies it cannot.
* **Global adaptive pilot.** A global adaptive step ends at every event of the
  whole network, so its step count follows the network's event rate, not the
  tolerance: a short pilot run of the family's loosest setting predicts the
  work of the whole run, and a family whose predicted work alone passes the
  limit is skipped, the prediction shown. While there is no limit yet, a
  global family waits for the local adaptive families to finish.
* **Coarse edge.** When a family's coarsest point meets the target, the sweep
  adds a coarser one (dt doubled while it stays within the smallest delay,
  rtol ten times larger up to ``RTOL_MAX``) until the target is missed or the
  run diverges.
* **Fine edge.** When no point of a strategy meets the target, each of its
  families is refined past its finest setting (dt halved, rtol a tenth), at
  most ``MAX_REFINEMENTS`` times.

Every decision depends on counts and on the comparisons of earlier rounds
only, never on seconds or on the order in which runs finish, so serial,
process and Dask executors give the same table.
"""
from __future__ import annotations

import dataclasses
import math

WORK_LIMIT_FACTOR = 10.0
"""Default factor of the work limit (``--work-limit-factor``)."""
RTOL_MAX = 0.1
"""Loosest tolerance a coarse extension reaches."""
RTOL_MIN = 1e-10
"""Tightest tolerance a fine refinement reaches."""
MAX_REFINEMENTS = 2
"""Settings a family may add past its finest one when its strategy meets no target."""
PILOT_FRACTION = 0.05
"""A global adaptive pilot runs this fraction of the duration ..."""
PILOT_MIN_MS = 2.0
"""... but at least this long (ms), and never longer than the run."""
COMPARABLE = {"fixed": ("fixed",), "global-adaptive": ("global-adaptive", "local-adaptive"),
              "local-adaptive": ("global-adaptive", "local-adaptive")}
"""Strategies whose met targets set a strategy's work limit."""


def family_key(s: dict) -> tuple:
    """What a family shares: everything but the step size or the tolerance."""
    if s["strategy"] == "fixed":
        return ("fixed", s["stepper"], s["crossing"], s["delivery"])
    atol_rule = "atol=rtol" if s.get("atol") == s.get("rtol") else f"atol={s.get('atol')!r}"
    return (s["strategy"], s["stepper"], s["crossing"], atol_rule)


def size(s: dict) -> float:
    """The family's size parameter: larger is cheaper (dt in ms, or rtol)."""
    return float(s["dt_ms"] if s["strategy"] == "fixed" else s["rtol"])


def resized(s: dict, value: float) -> dict:
    """The same setting at another dt or rtol (atol follows rtol when it did)."""
    out = dict(s)
    if s["strategy"] == "fixed":
        out["dt_ms"] = value
    else:
        if s.get("atol") == s.get("rtol"):
            out["atol"] = value
        out["rtol"] = value
    return out


@dataclasses.dataclass
class Entry:
    """One setting of the sweep and what became of it."""

    settings: dict
    origin: str                  # "sweep", "coarser" or "finer"
    status: str = "pending"      # pending, then the run's status, or "skipped"
    work: float = math.nan
    meets: bool = False
    round: int = -1
    work_limit: float | None = None
    predicted_work: float = math.nan
    message: str = ""


@dataclasses.dataclass
class Pilot:
    """A short run of a global adaptive family that predicts the work of the whole run."""

    settings: dict
    t_stop_ms: float
    work: float = math.nan
    t_reached_ms: float = math.nan
    status: str = "pending"

    def predicted_work(self, duration_ms: float) -> float:
        if self.status not in ("ok", "stopped") or not self.t_reached_ms > 0:
            return math.nan
        return self.work * duration_ms / self.t_reached_ms


class Family:
    """The entries of one family, kept in order from cheapest (coarsest) to dearest."""

    def __init__(self, key):
        self.key = key
        self.entries: list[Entry] = []
        self.refinements = 0
        self.pilot: Pilot | None = None

    @property
    def strategy(self) -> str:
        return self.key[0]

    def add(self, entry: Entry) -> None:
        self.entries.append(entry)
        self.entries.sort(key=lambda e: -size(e.settings))

    def has(self, value: float) -> bool:
        return any(math.isclose(size(e.settings), value, rel_tol=1e-9) for e in self.entries)


class SweepPlan:
    """The rounds of one seed's sweep (see the module docstring).

    Parameters
    ----------
    sweep : list of dict
        Resolved settings, in the sweep's order.
    d_min_ms, duration_ms : float
        Smallest delay (the largest fixed step) and the run's duration.
    factor : float
        Work limit factor (> 1).
    """

    def __init__(self, sweep, d_min_ms: float, duration_ms: float, factor: float = WORK_LIMIT_FACTOR):
        self.d_min_ms, self.duration_ms, self.factor = float(d_min_ms), float(duration_ms), float(factor)
        self.entries: list[Entry] = []
        self.families: dict[tuple, Family] = {}
        for s in sweep:
            self._new(s, "sweep")
        self.round = 0
        self._met: list[tuple[str, float]] = []  # (strategy, work) of points of earlier rounds that met it

    def _new(self, settings: dict, origin: str) -> Entry:
        e = Entry(settings=dict(settings), origin=origin)
        self.entries.append(e)
        self.families.setdefault(family_key(settings), Family(family_key(settings))).add(e)
        return e

    def work_limit(self, strategy: str) -> float | None:
        """``factor`` times the least work that met the target in earlier rounds, among the
        strategies comparable to ``strategy`` (None while there is none)."""
        works = [w for s, w in self._met if s in COMPARABLE[strategy]]
        return self.factor * min(works) if works else None

    def next_round(self) -> tuple[list[Entry], list[Pilot]]:
        """The entries to run in the next round (their ``work_limit`` set) and the pilots to run
        first; entries found hopeless are marked ``skipped`` here. Empty lists: the sweep is done."""
        runs, pilots = [], []
        for fam in self.families.values():
            limit = self.work_limit(fam.strategy)
            pending = [e for e in fam.entries if e.status == "pending"]
            if not pending:
                continue
            # a coarser extension runs beside the family's next finer setting
            coarse = [e for e in pending if e.origin == "coarser"]
            finer = [e for e in pending if e.origin != "coarser"]
            picks = coarse[:1] + finer[:1]
            if fam.strategy == "global-adaptive" and finer:
                if fam.pilot is None:
                    first = fam.entries[0].settings
                    fam.pilot = Pilot(settings=first, t_stop_ms=self.pilot_ms())
                    pilots.append(fam.pilot)
                    picks = coarse[:1]  # the family's own points wait for the prediction
                elif limit is not None:
                    predicted = fam.pilot.predicted_work(self.duration_ms)
                    if predicted > limit:
                        self._skip(finer, predicted, f"predicted work {predicted:.4g} (from a pilot of "
                                   f"{fam.pilot.t_reached_ms:g} ms) passes the limit {limit:.4g}")
                        picks = coarse[:1]
                elif self._local_pending():
                    # no limit yet: the global family waits until the local adaptive families,
                    # whose steps cost alike per unit of work and which are far cheaper in
                    # active networks, have met the target or run out of settings
                    picks = coarse[:1]
            for e in picks:
                e.round, e.work_limit = self.round, limit
                e.status = "queued"
                runs.append(e)
        self.round += 1
        return runs, pilots

    def _local_pending(self) -> bool:
        return any(e.status in ("pending", "queued") for fam in self.families.values()
                   if fam.strategy == "local-adaptive" for e in fam.entries)

    def pilot_ms(self) -> float:
        return min(self.duration_ms, max(PILOT_FRACTION * self.duration_ms, PILOT_MIN_MS))

    @staticmethod
    def _skip(entries, predicted: float, message: str) -> None:
        for e in entries:
            e.status, e.predicted_work, e.message = "skipped", predicted, message

    def record(self, entry: Entry, status: str, work: float, meets: bool) -> None:
        """What a run of ``entry`` gave."""
        entry.status, entry.work, entry.meets = status, float(work), bool(meets) and status == "ok"

    def close_round(self) -> None:
        """After the round's entries are recorded: update the limit, skip what a stopped run
        makes hopeless, add coarser and finer settings at the edges."""
        done = [e for e in self.entries if e.round == self.round - 1 and e.status != "skipped"]
        self._met += [(e.settings["strategy"], e.work) for e in done if e.meets]
        met_by_strategy = {e.settings["strategy"] for e in self.entries if e.meets}
        for fam in self.families.values():
            stopped = [e for e in fam.entries if e.status == "stopped"]
            if stopped:
                pending = [e for e in fam.entries if e.status == "pending" and e.origin != "coarser"
                           and size(e.settings) < size(stopped[0].settings)]
                self._skip(pending, stopped[0].work, f"a coarser setting of this family "
                           f"({_label(stopped[0].settings)}) already passed the work limit")
            self._extend_coarse(fam)
            self._refine(fam, met_by_strategy)

    def _extend_coarse(self, fam: Family) -> None:
        ran = [e for e in fam.entries if e.status not in ("pending", "queued", "skipped")]
        if not ran:
            return
        coarsest = max(ran, key=lambda e: size(e.settings))
        if coarsest is not fam.entries[0] or not coarsest.meets:
            return
        value = size(coarsest.settings)
        if fam.strategy == "fixed":
            bigger = 2.0 * value
            if bigger > self.d_min_ms * (1 + 1e-9) or bigger > self.duration_ms:
                return
        else:
            bigger = 10.0 * value
            if bigger > RTOL_MAX * (1 + 1e-9):
                return
        if not fam.has(bigger):
            self._new(resized(coarsest.settings, bigger), "coarser")

    def _refine(self, fam: Family, met_by_strategy: set) -> None:
        if fam.strategy in met_by_strategy or fam.refinements >= MAX_REFINEMENTS:
            return
        if any(e.status in ("pending", "queued") for e in fam.entries):
            return
        finest = fam.entries[-1]
        if finest.status in ("skipped", "stopped", "failed"):
            return
        value = size(finest.settings)
        smaller = value / 2.0 if fam.strategy == "fixed" else value / 10.0
        if fam.strategy != "fixed" and smaller < RTOL_MIN * (1 - 1e-9):
            return
        fam.refinements += 1
        self._new(resized(finest.settings, smaller), "finer")


def _label(s: dict) -> str:
    from .sweep import setting_label

    return setting_label(s)
