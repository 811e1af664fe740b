"""Speed benchmark of the engine and the analysis (``spikegauge bench``).

What is timed, and how it lines up with the hand-written baselines of the
project (``../shared/limit``, SPEC.md):

* bench-lif (``scenarios/bench-lif.toml``): fixed step, ``euler``, ``step``
  crossing, ``grid`` delivery, dt 0.1 ms, the baseline loop's algorithm.
* bench-hh (``scenarios/bench-hh.toml``): fixed step, ``rk4``, ``linear``
  crossing, ``grid`` delivery, dt 0.01 ms.
* One Hodgkin-Huxley squid cell at 10 uA/cm2 for 1000 ms (SPEC.md,
  "single-HH"): local-adaptive ``dp54`` at the loosest tolerance of a fixed
  ladder whose largest spike-time error is at most 1e-5 ms, and fixed ``rk4``
  with ``hermite`` crossing at dt 0.01 ms. Errors are measured against
  ``scipy.integrate.solve_ivp`` (DOP853, rtol = atol = 1e-12) on the model's
  own right-hand side, spikes matched by index.
* The comparison of two rasters of 10^6 spikes over 10^4 cells, our van Rossum
  distance on them, and elephant's (when installed) on a subset of cells,
  extrapolated to all cells (:func:`spikegauge.analysis.bench_analysis`).

Loop times are wall seconds of :func:`spikegauge.simulate` on a network built
beforehand, after a warm-up run that compiles (or loads from the numba cache)
every kernel, so network building and compilation are excluded, as in
SPEC.md. Each figure is the median of interleaved repetitions (1 and 2
threads alternate) because the machines are shared and noisy.
"""
from __future__ import annotations

import json
import math
import os
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numba
import numpy as np

from .errors import InputError

BENCH_KEYS = (
    "lif_loop_s_1t", "lif_loop_s_2t", "lif_spikes",
    "hh_loop_s_1t", "hh_loop_s_2t", "hh_spikes",
    "single_hh_adaptive_s", "single_hh_adaptive_err_ms",
    "single_hh_rk4_s", "single_hh_rk4_err_ms",
    "compare_1e6_s", "van_rossum_1e6_s", "elephant_van_rossum_1e6_s",
    "compile_s", "rss_growth_mb", "baseline_rss_mb", "advise_cpu_ratio",
    "model_file_compile_s", "model_file_load_s",
)
"""Keys of the ``--json`` object, in order (issue 9). ``details`` follows them."""

SINGLE_HH_ERR_TARGET_MS = 1e-5
"""Largest spike-time error the adaptive single-cell run must reach (issue 9)."""

ADAPTIVE_RTOL_LADDER = (1e-4, 3e-5, 1e-5, 3e-6, 1e-6, 3e-7, 1e-7, 3e-8, 1e-8)
"""Tolerances tried, loosest first, for the adaptive single-cell run."""

def scenario_dir() -> Path:
    """The folder holding the bundled scenarios: ``./scenarios`` first, then the source tree's."""
    for d in (Path.cwd() / "scenarios", Path(__file__).resolve().parents[2] / "scenarios"):
        if (d / "bench-lif.toml").is_file():
            return d
    raise InputError("the benchmark needs the bundled scenarios (scenarios/bench-lif.toml): run it "
                     "from the spikegauge source folder")

SINGLE_HH_TOML = """
[scenario]
name = "single-hh"
duration_ms = {duration}
seed = 1

[[group]]
name = "cell"
size = 1
model = "hh-squid"
[group.parameters]
i_bias_ua_per_cm2 = 10.0
[group.initial]
v_mv = -65.0
"""
# One squid cell at 10 uA/cm2 from V = -65 mV with the gates at their steady
# state (SPEC.md, single-HH); the gates default to steady state when only V is given.


@dataclass(frozen=True)
class BenchPlan:
    """Sizes and repetitions of one benchmark run."""

    lif_ms: float
    hh_ms: float
    single_hh_ms: float
    reps: int
    raster_cells: int
    raster_spikes: int
    elephant_cells: int
    rtol_ladder: tuple
    cold_compile: bool

    @classmethod
    def full(cls, reps: int = 5) -> "BenchPlan":
        return cls(1000.0, 200.0, 1000.0, reps, 10_000, 1_000_000, 200,
                   ADAPTIVE_RTOL_LADDER, True)

    @classmethod
    def quick(cls) -> "BenchPlan":
        # A smoke test: every piece runs, on a few ms of network and small rasters.
        return cls(20.0, 2.0, 60.0, 1, 500, 10_000, 3, ADAPTIVE_RTOL_LADDER[::2], False)


