"""Open-loop figures of a profile: orders over the whole run and the cells that amplify.

Every sweep point has an open-loop twin: the same setting with the
reference's raster as the network's recurrent input
(:func:`spikegauge.simulate` ``open_loop``), so its spike-time error is the
integration error of the setting over the whole run, not cut short at the
divergence time. It is a lower bound on the closed-loop error: it leaves out
what a cell inherits from its inputs' errors.

Some cells amplify tiny differences on their own (a near-threshold graze, a
bistable range): they mismatch open loop even at the finest setting. They
are counted, not hidden, and order fits use only the spikes matched at every
setting of a family, so a spike that comes and goes does not bend a slope.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import stats

from ..analysis import compare

FAMILY = ["strategy", "stepper", "crossing", "delivery"]


def _size_col(strategy: str) -> str:
    return "dt_ms" if strategy == "fixed" else "rtol"


def open_loop_findings(table: pd.DataFrame, open_runs: dict, reference, reference_rms_ms: float,
                       floor_factor: float, **compare_options) -> dict:
    """Order fits on commonly matched spikes and the cells that mismatch at the finest setting.

    Parameters
    ----------
    table : DataFrame
        One seed's rows of ``results.csv``.
    open_runs : dict
        Point id -> the point's open-loop Run.
    reference : Run
    reference_rms_ms, floor_factor : float
        Points whose error is below ``floor_factor`` times the reference's
        uncertainty are left out of fits.

    Returns
    -------
    dict
        ``fits`` (list: family, ``slope``, ``stderr``, ``n`` points, ``spikes``
        matched at every setting) and ``mismatching`` (list: family, the finest
        setting's label, ``cells`` that mismatch there, ``n_cells``).
    """
    fits, mismatching = [], []
    ok = table[(table["status"] == "ok") & (table.get("open_loop_status", "ok") == "ok")]
    floor = floor_factor * (reference_rms_ms if np.isfinite(reference_rms_ms) else 0.0)
    for key, rows in ok.groupby(FAMILY, sort=True, dropna=False):
        strategy = key[0]
        size = _size_col(strategy)
        rows = rows.sort_values(size)
        comps = {int(p): compare(reference, open_runs[int(p)], t_stop_ms=reference.t_stop_ms,
                                 **compare_options) for p in rows["point"] if int(p) in open_runs}
        if not comps:
            continue
        finest = comps[int(rows["point"].iloc[0])]
        pc = finest.per_cell
        bad = pc.loc[(pc["missed"] + pc["extra"]) > 0, "cell"].to_numpy()
        mismatching.append(dict(zip(FAMILY, key), label=rows["label"].iloc[0],
                                cells=[int(c) for c in bad], n_cells=int(pc.shape[0])))
        common = None
        for c in comps.values():
            keys = set(zip(c.pairs["cell"].to_numpy().tolist(), c.pairs["ref_time_ms"].to_numpy().tolist()))
            common = keys if common is None else common & keys
        if not common or len(comps) < 3:
            continue
        x, y = [], []
        for p, c in comps.items():
            pairs = c.pairs
            mask = [(a, b) in common for a, b in zip(pairs["cell"].tolist(), pairs["ref_time_ms"].tolist())]
            shift = pairs["shift_ms"].to_numpy()[np.asarray(mask, bool)]
            rms = float(np.sqrt(np.mean(shift ** 2))) if shift.size else math.nan
            if rms > floor and np.isfinite(rms):
                x.append(float(rows.loc[rows["point"] == p, size].iloc[0]))
                y.append(rms)
        if len(x) < 3:
            continue
        fit = stats.linregress(np.log(x), np.log(y))
        fits.append(dict(zip(FAMILY, key), slope=float(fit.slope), stderr=float(fit.stderr), n=len(x),
                         spikes=len(common)))
    return dict(fits=fits, mismatching=mismatching)
