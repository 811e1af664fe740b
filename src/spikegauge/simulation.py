"""``simulate``: one scenario, one integration setting, one :class:`~spikegauge.runs.Run`."""
from __future__ import annotations

import hashlib
import math
import platform
import threading
import time
from functools import partial
from pathlib import Path

import numba
import numpy as np
import pandas as pd
import scipy

from .errors import InputError
from .integrate.engine import N_COUNTERS, CellState, SpikeBuffer, WindowArrivals, run_windows
from .integrate.replay import ReplayRaster
from .runs import Run
from .threads import default_threads

STRATEGIES = ("fixed", "global-adaptive", "local-adaptive", "exact")

MIN_DT_MS = 1e-9
"""Smallest time step accepted (ms): the grid snapping tolerance."""

MIN_TOLERANCE = 1e-14
"""Smallest rtol/atol accepted: about 100 times the double-precision epsilon (common practice)."""

DEFAULTS = {
    "fixed": dict(stepper="rk4", crossing="hermite", delivery="exact", dt_ms=0.025),
    "global-adaptive": dict(stepper="dp54", crossing="dense"),
    "local-adaptive": dict(stepper="dp54", crossing="dense"),
    "exact": dict(),
}


def _as_scenario(scenario):
    """Accept a path, a Scenario or a Network; return (scenario or None, network)."""
    from .network import Network, build_network
    from .scenario import load_scenario

    if isinstance(scenario, (str, Path)):
        scenario = load_scenario(scenario)
    if isinstance(scenario, Network):
        _check_models_loaded(scenario)
        return None, scenario
    return scenario, build_network(scenario)


def _check_models_loaded(network) -> None:
    """Refuse a network whose model codes mean other models in this process.

    A model file's code is its place among the model files this process has
    loaded; a network built elsewhere (and pickled here) may use codes that are
    not loaded here, or mean other models. Build it from its scenario in this
    process instead.
    """
    from .models import model_by_code

    for g, name in enumerate(network.group_model):
        if network.group_first[g + 1] == network.group_first[g]:
            continue
        code = int(network.cell_model[network.group_first[g]])
        try:
            ok = model_by_code(code).name == name
        except ValueError:
            ok = False
        if not ok:
            raise InputError(f"group {network.group_names[g]!r}: model {name!r} (code {code}) is not the model "
                             "this process knows by that code; build the network from its scenario in this "
                             "process (a model file is loaded where its scenario is read)")


def resolve_settings(scenario, strategy=None, stepper=None, dt_ms=None, crossing=None,
                     delivery=None, rtol=None, atol=None) -> dict:
    """Merge call options over the scenario's ``[integration]`` table over the defaults.

    Tolerances have no silent default: an adaptive strategy needs ``rtol``
    (``atol`` defaults to ``rtol``; it multiplies each state's typical scale).
    """
    table = {}
    integ = getattr(scenario, "integration", None) if scenario is not None else None
    if integ is not None:
        table = integ if isinstance(integ, dict) else {
            k: getattr(integ, k) for k in ("strategy", "stepper", "dt_ms", "crossing",
                                           "delivery", "rtol", "atol") if hasattr(integ, k)}
    given = dict(strategy=strategy, stepper=stepper, dt_ms=dt_ms, crossing=crossing,
                 delivery=delivery, rtol=rtol, atol=atol)
    s = {k: (v if v is not None else table.get(k)) for k, v in given.items()}
    strategy = s["strategy"] or "fixed"
    if strategy not in STRATEGIES:
        raise InputError(f"strategy: unknown strategy {strategy!r}; choose one of {', '.join(STRATEGIES)}")
    # Options that belong to another strategy (e.g. a scenario's dt_ms when the call asks
    # for an adaptive strategy) are dropped when they came from the scenario, refused when
    # they came from the call.
    if strategy != (table.get("strategy") or "fixed"):
        s = {k: given[k] for k in given} | {"strategy": strategy}
    out = {"strategy": strategy}
    for key, default in DEFAULTS[strategy].items():
        out[key] = s.get(key) if s.get(key) is not None else default
    if strategy == "fixed":
        for key in ("rtol", "atol"):
            if given[key] is not None:
                raise InputError(f"{key}: tolerances apply to adaptive strategies, not to 'fixed'")
        out["dt_ms"] = float(out["dt_ms"])
        if not (MIN_DT_MS <= out["dt_ms"] < math.inf):
            raise InputError(f"dt_ms: must be a time step of at least {MIN_DT_MS:g} ms, got {out['dt_ms']!r}")
    elif strategy in ("global-adaptive", "local-adaptive"):
        for key in ("dt_ms", "delivery"):
            if given[key] is not None:
                raise InputError(f"{key}: applies to the fixed strategy, not to {strategy!r} "
                                 "(every synaptic event ends an adaptive step exactly)")
        if out["crossing"] != "dense":
            raise InputError(f"crossing: adaptive strategies locate crossings on dense output; "
                             f"'dense' is the only choice, got {out['crossing']!r}")
        if s.get("rtol") is None:
            raise InputError(f"rtol: {strategy} needs a relative tolerance (for example --rtol 1e-4)")
        out["rtol"] = float(s["rtol"])
        out["atol"] = float(s["atol"]) if s.get("atol") is not None else out["rtol"]
        for key in ("rtol", "atol"):
            if not (MIN_TOLERANCE <= out[key] <= 1.0):
                raise InputError(f"{key}: must lie between {MIN_TOLERANCE:g} (what double precision can "
                                 f"resolve) and 1, got {out[key]!r}")
    else:
        for key in ("stepper", "dt_ms", "crossing", "delivery", "rtol", "atol"):
            if given[key] is not None:
                raise InputError(f"{key}: the exact reference takes no {key}")
    return out