def rss_mb() -> float | None:
    """Resident memory of this process (MB), from /proc; None where /proc is missing."""
    try:
        with open("/proc/self/statm") as fh:
            pages = int(fh.read().split()[1])
    except (OSError, IndexError, ValueError):
        return None
    return pages * os.sysconf("SC_PAGE_SIZE") / 2**20


def _thread_counts() -> list[int]:
    return [k for k in (1, 2) if k <= numba.config.NUMBA_NUM_THREADS]


def _timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def _synaptic_events(network, cells: np.ndarray) -> int:
    """Sum over emitted spikes of the source's out-degree (SPEC.md's definition)."""
    degree = np.diff(network.syn_ptr)
    return int(degree[cells].sum()) if cells.size else 0


def network_bench(name: str, settings: dict, t_stop_ms: float, reps: int) -> dict:
    """Time one benchmark network at 1 and 2 threads (interleaved), after a warm-up.

    Returns
    -------
    dict
        ``loop_s`` {threads: median wall s}, ``runs_s`` {threads: all runs},
        ``spikes``, ``rate_hz``, ``neuron_steps_per_s`` and ``syn_events_per_s``
        (at the 1-thread median), ``identical_across_threads``, ``warmup_s``,
        ``rss_growth_mb`` (peak during a separate 1-thread run, over the RSS
        just before it), ``kernel_s`` (1-thread median of the integration
        kernel alone, arrival handling excluded).
    """
    from .network import build_network
    from .scenario import load_scenario
    from .simulation import simulate

    network = build_network(load_scenario(scenario_dir() / f"{name}.toml"))
    dt = settings["dt_ms"]
    warm_ms = min(t_stop_ms, 10 * dt * max(1, round(network.d_min_ms / dt)))
    warmup_s, _ = _timed(lambda: simulate(network, strategy="fixed", t_stop_ms=warm_ms, **settings))
    threads = _thread_counts()
    runs = {k: [] for k in threads}
    kernel = {k: [] for k in threads}
    spikes = {}
    for _ in range(reps):
        for k in threads:
            wall, run = _timed(lambda: simulate(network, strategy="fixed", t_stop_ms=t_stop_ms,
                                                threads=k, **settings))
            runs[k].append(wall)
            kernel[k].append(run.cost["wall_s"])
            spikes.setdefault(k, run.spikes)
    numba.set_num_threads(numba.config.NUMBA_NUM_THREADS)
    ref = spikes[threads[0]]
    identical = all(s["cell"].equals(ref["cell"]) and s["time_ms"].equals(ref["time_ms"])
                    for s in spikes.values())
    loop = {k: statistics.median(v) for k, v in runs.items()}
    n_steps = int(math.ceil(t_stop_ms / dt - 1e-9))
    cells = ref["cell"].to_numpy()
    growth = _rss_growth(lambda progress: simulate(network, strategy="fixed", t_stop_ms=t_stop_ms,
                                                   threads=1, progress=progress, **settings))
    numba.set_num_threads(numba.config.NUMBA_NUM_THREADS)
    return dict(
        loop_s=loop, runs_s=runs, kernel_s=statistics.median(kernel[threads[0]]),
        spikes=int(len(ref)), rate_hz=len(ref) / network.n_cells / (t_stop_ms / 1000.0),
        neuron_steps_per_s=network.n_cells * n_steps / loop[threads[0]],
        syn_events_per_s=_synaptic_events(network, cells) / loop[threads[0]],
        identical_across_threads=bool(identical), warmup_s=warmup_s, rss_growth_mb=growth,
    )


def _rss_growth(run) -> float | None:
    """Peak RSS growth (MB) during ``run(progress)``, sampled at every window end."""
    before = rss_mb()
    if before is None:
        return None
    peak = [before]

    def progress(_t_ms):
        peak[0] = max(peak[0], rss_mb())

    run(progress)
    return peak[0] - before


