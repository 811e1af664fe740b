"""The statistical target of a profile: statistics indistinguishable from the reference's own.

Past the divergence time a setting can still be asked whether it changed the
activity's statistics. The yardstick (:class:`spikegauge.analysis.fidelity.Yardstick`)
is the spread of each population statistic over K runs of the reference
setting whose initial voltages were moved a little (the reference itself and
K - 1 perturbed runs, :func:`.reference.yardstick_probes`); a point passes when
every statistic of its closed-loop run lies within the prediction interval of
those runs, Holm-corrected at ``FAMILY_ALPHA`` across the statistics.
"""
from __future__ import annotations

import math

from ..analysis.fidelity import FAMILY_ALPHA, Yardstick

STATISTICS_COLUMNS = ("statistics_pass", "statistics_failed", "statistics_min_holm_p")


def make_yardstick(reference, runs) -> Yardstick | None:
    """The yardstick from the reference and its perturbed runs; None when any of them failed."""
    everything = [reference, *runs]
    if any(r.status != "ok" for r in everything) or len(everything) < 3:
        return None
    return Yardstick.from_runs(everything)


def judge_point(yardstick: Yardstick | None, run) -> dict:
    """``statistics_pass`` (bool), ``statistics_failed`` (the failing statistics, joined by
    spaces) and ``statistics_min_holm_p`` of one point; a run that did not end ``ok`` fails."""
    if yardstick is None or run.status != "ok":
        return dict(statistics_pass=False, statistics_failed="" if yardstick is None else "(not run to the end)",
                    statistics_min_holm_p=math.nan)
    passed, table = yardstick.judge(run, family_alpha=FAMILY_ALPHA)
    failed = table.loc[~table["passed"].astype(bool), "statistic"].astype(str).tolist()
    return dict(statistics_pass=bool(passed), statistics_failed=" ".join(failed),
                statistics_min_holm_p=float(table["holm_p"].min()) if len(table) else math.nan)


def yardstick_doc(yardstick: Yardstick | None) -> dict | None:
    """What ``profile.json`` keeps of a yardstick: K, each statistic's mean and spread."""
    if yardstick is None:
        return None
    import numpy as np

    return dict(k=yardstick.k, family_alpha=FAMILY_ALPHA, n_distinct=yardstick.n_distinct,
                statistics={n: dict(mean=float(np.mean(yardstick.values[:, j])),
                                    sd=float(np.std(yardstick.values[:, j], ddof=1)))
                            for j, n in enumerate(yardstick.names)},
                isi_groups=list(yardstick.groups), left_out=dict(yardstick.left_out))
