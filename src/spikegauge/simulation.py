"""``simulate``: one scenario, one integration setting, one :class:`~spikegauge.runs.Run`."""
from __future__ import annotations

import hashlib
import math
import platform
from functools import partial
from pathlib import Path

import numba
import numpy as np
import pandas as pd
import scipy

from .errors import InputError
from .integrate.engine import N_COUNTERS, CellState, SpikeBuffer, WindowArrivals, run_windows
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
        return None, scenario
    return scenario, build_network(scenario)


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
                                 "(every arrival ends an adaptive step exactly)")
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
             progress=None) -> Run:
    """Integrate a scenario's network with one setting.

    Parameters
    ----------
    scenario : path, Scenario or Network
    strategy : {"fixed", "global-adaptive", "local-adaptive", "exact"}, optional
        Default from the scenario's ``[integration]`` table, else ``"fixed"``.
    stepper, dt_ms, crossing, delivery : optional
        Fixed step: stepper (euler, expeuler, rk2, rk4, backward-euler), time step (ms),
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

    Returns
    -------
    Run
    """
    scen, network = _as_scenario(scenario)
    settings = resolve_settings(scen, strategy, stepper, dt_ms, crossing, delivery, rtol, atol)
    t_stop = float(network.t_stop_ms if t_stop_ms is None else t_stop_ms)
    if not (t_stop > 0 and math.isfinite(t_stop)):
        raise InputError(f"t_stop_ms: must be a positive number, got {t_stop!r}")
    if settings["strategy"] == "fixed" and settings["dt_ms"] > t_stop:
        raise InputError(f"dt_ms: a time step of {settings['dt_ms']:g} ms is longer than the run "
                         f"({t_stop:g} ms)")
    if t_stop > network.t_stop_ms:
        # The drive (Poisson trains, step ends, input spikes) is defined up to the duration only.
        raise InputError(f"t_stop_ms: must not exceed the scenario's duration_ms = "
                         f"{network.t_stop_ms:g}, got {t_stop:g}")
    if threads is not None and not 1 <= int(threads) <= numba.config.NUMBA_NUM_THREADS:
        raise InputError(f"threads: must be between 1 and {numba.config.NUMBA_NUM_THREADS}, got {threads}")
    threads_before = numba.get_num_threads()
    try:
        numba.set_num_threads(int(threads) if threads is not None else default_threads(network.n_cells))
        kernel = make_kernel(network, settings, auto_scale=auto_scale, record_steps=record_steps)
        state = CellState.initial(network, getattr(kernel, "scale_table", None))
        compile_s = warm_up(kernel, state, network)
        recorder = _TraceRecorder(network, record_cells, record_interval_ms, kernel) \
            if record_cells is not None else None
        run = getattr(kernel, "run", None)
        if run is None:
            run = partial(run_windows, network, kernel)
        else:
            run = partial(run, network)
        result = run(t_stop, state=state, progress=progress,
                     extra_edges=None if recorder is None else recorder.times(t_stop),
                     on_window=None if recorder is None else recorder)
        n_threads = numba.get_num_threads()
    finally:
        numba.set_num_threads(threads_before)
    order = np.lexsort((result.cell, result.time_ms))
    spikes = pd.DataFrame({"cell": result.cell[order].astype(np.int64),
                           "time_ms": result.time_ms[order].astype(np.float64)})
    settings = dict(settings, threads=n_threads)
    if auto_scale and hasattr(kernel, "scale_used"):
        settings["scale_used"] = kernel.scale_used
    cost = dict(result.counters, wall_s=result.wall_s, compile_s=compile_s, spikes=int(len(spikes)),
                cell_steps_per_s=result.counters["steps"] / result.wall_s if result.wall_s > 0 else None)
    return Run(
        spikes=spikes, n_cells=network.n_cells, t_start_ms=0.0, t_stop_ms=result.t_reached_ms,
        group_names=tuple(network.group_names), group_first=np.asarray(network.group_first),
        settings=settings, status=result.status, message=result.message, cost=cost,
        meta=_meta(scen, network, t_stop),
        traces=None if recorder is None else recorder.table(),
        step_trace=kernel.step_trace() if record_steps and hasattr(kernel, "step_trace") else None,
    )


def warm_up(kernel, state, network=None) -> float:
    """Compile (or load from the disk cache) the kernel with a zero-length window.

    The state is restored afterwards, so the run is unchanged; the returned
    seconds are what the run's loop time leaves out.
    """
    import time

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