def single_hh_reference(duration_ms: float) -> np.ndarray:
    """Spike times (ms) of the single-HH cell from scipy's DOP853 at rtol = atol = 1e-12.

    The right-hand side is the model's own (:func:`spikegauge.models.kernels.rhs`),
    called from Python; spikes are upward crossings of the detection voltage,
    located by solve_ivp's event finder.
    """
    from scipy.integrate import solve_ivp

    from .models.base import P_VTH
    from .models.kernels import rhs

    network = _single_hh_network(duration_ms)
    n = int(network.n_states[0])
    p = np.array(network.params[0], dtype=np.float64)
    code = int(network.cell_model[0])
    y0 = np.array(network.y0[0, :n], dtype=np.float64)
    dydt = np.empty(n)

    def f(_t, y):
        rhs(code, np.ascontiguousarray(y), p, False, dydt)
        return dydt.copy()

    def crossing(_t, y):
        return y[0] - p[P_VTH]
    crossing.direction = 1.0

    sol = solve_ivp(f, (0.0, duration_ms), y0, method="DOP853", rtol=1e-12, atol=1e-12,
                    events=crossing)
    if not sol.success:
        raise RuntimeError(f"single-HH reference failed: {sol.message}")
    return np.asarray(sol.t_events[0])


def _single_hh_network(duration_ms: float):
    from .network import build_network
    from .scenario import parse_scenario

    return build_network(parse_scenario(SINGLE_HH_TOML.format(duration=float(duration_ms)),
                                        source="single-hh (bench)"))


def _max_spike_error(times: np.ndarray, reference: np.ndarray) -> float:
    """Largest |t_k - t_ref,k| with spikes matched by index; inf if the counts differ."""
    if times.size != reference.size:
        return math.inf
    return float(np.max(np.abs(times - reference))) if times.size else 0.0


def single_hh_bench(duration_ms: float, reps: int, ladder) -> dict:
    """Adaptive dp54 and fixed rk4 + Hermite on the single-HH cell, against DOP853."""
    from .simulation import simulate

    network = _single_hh_network(duration_ms)
    ref_s, reference = _timed(lambda: single_hh_reference(duration_ms))

    def run_adaptive(rtol):
        return simulate(network, strategy="local-adaptive", stepper="dp54", rtol=rtol, threads=1)

    def run_rk4():
        return simulate(network, strategy="fixed", stepper="rk4", crossing="hermite",
                        delivery="grid", dt_ms=0.01, threads=1)

    out = {"reference_s": ref_s, "reference_spikes": int(reference.size)}
    run_adaptive(ladder[0])                                   # warm-up (compile)
    run_rk4()
    chosen = None
    tried = {}
    for rtol in ladder:
        err = _max_spike_error(run_adaptive(rtol).spikes["time_ms"].to_numpy(), reference)
        tried[rtol] = err
        if err <= SINGLE_HH_ERR_TARGET_MS:
            chosen = rtol
            break
    out["adaptive_tried"] = {f"{k:g}": v for k, v in tried.items()}
    if chosen is None:
        out["adaptive_s"] = out["adaptive_err_ms"] = None
        out["adaptive_reason"] = (f"no tolerance down to rtol {ladder[-1]:g} reached "
                                  f"{SINGLE_HH_ERR_TARGET_MS:g} ms")
    else:
        times = [_timed(lambda: run_adaptive(chosen))[0] for _ in range(reps)]
        out.update(adaptive_s=statistics.median(times), adaptive_err_ms=tried[chosen],
                   adaptive_rtol=chosen)
    times, runs = zip(*[_timed(run_rk4) for _ in range(reps)])
    out.update(rk4_s=statistics.median(times),
               rk4_err_ms=_max_spike_error(runs[0].spikes["time_ms"].to_numpy(), reference))
    return out


def analysis_bench(n_cells: int, n_spikes: int, elephant_cells: int) -> dict:
    """Raster comparison and van Rossum timings (see :func:`spikegauge.analysis.bench_analysis`)."""
    from .analysis import bench_analysis

    a = bench_analysis(n_cells=n_cells, n_spikes=n_spikes, elephant_cells=elephant_cells)
    eleph = a.get("elephant_per_cell_s")
    a["elephant_all_cells_s"] = (eleph * n_cells if eleph is not None and math.isfinite(eleph)
                                 else None)
    return a


