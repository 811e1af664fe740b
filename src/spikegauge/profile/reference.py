"""A reference that proves itself, and the sensitivity ladder.

Reference
    ``lif-current`` networks: the exact event-driven solution
    (:mod:`spikegauge.integrate.reference`). Every other network: local
    adaptive ``dp54`` run twice, at ``REFERENCE_RTOL`` and at a hundred times
    tighter (never below 1e-12). The tighter run is the reference; the spike
    times of the two, compared up to their own divergence horizon, give its
    uncertainty (RMS and largest shift, missed and extra fraction). The
    reference can rank settings only if that uncertainty is at least
    ``ADEQUACY_FACTOR`` times below the accuracy target. In a chaotic network
    the two runs part within the run whatever the tolerances, so the profile
    compares the looser setting run open loop, replaying the tighter run's
    raster (``open_loop_run``): the integration error over the whole run.

Sensitivity ladder
    Networks can be stable to tiny perturbations yet unstable to a single
    spike (Monteforte & Wolf 2012), or chaotic (van Vreeswijk & Sompolinsky
    1996). The reference is rerun under three probes, each on
    ``N_PROBE_CELLS`` cells: the initial voltage moved by 1e-6 mV; one spike
    shifted by the accuracy target; one spike deleted. A probe is a modified
    :class:`~spikegauge.network.Network` (a copied ``y0``, or explicit events
    added), so the engine runs it like any network. A spike is shifted or
    deleted through its arrivals: explicit events that cancel each arrival
    the spike caused (same time, target and receptor, negated weight) and,
    for a shift, re-add it ``shift`` ms later. The spiking cell's own reset is
    left where it was, so the probe is exactly "its targets saw the spike
    moved" (synaptic increments add, so cancelling is exact up to rounding).
    The horizon of a probe is the time from the perturbation to the loss of
    spike-for-spike agreement with the reference
    (:func:`spikegauge.analysis.compare`, ``horizon_ms``); the median over
    the cells is reported.
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np

from ..analysis import compare
from ..network.arrays import EventList

REFERENCE_RTOL = 1e-7
"""Tolerance of the first tight dp54 reference run; the second uses a hundredth of it."""
MIN_RTOL = 1e-12
"""Tightest tolerance a reference run is asked for (double precision leaves no room below)."""
ADEQUACY_FACTOR = 10.0
"""The reference's uncertainty must be this many times below the accuracy target."""
N_PROBE_CELLS = 5
VOLTAGE_PROBE_MV = 1e-6
PROBE_START_FRACTION = 0.1
"""Spike probes act on each chosen cell's first spike after this fraction of the run
(past the start-up transient, leaving most of the run to watch the effect)."""
EXACT_ROOT_RTOL = 1e-14
"""Relative precision of the exact reference's spike times (its root finding)."""

PROBE_KINDS = ("voltage", "shift", "delete")


def is_exact_network(model_names) -> bool:
    """Whether the exact reference applies (every group ``lif-current``)."""
    return set(model_names) == {"lif-current"}


def reference_settings(model_names) -> list[dict]:
    """Settings of the reference runs, tightest (the reference itself) last."""
    if is_exact_network(model_names):
        return [dict(strategy="exact")]
    tight = max(REFERENCE_RTOL / 100.0, MIN_RTOL)
    return [dict(strategy="local-adaptive", stepper="dp54", crossing="dense", rtol=r, atol=r)
            for r in (REFERENCE_RTOL, tight)]


