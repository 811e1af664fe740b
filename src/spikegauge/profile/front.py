"""Cost-accuracy fronts and fitted orders from a results table.

A front holds the settings of one strategy that no other setting of that
strategy beats on both cost and error
(:func:`spikegauge.analysis.comparison.pareto_front`). Cost is either
machine-independent work (right-hand-side evaluations plus Newton / linear-solve
iterations, the ``work`` column) or wall seconds.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import stats

from ..analysis.comparison import pareto_front

ERROR_MEASURES = {
    "jitter": "target_shift_rms_ms",
    "mismatch": "target_mismatch_fraction",
    "van-rossum": "van_rossum_mean",
    "rate": "rate_error_rms_hz",
}
"""Selectable error measures: name -> results.csv column (per-spike ones within the
judged window; van Rossum and the rate error over the whole run, which stay
meaningful past the sensitivity horizon)."""
COST_MEASURES = {"work": "work", "wall": "wall_s"}
"""Selectable costs: name -> results.csv column."""

FIXED_ORDER_SOURCES = {
    ("rk2", "linear"): (2.0, "Hansel et al. 1998; Shelley & Tao 2001"),
    ("rk4", "hermite"): (4.0, "Shelley & Tao 2001"),
    ("rk4", "linear"): (2.0, "Shelley & Tao 2001 (interpolation caps the order)"),
    ("euler", "linear"): (1.0, "common practice (first-order stepper)"),
    ("expeuler", "linear"): (1.0, "common practice (first-order stepper)"),
    ("backward-euler", "linear"): (1.0, "common practice (first-order stepper)"),
}
"""Published or expected spike-time error order of (stepper, crossing) with exact delivery.
A step crossing or grid delivery quantises times to the grid: first order at best
(Hansel et al. 1998)."""


def strategy_fronts(table: pd.DataFrame, error: str = "jitter", cost: str = "work") -> dict:
    """Point ids on each strategy's front, sorted by cost.

    Parameters
    ----------
    table : DataFrame
        ``results.csv`` rows (one seed).
    error, cost : str
        Keys of :data:`ERROR_MEASURES` and :data:`COST_MEASURES`.
    """
    ecol, ccol = ERROR_MEASURES[error], COST_MEASURES[cost]
    out = {}
    for strategy, rows in table[table["status"] == "ok"].groupby("strategy", sort=True):
        on = pareto_front(rows[ccol].to_numpy(float), rows[ecol].to_numpy(float))
        out[strategy] = [int(p) for p in rows[on].sort_values(ccol, kind="stable")["point"]]
    return out


def _slope(x, y):
    x, y = np.asarray(x, float), np.asarray(y, float)
    ok = np.isfinite(x) & np.isfinite(y) & (x > 0) & (y > 0)
    if ok.sum() < 3:
        return None
    fit = stats.linregress(np.log(x[ok]), np.log(y[ok]))
    return dict(slope=float(fit.slope), stderr=float(fit.stderr), n=int(ok.sum()))


def fitted_orders(table: pd.DataFrame, error_col: str = "target_shift_rms_ms") -> list[dict]:
    """Slopes of log error on log dt (fixed) and on log rtol (adaptive), per combination.

    Only ok points whose spikes all match the reference (mismatch 0 in the
    judged window) enter a fit: a missed spike is not a timing error. A fit
    needs three such points.

    Returns
    -------
    list of dict
        ``strategy``, ``stepper``, ``crossing``, ``delivery``, ``slope``,
        ``stderr``, ``n``, ``expected`` and ``source`` (where the expected
        value comes from).
    """
    from ..integrate.tableaux import STEPPER_INFO

    ok = table[(table["status"] == "ok") & (table["target_mismatch_fraction"] == 0)]
    out = []
    fixed = ok[ok["strategy"] == "fixed"]
    for (st, cr, de), rows in fixed.groupby(["stepper", "crossing", "delivery"], sort=True):
        fit = _slope(rows["dt_ms"], rows[error_col])
        if fit is None:
            continue
        if cr == "step" or de == "grid":
            expected, source = 1.0, "Hansel et al. 1998 (times quantised to the grid: first order at best)"
        else:
            expected, source = FIXED_ORDER_SOURCES.get((st, cr), (math.nan, "none known"))
        out.append(dict(strategy="fixed", stepper=st, crossing=cr, delivery=de, **fit,
                        expected=expected, source=source))
    adaptive = ok[ok["strategy"] != "fixed"]
    for (sg, st), rows in adaptive.groupby(["strategy", "stepper"], sort=True):
        fit = _slope(rows["rtol"], rows[error_col])
        if fit is None:
            continue
        info = STEPPER_INFO.get(st)
        # error-per-step control sets h ~ tol^(1/(q+1)) from the embedded estimate of
        # order q; with local extrapolation the global error goes as h^p.
        expected = info.order / (info.error_order + 1) if info is not None else math.nan
        out.append(dict(strategy=sg, stepper=st, crossing="dense", delivery="exact", **fit,
                        expected=expected,
                        source="Hairer, Nørsett & Wanner I, II.4 (tolerance proportionality, from memory)"))
    return out