def make_kernel(network, settings: dict, auto_scale=False, record_steps=None):
    """The window kernel for a resolved setting."""
    strategy = settings["strategy"]
    if strategy == "fixed":
        from .integrate.fixed import FixedStepKernel
        return FixedStepKernel(network, settings["dt_ms"], settings["stepper"],
                               settings["crossing"], settings["delivery"])
    if strategy == "exact":
        from .integrate.reference import ExactLifKernel
        return ExactLifKernel(network)
    from .integrate import adaptive
    cls = adaptive.LocalAdaptiveKernel if strategy == "local-adaptive" else adaptive.GlobalAdaptiveKernel
    return cls(network, settings["stepper"], settings["rtol"], settings["atol"],
               auto_scale=auto_scale, record_steps=record_steps)


def simulate(scenario, strategy=None, stepper=None, dt_ms=None, crossing=None, delivery=None,
             rtol=None, atol=None, auto_scale=False, threads=None, t_stop_ms=None,
             record_cells=None, record_interval_ms=None, record_steps=None,
             progress=None, work_limit=None, open_loop=None) -> Run:
    """Integrate a scenario's network with one setting.

    Parameters
    ----------
    scenario : path, Scenario or Network
    strategy : {"fixed", "global-adaptive", "local-adaptive", "exact"}, optional
        Default from the scenario's ``[integration]`` table, else ``"fixed"``.
    stepper, dt_ms, crossing, delivery : optional
        Fixed step: stepper (euler, expeuler, rk2, rk4, backward-euler, trapezoidal), time step (ms),
        crossing (step, linear, hermite), delivery (grid, exact).
    rtol, atol : float, optional
        Adaptive strategies: relative tolerance and absolute tolerance in units of
        each state's typical scale.
    auto_scale : bool
        Adaptive strategies: measure each state's scale with a short pilot run.
    threads : int, optional
        Number of numba threads (results are bit-identical for any count). By
        default as many as help: :func:`spikegauge.threads.default_threads`
        (one below 200 cells, never more than the cores other programs leave free).
    t_stop_ms : float, optional
        Stop earlier than the scenario's duration.
    record_cells, record_interval_ms : optional
        Record the full state of these cells every ``record_interval_ms``.
    record_steps : list of int, optional
        Adaptive strategies: keep (time, step size, accepted) for these cells.
    progress : callable(t_ms) or None
        Called as the run advances.
    work_limit : float, optional
        Stop once the work (rhs evaluations, Newton iterations and Jacobian evaluations)
        exceeds this,
        at the end of a window; the run's status is then ``"stopped"``.
    open_loop : Run, (cell, time_ms) pair of arrays, path, or None
        Open loop: the network's recurrent input comes from these spikes (every
        synapse delivers them with its own delay, weight and receptor), not from
        its own; drive is as usual, and a cell's own spikes still reset it, start
        its refractory period and are the run's spikes. A path is a run folder,
        or an NPZ or CSV raster (:func:`spikegauge.analysis.rasters.as_raster`).
        Spikes before 0 or at or after the end of the run are left out. The run
        records ``settings["open_loop"] = True`` and, in ``meta["open_loop_raster"]``,
        the replayed spikes' count, source and SHA-256
        (:func:`spikegauge.integrate.replay.raster_digest`). Replaying a setting's
        own raster with that setting reproduces it exactly.

    Returns
    -------
    Run
    """
    scen, network = _as_scenario(scenario)
    cpu_start = time.process_time()
    settings = resolve_settings(scen, strategy, stepper, dt_ms, crossing, delivery, rtol, atol)
    t_stop = float(network.t_stop_ms if t_stop_ms is None else t_stop_ms)
    if not (t_stop > 0 and math.isfinite(t_stop)):
        raise InputError(f"t_stop_ms (--t-stop-ms): must be a positive number, got {t_stop!r}")
    if settings["strategy"] == "fixed" and settings["dt_ms"] > t_stop:
        raise InputError(f"dt_ms: a time step of {settings['dt_ms']:g} ms is longer than the run "
                         f"({t_stop:g} ms)")
    if t_stop > network.t_stop_ms:
        # The drive (Poisson trains, step ends, input spikes) is defined up to the duration only.
        raise InputError(f"t_stop_ms (--t-stop-ms): must not exceed the scenario's duration_ms = "
                         f"{network.t_stop_ms:g}, got {t_stop:g}")
    replay = None if open_loop is None else replay_raster(open_loop, network, t_stop)
    if threads is not None and not 1 <= int(threads) <= numba.config.NUMBA_NUM_THREADS:
        raise InputError(f"threads: must be between 1 and {numba.config.NUMBA_NUM_THREADS}, got {threads}")
    threads_before = numba.get_num_threads()
    with CompileTimer() as compiling:
        try:
            numba.set_num_threads(int(threads) if threads is not None
                                  else default_threads(network.n_cells))
            kernel = make_kernel(network, settings, auto_scale=auto_scale, record_steps=record_steps)
            state = CellState.initial(network, getattr(kernel, "scale_table", None))
            warm_up(kernel, state, network)
            recorder = _TraceRecorder(network, record_cells, record_interval_ms, kernel) \
                if record_cells is not None else None
            run = getattr(kernel, "run", None)
            if run is None:
                run = partial(run_windows, network, kernel)
            else:
                run = partial(run, network)
            result = run(t_stop, state=state, progress=progress,
                         extra_edges=None if recorder is None else recorder.times(t_stop),
                         on_window=None if recorder is None else recorder, work_limit=work_limit,
                         replay=replay)
            n_threads = numba.get_num_threads()
        finally:
            numba.set_num_threads(threads_before)
    order = np.lexsort((result.cell, result.time_ms))
    spikes = pd.DataFrame({"cell": result.cell[order].astype(np.int64),
                           "time_ms": result.time_ms[order].astype(np.float64)})
    # What a user pays for this run: process CPU time (every thread, so work done by a pool
    # thread counts too) from the settings to the spikes, less compiling and loading kernels.
    compile_s = compiling.seconds
    cpu_s = max(time.process_time() - cpu_start - compile_s, 0.0)
    settings = dict(settings, threads=n_threads)
    if auto_scale and hasattr(kernel, "scale_used"):
        settings["scale_used"] = kernel.scale_used
    meta = _meta(scen, network, t_stop)
    if replay is not None:
        settings["open_loop"] = True
        meta["open_loop_raster"] = dict(sha256=replay.digest, spikes=replay.n_spikes,
                                        source=replay.source)
    cost = dict(result.counters, wall_s=result.wall_s, cpu_s=cpu_s, compile_s=compile_s,
                spikes=int(len(spikes)),
                cell_steps_per_s=result.counters["steps"] / result.wall_s if result.wall_s > 0 else None)
    return Run(
        spikes=spikes, n_cells=network.n_cells, t_start_ms=0.0, t_stop_ms=result.t_reached_ms,
        group_names=tuple(network.group_names), group_first=np.asarray(network.group_first),
        settings=settings, status=result.status, message=result.message, cost=cost,
        meta=meta,
        traces=None if recorder is None else recorder.table(),
        step_trace=kernel.step_trace() if record_steps and hasattr(kernel, "step_trace") else None,
    )