def cold_compile_s() -> float | None:
    """JIT compile time of the fixed-step engine, in a fresh interpreter with an empty numba cache.

    The child builds both benchmark networks first, then times one run of a
    few steps of each benchmark setting: compilation of every kernel involved,
    plus those few steps.
    """
    code = "import spikegauge.bench as b; print(b._compile_everything())\n"
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        res = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                             text=True, timeout=1800)
    if res.returncode != 0:
        return None
    return float(res.stdout.strip().splitlines()[-1])


def _compile_everything() -> float:
    """Seconds to run each benchmark setting for a few steps (networks built beforehand)."""
    from .network import build_network
    from .scenario import load_scenario
    from .simulation import simulate

    nets = [(build_network(load_scenario(scenario_dir() / f"{name}.toml")), settings)
            for name, settings in (("bench-lif", LIF_SETTINGS), ("bench-hh", HH_SETTINGS))]
    t0 = time.perf_counter()
    for net, settings in nets:
        simulate(net, strategy="fixed", t_stop_ms=settings["dt_ms"] * 4, **settings)
    return time.perf_counter() - t0


def model_file_compile_s() -> tuple[float | None, float | None]:
    """(compile, start-up from the cache) seconds of a model file, each in a fresh interpreter.

    The bundled Traub-Miles HH file: read, differentiated, generated and
    compiled with an empty numba cache (an upper bound: its numeric helpers
    compile too), then loaded again by a second interpreter sharing that cache.
    """
    code = ("import time; t0 = time.perf_counter(); from spikegauge.models import load_model_file; "
            f"load_model_file({str(scenario_dir() / 'models' / 'traub-hh.toml')!r}); "
            "print(time.perf_counter() - t0)\n")
    out = []
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        for _ in range(2):
            res = subprocess.run([sys.executable, "-c", "import spikegauge.models\n" + code], env=env,
                                 capture_output=True, text=True, timeout=600)
            out.append(float(res.stdout.strip().splitlines()[-1]) if res.returncode == 0 else None)
    return out[0], out[1]


LIF_SETTINGS = dict(stepper="euler", crossing="step", delivery="grid", dt_ms=0.1)
HH_SETTINGS = dict(stepper="rk4", crossing="linear", delivery="grid", dt_ms=0.01)


SCALING_MIN_R2 = 0.9
"""Smallest r^2 of the log-log fit for a scaling exponent to be reported (common practice)."""

SCALING_MAX_STDERR = 0.2
"""Largest standard error of a reported scaling exponent: at two standard errors 0.2 already
spans 0.6-1.4, so a wider fit says nothing about the 1.0 +- 0.1 target (common practice)."""


def fit_exponent(sizes, seconds) -> dict:
    """Least-squares slope of log(seconds) against log(size), with its quality.

    Parameters
    ----------
    sizes : array_like, shape (n,)
        Problem sizes (cells, or ms of simulated time), positive.
    seconds : array_like, shape (n,)
        Loop times (s) measured at those sizes.

    Returns
    -------
    dict
        ``exponent`` (the slope, or None when the fit is too noisy to report),
        ``raw_exponent`` (the slope whatever its quality), ``stderr`` (standard
        error of the slope), ``r2`` (coefficient of determination), ``quality``
        ("ok" or "too noisy to fit: ..." naming the failed criterion).
        A slope at or below zero (a larger problem taking no longer), an r^2
        under :data:`SCALING_MIN_R2` or a standard error over
        :data:`SCALING_MAX_STDERR` is reported as too noisy: on a shared
        machine a timing disturbed by other processes is the likely cause.
    """
    from scipy.stats import linregress

    with np.errstate(divide="ignore", invalid="ignore"):   # a zero timing is refused below
        x = np.log(np.asarray(sizes, dtype=float))
        y = np.log(np.asarray(seconds, dtype=float))
    if x.size < 3 or not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        return dict(exponent=None, raw_exponent=None, stderr=None, r2=None,
                    quality="too noisy to fit: needs three or more sizes, each with a positive "
                            "finite timing")
    fit = linregress(x, y)
    slope, stderr, r2 = float(fit.slope), float(fit.stderr), float(fit.rvalue ** 2)
    problems = []
    if not slope > 0:
        problems.append(f"slope {slope:.3g} is not positive")
    if not r2 >= SCALING_MIN_R2:
        problems.append(f"r^2 {r2:.3g} < {SCALING_MIN_R2:g}")
    if not stderr <= SCALING_MAX_STDERR:
        problems.append(f"standard error {stderr:.3g} > {SCALING_MAX_STDERR:g}")
    return dict(exponent=None if problems else slope, raw_exponent=slope, stderr=stderr, r2=r2,
                quality="too noisy to fit: " + "; ".join(problems) if problems else "ok")


