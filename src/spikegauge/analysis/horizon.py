"""Agreement over time and the divergence horizon.

A network amplifies small numerical differences (van Vreeswijk & Sompolinsky
1996; London et al. 2010), so spike-for-spike agreement holds only up to a
horizon. We follow it in sliding windows and report where it is lost.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from .matching import Matching
from .rasters import Raster


def agreement_over_time(reference: Raster, test: Raster, matching: Matching, *,
                        window_ms: float = 50.0) -> pd.DataFrame:
    """Matched spikes, jitter and chance-corrected agreement in sliding windows.

    Windows of ``window_ms`` advance by half a window from ``t_start_ms``; a
    spike belongs to the windows containing it, matched or not. The two
    spikes of a matched pair can lie in neighbouring windows (a pair is up to
    a match window apart), so each spike is counted where it lies:
    ``matched`` counts the window's matched reference spikes and
    ``matched_test`` its matched test spikes, so ``matched + missed = n_ref``
    and ``matched_test + extra = n_test`` in every window.

    Agreement is the fraction of spikes of both rasters that are matched,
    ``f = (matched reference spikes + matched test spikes) / (n_ref + n_test)``
    over the spikes in the window: the fraction of reference spikes matched
    when the counts agree, and lowered by extra spikes too (the reference
    fraction alone would not see a test raster that adds spikes). Each term of
    the numerator is at most its term of the denominator, so ``f <= 1``.
    (Counting both spikes of a pair in the reference spike's window, as
    ``2 matched``, would give ``f > 1`` in a window whose matched reference
    spikes have their partners just before the window starts.)
    Chance correction: a reference spike of cell c has a test spike within
    the match window w by chance with probability ``p_c = 1 - exp(-2 w nu_c)``
    if the test train were Poisson with the cell's test rate nu_c over the
    whole interval. (The coincidence factor's ``2 w nu_c`` is the first-order
    term; it overstates chance by 20 % at ``2 w nu_c = 0.4``, i.e. 100 Hz with
    w = 2 ms, which would push the agreement of unrelated rasters well below
    zero.) One-to-one matching finds slightly fewer chance pairs still, so at
    high rates unrelated rasters score a little below 0. With
    ``f0 = 2 sum(p_c) / (n_ref + n_test)`` over the window's reference spikes,
    the corrected agreement is ``(f - f0) / (1 - f0)``: 1 for perfect
    agreement, about 0 for independent rasters, NaN for a window without
    spikes or with ``f0 >= 1``.

    Returns
    -------
    DataFrame
        One row per window: ``start_ms``, ``stop_ms``, ``n_ref``, ``n_test``,
        ``matched``, ``matched_test``, ``missed``, ``extra``, ``agreement``, ``chance``,
        ``corrected``, ``shift_mean_ms``, ``shift_rms_ms``.
    """
    t0 = reference.t_start_ms
    duration = reference.duration_ms
    stride = 0.5 * window_ms
    n_half = max(1, int(np.ceil(duration / stride)))

    def half_bin(t):
        return np.minimum(((t - t0) / stride).astype(np.int64), n_half - 1)

    def per_half(bins, weights=None):
        return np.bincount(bins, weights=weights, minlength=n_half).astype(np.float64)

    def per_window(h):
        return h[:-1] + h[1:] if n_half > 1 else h

    rb = half_bin(reference.time_ms)
    sb = half_bin(test.time_ms)
    matched = matching.ref_partner >= 0
    matched_test = matching.test_partner >= 0
    shift = test.time_ms[matching.ref_partner[matched]] - reference.time_ms[matched]
    nu = test.counts() / duration
    p = -np.expm1(-2.0 * matching.window_ms * nu)[reference.cell]
    n_ref = per_window(per_half(rb))
    n_test = per_window(per_half(sb))
    n_match = per_window(per_half(rb[matched]))
    n_match_test = per_window(per_half(sb[matched_test]))
    sum_shift = per_window(per_half(rb[matched], shift))
    sum_sq = per_window(per_half(rb[matched], shift * shift))
    expected = per_window(per_half(rb, p))
    start = t0 + stride * np.arange(n_ref.size)
    with np.errstate(divide="ignore", invalid="ignore"):
        both = n_ref + n_test
        agreement = (n_match + n_match_test) / both
        chance = 2.0 * expected / both
        corrected = np.where(chance < 1.0, (agreement - chance) / (1.0 - chance), np.nan)
        mean = sum_shift / n_match
        rms = np.sqrt(sum_sq / n_match)
    return pd.DataFrame({
        "start_ms": start, "stop_ms": np.minimum(start + window_ms, reference.t_stop_ms),
        "n_ref": n_ref.astype(np.int64), "n_test": n_test.astype(np.int64),
        "matched": n_match.astype(np.int64), "matched_test": n_match_test.astype(np.int64),
        "missed": (n_ref - n_match).astype(np.int64),
        "extra": (n_test - n_match_test).astype(np.int64), "agreement": agreement, "chance": chance,
        "corrected": corrected, "shift_mean_ms": mean, "shift_rms_ms": rms})


def divergence_horizon(over_time: pd.DataFrame, t_start_ms: float, t_stop_ms: float, *,
                       min_agreement: float = 0.5, jitter_limit_ms: float | None = None):
    """Time from the start to the first window where agreement is lost.

    Agreement is lost in a window whose chance-corrected agreement (see
    :func:`agreement_over_time`) is below ``min_agreement``, or whose RMS
    jitter exceeds ``jitter_limit_ms`` (if given). Windows without spikes say
    nothing and are skipped.

    Returns
    -------
    horizon_ms : float
        Start of the first such window minus ``t_start_ms`` (ms); the whole
        interval ``t_stop_ms - t_start_ms`` if agreement is never lost.
    diverged : bool
        Whether agreement was lost.
    """
    lost = over_time["corrected"].to_numpy() < min_agreement
    if jitter_limit_ms is not None:
        lost = lost | (over_time["shift_rms_ms"].to_numpy() > jitter_limit_ms)
    if not lost.any():
        return float(t_stop_ms - t_start_ms), False
    return float(over_time["start_ms"].to_numpy()[np.argmax(lost)] - t_start_ms), True