def reference_uncertainty(runs, target_jitter_ms: float, target_mismatch_frac: float, open_loop_run=None,
                          **compare_options) -> dict:
    """Uncertainty of the reference from its runs (see the module docstring).

    Parameters
    ----------
    runs : list of Run
        As ordered by :func:`reference_settings`; the last is the reference.
    target_jitter_ms, target_mismatch_frac : float
        The accuracy target.

    Returns
    -------
    dict
        ``kind`` ("exact" or "tight-dp54"), ``shift_rms_ms``, ``shift_max_abs_ms``,
        ``mismatch_fraction`` (of the looser run against the reference within
        ``horizon_ms``), ``horizon_ms``, ``adequate`` and ``message``.
    """
    ref = runs[-1]
    if ref.status != "ok":
        return dict(kind="exact" if len(runs) == 1 else "tight-dp54", adequate=False,
                    shift_rms_ms=math.nan, shift_max_abs_ms=math.nan, mismatch_fraction=math.nan,
                    horizon_ms=0.0, message=f"the reference run failed: {ref.message}")
    if len(runs) == 1:
        bound = EXACT_ROOT_RTOL * ref.t_stop_ms
        return dict(kind="exact", shift_rms_ms=bound, shift_max_abs_ms=bound, mismatch_fraction=0.0,
                    horizon_ms=ref.t_stop_ms - ref.t_start_ms, adequate=True,
                    message=f"closed-form solution; spike times to {bound:.1e} ms (root finding)")
    loose = runs[0]
    if open_loop_run is not None and open_loop_run.status == "ok":
        # the looser setting replaying the reference's raster: integration error over the whole
        # run, without the network's own amplification of it (which the closed-loop pair, in a
        # chaotic network, measures instead)
        within = compare(ref, open_loop_run, t_stop_ms=ref.t_stop_ms, **compare_options)
        horizon = ref.t_stop_ms - ref.t_start_ms
    else:
        full = compare(ref, loose, t_stop_ms=ref.t_stop_ms, **compare_options)
        horizon = full.summary["horizon_ms"]
        within = compare(ref, loose, t_stop_ms=ref.t_start_ms + horizon, **compare_options) \
            if horizon > 0 else full
    s = within.summary
    rms = s["shift_rms_ms"] if s["matched"] else 0.0
    peak = s["shift_max_abs_ms"] if s["matched"] else 0.0
    mism = s["mismatch_fraction"] if s["n_ref"] else 0.0
    ok_jitter = rms * ADEQUACY_FACTOR <= target_jitter_ms
    ok_mismatch = mism * ADEQUACY_FACTOR <= target_mismatch_frac
    tols = f"rtol {loose.settings['rtol']:g} vs {ref.settings['rtol']:g}" + (
        ", open loop over the whole run" if open_loop_run is not None and open_loop_run.status == "ok" else "")
    if ok_jitter and ok_mismatch:
        msg = (f"tight dp54 ({tols}): RMS shift {rms:.2e} ms, mismatch {mism:.2%} over the "
               f"first {horizon:g} ms, at least {ADEQUACY_FACTOR:g}x below the target")
    else:
        msg = (f"tight dp54 ({tols}): RMS shift {rms:.2e} ms, mismatch {mism:.2%} over the first "
               f"{horizon:g} ms: not {ADEQUACY_FACTOR:g}x below the target (jitter "
               f"{target_jitter_ms:g} ms, mismatch {target_mismatch_frac:.2%}); the profile cannot "
               f"rank settings finer than {ADEQUACY_FACTOR * rms:.2g} ms")
    return dict(kind="tight-dp54", shift_rms_ms=float(rms), shift_max_abs_ms=float(peak),
                mismatch_fraction=float(mism), horizon_ms=float(horizon),
                adequate=bool(ok_jitter and ok_mismatch), message=msg)


# ---------------------------------------------------------------------------
# Probes


def probe_cells(network, n: int = N_PROBE_CELLS, spikes=None, t_from_ms: float = 0.0) -> np.ndarray:
    """Cells a probe acts on: ``n`` cells spread evenly over the network.

    Candidates have outgoing synapses (so a spike probe reaches someone) and,
    when ``spikes`` (DataFrame ``cell``, ``time_ms``) is given, a spike at or
    after ``t_from_ms``. Cells without synapses are used only if too few have them.
    """
    out_degree = np.diff(network.syn_ptr)
    cand = np.arange(network.n_cells)
    if spikes is not None:
        fired = np.unique(spikes["cell"].to_numpy()[spikes["time_ms"].to_numpy() >= t_from_ms])
        cand = np.intersect1d(cand, fired)
    wired = cand[out_degree[cand] > 0]
    if wired.size >= min(n, cand.size):
        cand = wired
    if cand.size <= n:
        return cand.astype(np.int64)
    pick = np.unique(np.round(np.linspace(0, cand.size - 1, n)).astype(np.int64))
    return cand[pick].astype(np.int64)


def ladder_probes(network, reference, target_jitter_ms: float, n: int = N_PROBE_CELLS) -> list[dict]:
    """The ladder's probes for a reference run: plain dicts (picklable task parts).

    Each: ``kind`` ("voltage", "shift", "delete"), ``cell``, ``time_ms`` (when
    the perturbation acts), ``size`` (mV for voltage, ms for shift, 0 for delete).
    """
    probes = [dict(kind="voltage", cell=int(c), time_ms=0.0, size=VOLTAGE_PROBE_MV)
              for c in probe_cells(network, n)]
    t_from = PROBE_START_FRACTION * (reference.t_stop_ms - reference.t_start_ms) + reference.t_start_ms
    spikes = reference.spikes
    for c in probe_cells(network, n, spikes, t_from):
        times = spikes["time_ms"].to_numpy()[(spikes["cell"].to_numpy() == c)]
        times = times[times >= t_from]
        if not times.size:
            continue
        t = float(times[0])
        probes.append(dict(kind="shift", cell=int(c), time_ms=t, size=float(target_jitter_ms)))
        probes.append(dict(kind="delete", cell=int(c), time_ms=t, size=0.0))
    order = {k: i for i, k in enumerate(PROBE_KINDS)}
    return sorted(probes, key=lambda p: (order[p["kind"]], p["cell"]))