class CompileTimer:
    """Process CPU seconds numba spends compiling or loading kernels in this thread while active.

    Counts the time under numba's compiler lock (nested compilations once), so
    kernels compiled lazily anywhere in a run, not only in the warm-up, are left
    out of the run's CPU time. CPU time, not wall time, so that subtracting it
    stays right on a busy machine; compilations in other threads (another run of
    an in-process Dask worker, say) are not counted.
    """

    def __init__(self):
        from numba.core import event

        owner, timer = threading.get_ident(), self

        class _ThisThread(event.Listener):
            def on_start(self, ev):
                if threading.get_ident() == owner:
                    if timer._depth == 0:
                        timer._started = time.process_time()
                    timer._depth += 1

            def on_end(self, ev):
                if threading.get_ident() == owner:
                    timer._depth -= 1
                    if timer._depth == 0:
                        timer.seconds += time.process_time() - timer._started

        self.seconds = 0.0
        self._depth = 0
        self._started = 0.0
        self._install = event.install_listener("numba:compiler_lock", _ThisThread())

    def __enter__(self):
        self._install.__enter__()
        return self

    def __exit__(self, *exc):
        self._install.__exit__(*exc)
        return False


def replay_raster(source, network, t_stop_ms: float) -> ReplayRaster:
    """The spikes an open-loop run of ``network`` up to ``t_stop_ms`` replays.

    Parameters
    ----------
    source : Run, (cell, time_ms) pair of arrays, or path
        A run, two arrays, a run folder, or an NPZ or CSV raster file.
    network : Network
    t_stop_ms : float
        End of the run (ms); spikes at or after it, and before 0, are left out.

    Raises
    ------
    InputError
        An unreadable source, a raster of another network size, cell ids beyond the network.
    """
    from .analysis.rasters import Raster, as_raster

    n = network.n_cells
    if isinstance(source, (tuple, list)):
        if len(source) != 2:
            raise InputError(f"open_loop: give a run, a (cell, time_ms) pair of arrays or a raster "
                             f"file, got a sequence of {len(source)}")
        raster = Raster.from_arrays(source[0], source[1], n_cells=n, t_start_ms=0.0,
                                    t_stop_ms=t_stop_ms, source="open_loop")
        return ReplayRaster(raster.cell, raster.time_ms, n, source="<arrays>")
    if isinstance(source, Run) and source.n_cells != n:
        raise InputError(f"open_loop: the run replayed has {source.n_cells} cells; the network "
                         f"has {n}")
    raster = as_raster(source, t_start_ms=0.0, t_stop_ms=t_stop_ms)
    if raster.n_cells > n:
        raise InputError(f"{raster.source}: the raster has {raster.n_cells} cells; the network "
                         f"has {n}")
    return ReplayRaster(raster.cell, raster.time_ms, n, source=raster.source)