def scaling_bench(quick: bool) -> dict:
    """Exponents of bench-lif's loop time in cells and in duration (one thread).

    Four sizes each (cells x1/4..x2 of bench-lif at half its duration; 1/4..2x
    its duration at its size), median of three runs; the exponent is the slope
    of log time against log size (target 1.0 +- 0.1), reported with its fit's
    quality (:func:`fit_exponent`).
    """
    from .network import build_network
    from .scenario import parse_scenario
    from .simulation import simulate

    text = (scenario_dir() / "bench-lif.toml").read_text()
    text = text.replace("size = 4000", "size = EXC").replace("size = 1000", "size = INH")
    factors = (0.25, 0.5, 1.0, 2.0)
    scale = 0.1 if quick else 1.0

    def network(f_cells, duration):
        sized = (text.replace("size = EXC", f"size = {int(4000 * f_cells * scale)}")
                 .replace("size = INH", f"size = {int(1000 * f_cells * scale)}")
                 .replace("duration_ms = 1000.0", f"duration_ms = {duration}"))
        return build_network(parse_scenario(sized, source="bench-lif (scaling)"))

    def loop_s(net, t_stop):
        runs = [simulate(net, threads=1, t_stop_ms=t_stop, **LIF_SETTINGS).cost["wall_s"]
                for _ in range(3)]
        return statistics.median(runs)

    base_ms = 50.0 if quick else 1000.0
    cells, t_cells = [], []
    for f in factors:
        net = network(f, base_ms / 2)
        cells.append(net.n_cells)
        t_cells.append(loop_s(net, base_ms / 2))
    net = network(1.0, 2 * base_ms)
    durations = [f * base_ms for f in factors]
    t_dur = [loop_s(net, d) for d in durations]
    return {"cells": cells, "cells_loop_s": t_cells, "cells_fit": fit_exponent(cells, t_cells),
            "duration_ms": durations, "duration_loop_s": t_dur,
            "duration_fit": fit_exponent(durations, t_dur)}


def advise_bench(quick: bool) -> tuple[float | None, str, dict]:
    """The advice's predicted CPU seconds over the measured ones (one thread, best of 3), for 2x the
    cells and 2x the duration (goal: within 30 %).

    Profiles ``scenarios/demo-lif.toml`` with the quick sweep, asks the advice
    for a run with twice its cells over twice its duration (target: RMS jitter
    0.1 ms, 1 % missed plus extra spikes), runs that setting on that scaled
    network and divides the predicted CPU seconds by the measured ones.

    Returns
    -------
    ratio : float or None
    reason : str
        Why the ratio is None ("" otherwise).
    details : dict
    """
    if quick:
        return None, "skipped with --quick (it needs a profile sweep of demo-lif)", {}
    try:
        from .profile.advice import advise, scaled_scenario
        from .profile.runner import run_profile
    except ImportError as exc:
        return None, f"the advice model is not importable in this build ({exc})", {}
    from .network import build_network
    from .scenario import load_scenario
    from .simulation import simulate

    path = scenario_dir() / "demo-lif.toml"
    scenario = load_scenario(path)
    n, t = 2 * scenario.n_cells, 2 * scenario.duration_ms
    with tempfile.TemporaryDirectory() as prof:
        try:
            run_profile(path, prof, quick=True)
            adv = advise(prof, target_jitter_ms=0.1, target_mismatch_frac=0.01,
                         duration_s=t / 1000.0, n_cells=n)
        except Exception as exc:  # the advice is another module's work in progress: report, do not crash
            return None, f"the advice failed: {type(exc).__name__}: {exc}", {}
    network = build_network(scaled_scenario(scenario, n, t))
    simulate(network, threads=1, **adv["setting"])  # compiles
    measured = min(simulate(network, threads=1, **adv["setting"]).cost["cpu_s"] for _ in range(3))
    predicted = float(adv["predicted"]["cpu_s"])
    return predicted / measured, "", dict(setting=adv["setting"], n_cells=n, duration_ms=t,
                                          predicted_cpu_s=predicted, measured_cpu_s=measured)