def yardstick_probes(network) -> list[dict]:
    """The runs of the statistical yardstick (:mod:`spikegauge.analysis.fidelity`): the reference
    itself (index 0) and K - 1 runs with every initial voltage moved a little."""
    from ..analysis.fidelity import default_runs, statistic_names

    n_tests = len(statistic_names(network.group_names)) + len(network.group_names)
    return [dict(kind="yardstick", index=i) for i in range(1, default_runs(n_tests))]


def apply_probe(network, probe: dict):
    """The network with one probe applied (a new Network; the original is untouched)."""
    if probe["kind"] == "yardstick":
        from ..analysis.fidelity import perturbed_network

        return perturbed_network(network, int(probe["index"]))
    kind, cell = probe["kind"], int(probe["cell"])
    if kind == "voltage":
        y0 = np.array(network.y0, dtype=np.float64, copy=True)
        y0[cell, 0] += probe["size"]
        return dataclasses.replace(network, y0=y0)
    if kind not in ("shift", "delete"):
        raise ValueError(f"unknown probe kind {kind!r}")
    lo, hi = int(network.syn_ptr[cell]), int(network.syn_ptr[cell + 1])
    t_arr = probe["time_ms"] + network.syn_delay_ms[lo:hi]
    target = network.syn_target[lo:hi]
    receptor = network.syn_receptor[lo:hi]
    weight = network.syn_weight[lo:hi]
    times, cells, recs, wts = [t_arr], [target], [receptor], [-weight]
    if kind == "shift":
        times.append(t_arr + probe["size"])
        cells.append(target)
        recs.append(receptor)
        wts.append(weight)
    ev = network.events
    # A source id no drive of the scenario uses, so same-time ordering stays fixed.
    probe_source = -(2 + len(network.poisson) + int(np.max(-ev.source, initial=0))) \
        if hasattr(ev, "source") else -(1 + len(network.poisson))
    t = np.concatenate([ev.time_ms, *times])
    c = np.concatenate([ev.cell, *cells]).astype(np.int64)
    r = np.concatenate([ev.receptor, *recs]).astype(np.int64)
    w = np.concatenate([ev.weight, *wts])
    n_new = t.size - ev.time_ms.size
    s = np.concatenate([getattr(ev, "source", np.full(ev.time_ms.size, -1, np.int64)),
                        np.full(n_new, probe_source, dtype=np.int64)])
    keep = t < network.t_stop_ms
    order = np.lexsort((s[keep], c[keep], t[keep]))
    events = EventList(t[keep][order], c[keep][order], r[keep][order], w[keep][order], s[keep][order])
    return dataclasses.replace(network, events=events)


def probe_horizon(reference, run, probe: dict, **compare_options) -> dict:
    """Horizon of one probe run: time (ms) from the perturbation to the loss of agreement.

    Returns ``horizon_ms`` (when agreement holds throughout, the time left
    after the perturbation: a lower bound, with ``diverged`` False),
    ``diverged`` and ``first_error_ms`` (from the perturbation to the first
    missed or extra spike).
    """
    span_after = reference.t_stop_ms - probe["time_ms"]
    if run.status != "ok":
        return dict(horizon_ms=0.0, diverged=True, first_error_ms=0.0)
    s = compare(reference, run, t_stop_ms=reference.t_stop_ms, **compare_options).summary
    t0 = probe["time_ms"] - reference.t_start_ms
    return dict(horizon_ms=float(min(max(s["horizon_ms"] - t0, 0.0), span_after)),
                diverged=bool(s["diverged"]),
                first_error_ms=float(min(max(s["first_error_ms"] - t0, 0.0), span_after)))


def ladder_summary(probes: list[dict], horizons: list[dict]) -> dict:
    """Median horizon per probe kind.

    A probe that never lost agreement has an unknown horizon beyond the run;
    it counts as longer than every measured one, and when it is the median
    ``median_censored`` is True and ``median_horizon_ms`` is only a lower bound.

    Returns
    -------
    dict
        Per kind: ``size``, ``cells``, ``times_ms``, ``horizons_ms``,
        ``first_errors_ms``, ``diverged`` (count), ``median_horizon_ms``,
        ``median_censored``, ``median_first_error_ms``.
    """
    out = {}
    for kind in PROBE_KINDS:
        idx = [i for i, p in enumerate(probes) if p["kind"] == kind]
        if not idx:
            continue
        h = [horizons[i]["horizon_ms"] for i in idx]
        f = [horizons[i]["first_error_ms"] for i in idx]
        ranked = np.array([x if horizons[i]["diverged"] else np.inf for x, i in zip(h, idx)])
        median = float(np.median(ranked))  # inf when most probes never diverged
        out[kind] = dict(size=probes[idx[0]]["size"], cells=[probes[i]["cell"] for i in idx],
                         times_ms=[probes[i]["time_ms"] for i in idx], horizons_ms=h,
                         first_errors_ms=f, diverged=int(sum(horizons[i]["diverged"] for i in idx)),
                         median_horizon_ms=float(np.median(h)) if math.isinf(median) else median,
                         median_censored=bool(math.isinf(median)),
                         median_first_error_ms=float(np.median(f)))
    return out
