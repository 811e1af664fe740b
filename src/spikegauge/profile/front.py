"""Work–precision fronts and fitted orders from a results table.

A front holds the settings of one strategy that no other setting of that
strategy beats on both cost and error
(:func:`spikegauge.analysis.comparison.pareto_front`). Cost is either the CPU
seconds of a run on one thread (``cpu_s``, what the verdict ranks by) or
machine-independent work (right-hand-side evaluations, Newton / linear-solve iterations and
Jacobian evaluations, the ``work`` column).

Order fits leave out what cannot measure an order: points with a missed or
extra spike, and points whose error is below ``REFERENCE_FLOOR_FACTOR`` times
the reference's own uncertainty (they measure the reference, not the
setting). An adaptive family whose step count barely changes with the
tolerance has its steps set by the input events, not by error control: its
slope is reported with that note instead of an expected order.
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
    "open-loop": "open_loop_shift_rms_ms",
}
"""Selectable error measures: name -> results.csv column (per-spike ones within the
evaluation window; van Rossum, the rate error and the open-loop jitter over the whole
run, which stay meaningful past the divergence time)."""
COST_MEASURES = {"cpu": "cpu_s", "work": "work"}
"""Selectable costs: name -> results.csv column."""
REFERENCE_FLOOR_FACTOR = 3.0
"""Points whose error is below this many times the reference's uncertainty are left out of fits."""
EVENT_SET_STEP_RATIO = 1.5
"""An adaptive family whose steps grow less than this factor over its tolerances ..."""
EVENT_SET_MIN_DECADES = 2.0
"""... spanning at least this many decades has its steps set by the input events."""
EVENT_SET_NOTE = "the input events set the step; the tolerance does not"
TOLERANCE_PROPORTIONALITY_SOURCE = (
    "Higham 1991, IMA J Numer Anal 11:457-480 (global error against tolerance of error-per-step "
    "control with local extrapolation, after Stetter; stated for explicit Runge-Kutta pairs, "
    "the same argument for the Rosenbrock scheme)")

VARIABLE_ORDER_SOURCES = {
    "bdf": (1.0, "tolerance proportionality, the aim of variable-order BDF codes (Shampine & Reichelt "
                 "1997, SIAM J Sci Comput 18:1; Brown, Byrne & Hindmarsh 1989, SIAM J Sci Stat "
                 "Comput 10:1038)"),
}
"""Expected slope of error against rtol, with its source, of steppers whose order varies (the
one-step methods' slope follows from their orders, :data:`TOLERANCE_PROPORTIONALITY_SOURCE`)."""

FIXED_ORDER_SOURCES = {
    ("rk2", "linear"): (2.0, "Hansel et al. 1998; Shelley & Tao 2001"),
    ("rk4", "hermite"): (4.0, "Shelley & Tao 2001"),
    ("rk4", "linear"): (2.0, "Shelley & Tao 2001 (interpolation caps the order)"),
    ("euler", "linear"): (1.0, "common practice (first-order stepper)"),
    ("expeuler", "linear"): (1.0, "common practice (first-order stepper)"),
    ("backward-euler", "linear"): (1.0, "common practice (first-order stepper)"),
    ("trapezoidal", "hermite"): (2.0, "textbook order of the trapezoidal rule; Hansel et al. 1998 "
                                      "(interpolation of a higher order does not cap it)"),
}
"""Published or expected spike-time error order of (stepper, crossing) with exact delivery.
A step crossing or grid delivery quantises times to the grid: first order at best
(Hansel et al. 1998)."""


def strategy_fronts(table: pd.DataFrame, error: str = "jitter", cost: str = "cpu") -> dict:
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


def fit_excluded(table: pd.DataFrame, reference_rms_ms: float = 0.0,
                 error_col: str = "target_shift_rms_ms") -> pd.Series:
    """Boolean per row: an ok point left out of order fits because its error is below
    ``REFERENCE_FLOOR_FACTOR`` times the reference's uncertainty."""
    floor = REFERENCE_FLOOR_FACTOR * (reference_rms_ms if np.isfinite(reference_rms_ms) else 0.0)
    return (table["status"] == "ok") & (table[error_col].astype(float) < floor)


def event_set_families(table: pd.DataFrame) -> set:
    """(strategy, stepper) of adaptive families whose steps are set by the input events."""
    out = set()
    ok = table[(table["status"] == "ok") & (table["strategy"] != "fixed")]
    for key, rows in ok.groupby(["strategy", "stepper"], sort=True):
        rtol, steps = rows["rtol"].to_numpy(float), rows["steps"].to_numpy(float)
        if rows.shape[0] < 2 or np.log10(rtol.max() / rtol.min()) < EVENT_SET_MIN_DECADES:
            continue
        if steps.max() < EVENT_SET_STEP_RATIO * steps.min():
            out.add(key)
    return out


def fitted_orders(table: pd.DataFrame, error_col: str = "target_shift_rms_ms",
                  reference_rms_ms: float = 0.0) -> list[dict]:
    """Slopes of log error on log dt (fixed) and on log rtol (adaptive), per combination.

    Only ok points whose spikes all match the reference (mismatch 0 in the
    evaluation window) and whose error is at least ``REFERENCE_FLOOR_FACTOR``
    times ``reference_rms_ms`` enter a fit: a missed spike is not a timing
    error, and an error below the reference's uncertainty measures the
    reference. A fit needs three such points.

    Returns
    -------
    list of dict
        ``strategy``, ``stepper``, ``crossing``, ``delivery``, ``slope``,
        ``stderr``, ``n``, ``excluded`` (points left out as below the
        reference), ``expected``, ``source`` (where the expected value comes
        from) and ``note`` ("" or :data:`EVENT_SET_NOTE`).
    """
    from ..integrate.tableaux import STEPPER_INFO

    below = fit_excluded(table, reference_rms_ms, error_col)
    ok = table[(table["status"] == "ok") & (table["target_mismatch_fraction"] == 0) & ~below]
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
        n_below = int((below & (table["strategy"] == "fixed") & (table["stepper"] == st)
                       & (table["crossing"] == cr) & (table["delivery"] == de)).sum())
        out.append(dict(strategy="fixed", stepper=st, crossing=cr, delivery=de, **fit, excluded=n_below,
                        expected=expected, source=source, note=""))
    adaptive = ok[ok["strategy"] != "fixed"]
    event_set = event_set_families(table)
    for (sg, st), rows in adaptive.groupby(["strategy", "stepper"], sort=True):
        fit = _slope(rows["rtol"], rows[error_col])
        if fit is None:
            continue
        n_below = int((below & (table["strategy"] == sg) & (table["stepper"] == st)).sum())
        if (sg, st) in event_set:
            out.append(dict(strategy=sg, stepper=st, crossing="dense", delivery="exact", **fit,
                            excluded=n_below, expected=math.nan, source="", note=EVENT_SET_NOTE))
            continue
        info = STEPPER_INFO.get(st)
        # error-per-step control sets h ~ tol^(1/(q+1)) from the embedded estimate of
        # order q; with local extrapolation the global error goes as h^p.
        expected = info.order / (info.error_order + 1) if info is not None else math.nan
        source = TOLERANCE_PROPORTIONALITY_SOURCE
        if st in VARIABLE_ORDER_SOURCES:
            expected, source = VARIABLE_ORDER_SOURCES[st]
        out.append(dict(strategy=sg, stepper=st, crossing="dense", delivery="exact", **fit,
                        excluded=n_below, expected=expected, source=source, note=""))
    return out