def warm_up(kernel, state, network=None) -> float:
    """Compile (or load from the disk cache) the kernel with a zero-length window.

    The state is restored afterwards, so the run is unchanged; the returned
    seconds are what the run's loop time leaves out.
    """
    n = state.code.size
    if network is not None and hasattr(kernel, "warm_up"):
        tic = time.perf_counter()
        if kernel.warm_up(network, state):
            return time.perf_counter() - tic
    snap = state.snapshot()
    empty = WindowArrivals(np.zeros(n + 1, dtype=np.int64), np.empty(0),
                           np.empty(0, dtype=np.int64), np.empty(0))
    tic = time.perf_counter()
    kernel.advance(state, 0.0, 0.0, empty, SpikeBuffer.empty(n, 1),
                   np.zeros((n, N_COUNTERS), dtype=np.int64))
    elapsed = time.perf_counter() - tic
    state.restore(snap)
    return elapsed


class _TraceRecorder:
    """Samples the full state of a few cells at window ends placed on the sampling times."""

    def __init__(self, network, cells, interval_ms, kernel):
        self.cells = np.asarray(cells, dtype=np.int64)
        if self.cells.size == 0 or self.cells.min() < 0 or self.cells.max() >= network.n_cells:
            raise InputError(f"record_cells: cell ids must lie in 0..{network.n_cells - 1}")
        if interval_ms is None or not interval_ms > 0:
            raise InputError("record_interval_ms: must be a positive number of ms")
        dt = getattr(kernel, "dt", None)
        self.interval = float(interval_ms) if dt is None else max(1, round(interval_ms / dt)) * dt
        self.n_states = int(network.n_states[self.cells].max())
        self.rows: list[np.ndarray] = []
        self._done: set[int] = set()
        self._kernel = kernel

    def times(self, t_stop):
        n = int(math.floor(t_stop / self.interval + 1e-9))
        dt = getattr(self._kernel, "dt", None)
        k = np.arange(1, n + 1)
        if dt is None:
            return k * self.interval
        return k * int(round(self.interval / dt)) * dt

    def __call__(self, t0, t1, state):
        r = t1 / self.interval
        if abs(r - round(r)) <= 1e-9 * max(1.0, r) and round(r) not in self._done:
            self._done.add(round(r))
            block = np.column_stack([self.cells, np.full(self.cells.size, t1),
                                     state.y[self.cells, :self.n_states]])
            self.rows.append(block)

    def table(self) -> pd.DataFrame:
        cols = ["cell", "time_ms"] + [f"state{j}" for j in range(self.n_states)]
        data = np.vstack(self.rows) if self.rows else np.empty((0, len(cols)))
        df = pd.DataFrame(data, columns=cols)
        df["cell"] = df["cell"].astype(np.int64)
        return df


def _meta(scen, network, t_stop) -> dict:
    from . import __version__

    text = getattr(scen, "text", None)
    meta = dict(
        scenario_name=getattr(scen, "name", None),
        scenario_path=str(getattr(scen, "path", "")) or None,
        scenario_text=text,
        scenario_digest=hashlib.sha256(text.encode()).hexdigest() if text else None,
        seed=int(network.seed),
        t_requested_ms=t_stop,
        versions=dict(spikegauge=__version__, numpy=np.__version__, scipy=scipy.__version__,
                      numba=numba.__version__, pandas=pd.__version__,
                      python=platform.python_version()),
    )
    return meta