def run_bench(quick: bool = False, reps: int | None = None, log=None) -> dict:
    """Run every benchmark and return the ``--json`` object.

    Parameters
    ----------
    quick : bool
        Short runs and small rasters (a smoke test for CI, not a measurement).
    reps : int, optional
        Repetitions per figure (default 5, or 1 with ``quick``).
    log : callable(str) or None
        Progress messages.

    Returns
    -------
    dict
        The keys of :data:`BENCH_KEYS` (seconds, MB, counts; None where a piece
        cannot be measured) and ``details``: per-benchmark figures, thread
        counts, the reasons for every None.
    """
    say = log or (lambda _msg: None)
    plan = BenchPlan.quick() if quick else BenchPlan.full(reps or 5)
    if reps is not None:
        plan = BenchPlan(**{**plan.__dict__, "reps": int(reps)})
    baseline = rss_mb()
    details = {"quick": quick, "reps": plan.reps, "threads": _thread_counts(),
               "threading_layer": None, "reasons": {}}
    out = dict.fromkeys(BENCH_KEYS)
    out["baseline_rss_mb"] = baseline

    say("bench-lif ...")
    lif = network_bench("bench-lif", LIF_SETTINGS, plan.lif_ms, plan.reps)
    say("bench-hh ...")
    hh = network_bench("bench-hh", HH_SETTINGS, plan.hh_ms, plan.reps)
    try:
        details["threading_layer"] = numba.threading_layer()
    except ValueError:
        pass
    for key, res in (("lif", lif), ("hh", hh)):
        for k in (1, 2):
            out[f"{key}_loop_s_{k}t"] = res["loop_s"].get(k)
            if k not in res["loop_s"]:
                details["reasons"][f"{key}_loop_s_{k}t"] = f"numba has fewer than {k} threads here"
        out[f"{key}_spikes"] = res["spikes"]
        details[key] = {k: v for k, v in res.items() if k not in ("loop_s",)}
    out["rss_growth_mb"] = lif["rss_growth_mb"]

    say("single HH cell ...")
    single = single_hh_bench(plan.single_hh_ms, plan.reps, plan.rtol_ladder)
    out["single_hh_adaptive_s"] = single["adaptive_s"]
    out["single_hh_adaptive_err_ms"] = single["adaptive_err_ms"]
    if single["adaptive_s"] is None:
        details["reasons"]["single_hh_adaptive_s"] = single["adaptive_reason"]
    out["single_hh_rk4_s"] = single["rk4_s"]
    out["single_hh_rk4_err_ms"] = single["rk4_err_ms"]
    details["single_hh"] = single

    say("raster comparison ...")
    ana = analysis_bench(plan.raster_cells, plan.raster_spikes, plan.elephant_cells)
    out["compare_1e6_s"] = ana["match_summary_s"]
    out["van_rossum_1e6_s"] = ana["van_rossum_s"]
    out["elephant_van_rossum_1e6_s"] = ana["elephant_all_cells_s"]
    if ana["elephant_all_cells_s"] is None:
        details["reasons"]["elephant_van_rossum_1e6_s"] = "elephant is not installed"
    details["analysis"] = ana

    if plan.cold_compile:
        say("cold compile ...")
        out["compile_s"] = cold_compile_s()
        details["compile_kind"] = "fresh interpreter, empty numba cache, both bench settings"
        if out["compile_s"] is None:
            details["reasons"]["compile_s"] = "the cold-compile child process failed"
    else:
        out["compile_s"] = lif["warmup_s"] + hh["warmup_s"]
        details["compile_kind"] = "warm-up runs in this process (numba cache as found)"

    say("model file ...")
    out["model_file_compile_s"], out["model_file_load_s"] = model_file_compile_s()
    for key in ("model_file_compile_s", "model_file_load_s"):
        if out[key] is None:
            details["reasons"][key] = "the model-file child process failed"

    say("scaling ...")
    details["scaling"] = scaling_bench(quick)

    say("advice ...")
    out["advise_cpu_ratio"], reason, details["advice"] = advise_bench(quick)
    if out["advise_cpu_ratio"] is None:
        details["reasons"]["advise_cpu_ratio"] = reason
    if out["rss_growth_mb"] is None or baseline is None:
        details["reasons"]["rss_growth_mb"] = details["reasons"]["baseline_rss_mb"] = \
            "/proc/self/statm is not available on this system"
    out["details"] = details
    return out


def format_report(res: dict) -> str:
    """Human-readable summary of :func:`run_bench`'s result."""
    d = res["details"]

    def f(x, spec=".4g"):
        return "n/a" if x is None else format(x, spec)

    lines = [f"spikegauge bench{' (quick)' if d['quick'] else ''}: medians of {d['reps']} "
             f"interleaved runs, threads {d['threads']} ({d['threading_layer']})"]
    for key, name in (("lif", "bench-lif euler/step/grid dt 0.1"),
                      ("hh", "bench-hh rk4/linear/grid dt 0.01")):
        x = d[key]
        lines.append(f"{name}: loop {f(res[key + '_loop_s_1t'])} s (1t), "
                     f"{f(res[key + '_loop_s_2t'])} s (2t); {x['spikes']} spikes, "
                     f"{x['rate_hz']:.2f} Hz; {x['neuron_steps_per_s']:.3g} cell-steps/s, "
                     f"{x['syn_events_per_s']:.3g} synaptic events/s (1t); identical across threads: "
                     f"{x['identical_across_threads']}")
    s = d["single_hh"]
    lines.append(f"single HH: local-adaptive dp54 rtol {f(s.get('adaptive_rtol'), 'g')} "
                 f"{f(res['single_hh_adaptive_s'])} s, max error {f(res['single_hh_adaptive_err_ms'])} ms; "
                 f"rk4+hermite dt 0.01 {f(res['single_hh_rk4_s'])} s, "
                 f"max error {f(res['single_hh_rk4_err_ms'])} ms (reference: DOP853 1e-12)")
    a = d["analysis"]
    lines.append(f"rasters {a['n_ref']} vs {a['n_test']} spikes, {a['n_cells']} cells: compare "
                 f"{f(res['compare_1e6_s'])} s, van Rossum {f(res['van_rossum_1e6_s'])} s, "
                 f"elephant (extrapolated) {f(res['elephant_van_rossum_1e6_s'])} s")
    lines.append(f"compile {f(res['compile_s'])} s ({d['compile_kind']}); RSS baseline "
                 f"{f(res['baseline_rss_mb'])} MB, growth during bench-lif {f(res['rss_growth_mb'])} MB")
    lines.append(f"model file (traub-hh): compile {f(res['model_file_compile_s'])} s (goal <= 20), "
                 f"start-up from the cache {f(res['model_file_load_s'])} s (goal <= 2); fresh interpreters, "
                 "time from import of spikegauge.models to a loaded model")
    sc = d["scaling"]
    lines.append("bench-lif scaling exponents (target 1.0 +- 0.1): "
                 + ", ".join(f"{name} {_exponent_text(sc[name + '_fit'])}" for name in ("cells", "duration")))
    lines.append(f"advice CPU-time ratio (predicted / measured): {f(res['advise_cpu_ratio'])}")
    for key, why in d["reasons"].items():
        lines.append(f"  {key}: n/a - {why}")
    return "\n".join(lines)


def _exponent_text(fit: dict) -> str:
    if fit["exponent"] is None:
        return fit["quality"]
    return f"{fit['exponent']:.3f} +- {fit['stderr']:.3f} (r^2 {fit['r2']:.3f})"


def to_json(res: dict) -> str:
    """One JSON object; non-finite floats become null (JSON has no inf/NaN)."""
    def clean(x):
        if isinstance(x, dict):
            return {str(k): clean(v) for k, v in x.items()}
        if isinstance(x, (list, tuple)):
            return [clean(v) for v in x]
        if isinstance(x, (np.floating, float)):
            return float(x) if math.isfinite(x) else None
        if isinstance(x, np.integer):
            return int(x)
        if isinstance(x, np.bool_):
            return bool(x)
        return x
    return json.dumps(clean(res))
