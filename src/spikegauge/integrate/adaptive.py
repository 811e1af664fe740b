"""Window kernels of the two adaptive strategies (see :mod:`spikegauge.integrate.engine`).

* :class:`LocalAdaptiveKernel` (``strategy="local-adaptive"``): every cell has
  its own step size, kept across windows in ``state.extra["h"]`` (and its PI
  memory in ``state.extra["err_prev"]``), so window reruns restore it.
* :class:`GlobalAdaptiveKernel` (``strategy="global-adaptive"``): one step
  size for the network, ``state.extra["global"]``.

Both take a stepper with an error estimate and dense output (``bs32``,
``dp54``, ``rodas3``, :mod:`spikegauge.integrate.tableaux`; the multistep
``bdf``, :mod:`spikegauge.integrate.bdf`, whose history, Jacobian and order
are kept per cell in ``state.extra["bdf_D"]``, ``["bdf_J"]`` and
``["bdf"]``), ``rtol`` and
``atol``; the absolute tolerance of state i is ``atol * scale_i``. Scales come
from the models (:attr:`ModelSpec.scale`), from the caller, or, with
``auto_scale=True``, from a short pilot run (:func:`pilot_scales`).
Crossings are always located on the dense output.
"""
from __future__ import annotations

import math

import numba
import numpy as np
import pandas as pd

from ..errors import InputError
from ..models import MODELS, model_by_code, physical_zero, state_scales
from .adaptive_global import global_window
from .adaptive_local import local_chunk, local_window_parallel
from .adaptive_steppers import N_ROWS
from .bdf import D_ROWS, N_BDF
from .engine import default_boundaries
from ..models import receptor_state_table
from .step_control import controller_exponent
from .tableaux import ADAPTIVE_STEPPER_CODES, STEPPER_INFO

MIN_STEP_MS = 1e-12
"""Default smallest step (ms) the error control may ask for before the run is declared diverged."""
MAX_STEPS = 50_000_000
"""Default largest number of steps (accepted + rejected) per cell (local) or network (global)."""
PILOT_MS = 20.0
"""Length of the auto-scale pilot run (ms)."""
PILOT_DT_MS = 0.005
"""Time step of the pilot run (fixed rk4, Hermite crossing, exact delivery)."""
PILOT_SAMPLE_MS = 0.05
"""Sampling interval of the pilot run: well below a spike's width (~1 ms)."""
SCALE_FLOOR = 0.01
"""A measured scale is never below this fraction of the model's own scale (a state
that barely moved in the pilot must not get an absurdly tight absolute tolerance)."""
PARALLEL_MIN_CELLS = 64
"""Local stepping runs cells in parallel from this many cells on (and with more than one
thread). One parallel region per window costs little on an idle machine, but on a loaded
one a region waits for its slowest, descheduled thread: demo-hh (40 cells, 500 windows)
took 6.1 s with 2 threads against 0.23 s serially on the shared 2-core machine."""
TRACE_CAPACITY = 4096
"""Initial trace slots per recorded cell and window; doubled on overflow."""


def pilot_scales(network, t_ms: float = PILOT_MS) -> dict:
    """Typical magnitude of each state of each model in the network, from a pilot run.

    The network (with its drive and synapses) runs for ``min(t_ms, t_stop)``
    ms with fixed-step rk4 at 0.005 ms, sampled every 0.05 ms. A state with a
    physical zero (gate, conductance) gets its largest |value| over the
    model's cells and samples; a state without one (voltage) gets its range
    (max - min), since its zero is arbitrary. Each is floored at
    ``SCALE_FLOOR`` times the model's own scale, which also stands in for a
    state that never moved.

    Returns
    -------
    dict
        Model name -> list of per-state scales (the model's own state count).
    """
    from .engine import CellState, run_windows
    from .fixed import FixedStepKernel

    t_stop = min(float(t_ms), float(network.t_stop_ms))
    kernel = FixedStepKernel(network, PILOT_DT_MS, "rk4", "hermite", "exact")
    codes = np.unique(network.cell_model)
    width = network.y0.shape[1]
    hi = np.full((network.n_cells, width), -np.inf)
    lo = np.full((network.n_cells, width), np.inf)

    def sample(t0, t1, state):
        np.maximum(hi, state.y, out=hi)
        np.minimum(lo, state.y, out=lo)

    state = CellState.initial(network)
    sample(0.0, 0.0, state)
    n_samples = int(math.floor(t_stop / PILOT_SAMPLE_MS))
    edges = np.arange(1, n_samples + 1) * PILOT_SAMPLE_MS
    run_windows(network, kernel, t_stop, state=state, extra_edges=edges, on_window=sample)
    out = {}
    for code in codes:
        spec = model_by_code(int(code))
        rows = network.cell_model == code
        n = spec.n_states
        top = hi[rows, :n].max(axis=0)
        bottom = lo[rows, :n].min(axis=0)
        measured = np.where(spec.has_physical_zero, np.maximum(np.abs(top), np.abs(bottom)),
                            top - bottom)
        measured = np.where(np.isfinite(measured), measured, spec.scale)
        out[spec.name] = [float(v) for v in np.maximum(measured, SCALE_FLOOR * spec.scale)]
    return out


def _measure_missing_scales(network):
    """Scales of model files that leave some out: measured by :func:`pilot_scales`; None if none are missing.

    States whose scale the file gives keep it; only the missing ones take the pilot's values.
    """
    codes = [int(c) for c in np.unique(network.cell_model)]
    missing = [model_by_code(c) for c in codes
               if "scale_given" in model_by_code(c).extra and not model_by_code(c).extra["scale_given"].all()]
    if not missing:
        return None
    measured = pilot_scales(network)
    return {spec.name: [float(s) if given else measured[spec.name][k]
                        for k, (s, given) in enumerate(zip(spec.scale, spec.extra["scale_given"]))]
            for spec in missing}


def _scale_table(scale) -> np.ndarray:
    """Scale table (n_models, max_states) from None (model scales) or {model name: [scales]}."""
    table = state_scales()
    if scale is None:
        return table
    if not isinstance(scale, dict):
        raise InputError("scale: give a mapping of model name -> list of per-state scales")
    for name, values in scale.items():
        if name not in MODELS:
            raise InputError(f"scale: unknown model {name!r}; known models: {', '.join(MODELS)}")
        spec = MODELS[name]
        v = np.asarray(values, dtype=np.float64)
        if v.shape != (spec.n_states,) or not np.all(np.isfinite(v) & (v > 0)):
            raise InputError(f"scale.{name}: need {spec.n_states} positive finite values "
                             f"({', '.join(spec.state_names)}), got {values!r}")
        table[spec.code, :spec.n_states] = v
    return table


class _AdaptiveKernel:
    """What both adaptive window kernels share: validation, scales, per-cell tables, trace."""

    strategy = ""

    def __init__(self, network, stepper: str, rtol: float, atol: float, scale=None,
                 record_steps=None, auto_scale: bool = False, min_step_ms: float = MIN_STEP_MS,
                 max_steps: int = MAX_STEPS, max_step_ms: float = math.inf):
        if stepper not in ADAPTIVE_STEPPER_CODES:
            raise InputError(f"stepper: {stepper!r} has no error estimate for {self.strategy}; "
                             f"choose one of {', '.join(ADAPTIVE_STEPPER_CODES)}")
        for key, v in (("rtol", rtol), ("atol", atol)):
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise InputError(f"{key}: must be a positive number, got {v!r}")
        if not (min_step_ms > 0 and max_step_ms > min_step_ms):
            raise InputError(f"min_step_ms/max_step_ms: need 0 < min_step_ms < max_step_ms, got "
                             f"{min_step_ms!r}, {max_step_ms!r}")
        if int(max_steps) < 1:
            raise InputError(f"max_steps: must be at least 1, got {max_steps!r}")
        if auto_scale and scale is not None:
            raise InputError("scale: give either explicit scales or auto_scale=True, not both")
        self.network = network
        self.stepper_name = stepper
        self.stepper = ADAPTIVE_STEPPER_CODES[stepper]
        self.rtol = float(rtol)
        self.atol = float(atol)
        self.min_step_ms = float(min_step_ms)
        self.max_step_ms = float(max_step_ms)
        self.max_steps = int(max_steps)
        self.order = STEPPER_INFO[stepper].order
        self.expo = controller_exponent(STEPPER_INFO[stepper].error_order)
        if auto_scale:
            scale = pilot_scales(network)
        elif scale is None:
            scale = _measure_missing_scales(network)
        self.scale_table = _scale_table(scale)
        codes = np.unique(network.cell_model)
        self.scale_used = {model_by_code(int(c)).name:
                           [float(v) for v in self.scale_table[c, :model_by_code(int(c)).n_states]]
                           for c in codes}
        cm = np.asarray(network.cell_model, dtype=np.int64)
        self._scale = np.ascontiguousarray(self.scale_table[cm])
        self._pzero = np.ascontiguousarray(physical_zero()[cm].astype(np.float64))
        self.rstate = receptor_state_table()
        rec = [] if record_steps is None else [int(c) for c in record_steps]
        for c in rec:
            if not 0 <= c < network.n_cells:
                raise InputError(f"record_steps: cell {c} is not in the network "
                                 f"(cells 0..{network.n_cells - 1})")
        self.record_cells = rec
        # trace rows per window start: a window rerun by the engine replaces its rows
        self._trace_parts: dict[float, list[tuple]] = {}
        self._tr_cap = TRACE_CAPACITY
        self._extra_made_at = None

    # -- window-kernel protocol ------------------------------------------------
    def boundaries(self, t_stop_ms: float) -> np.ndarray:
        return default_boundaries(self.network.d_min_ms, t_stop_ms)

    def effective_time(self, time_ms):
        return time_ms

    def advance(self, state, t0, t1, arrivals, spikes, counters):
        self._ensure_extra(state, t0)
        n_rows = self._trace_rows()
        while True:
            tr = self._trace_buffers(n_rows)
            if n_rows:
                snap = state.snapshot()
                before = counters.copy()
            self._run(state, t0, t1, arrivals, spikes, counters, tr)
            if not n_rows or tr[4].max() <= self._tr_cap:
                break
            # trace overflow: rerun the window with room for every step
            self._tr_cap = 2 * int(tr[4].max())
            state.restore(snap)
            counters[:] = before
            spikes.count[:] = 0
        if n_rows:
            self._trace_parts[float(t0)] = self._trace_rows_of(tr)

    # -- step trace --------------------------------------------------------------
    def step_trace(self) -> pd.DataFrame:
        """Recorded steps: columns cell, time_ms (step start), h_ms, accepted, order.

        Rejected attempts have ``accepted=False``; an accepted step cut short by
        a reset crossing appears with its shortened length. ``order`` is the
        order of the formula the step used (fixed for the one-step methods;
        ``bdf``'s varies, and is 1 on the steps after a restart).
        """
        frames = [pd.DataFrame({"cell": np.full(t.size, c, dtype=np.int64), "time_ms": t, "h_ms": h,
                                "accepted": a, "order": o})
                  for parts in self._trace_parts.values() for c, t, h, a, o in parts]
        if not frames:
            return pd.DataFrame({"cell": np.empty(0, np.int64), "time_ms": np.empty(0),
                                 "h_ms": np.empty(0), "accepted": np.empty(0, bool),
                                 "order": np.empty(0, np.int64)})
        df = pd.concat(frames, ignore_index=True)
        return df.sort_values(["cell", "time_ms"], kind="stable").reset_index(drop=True)

    def _trace_buffers(self, n_rows):
        cap = self._tr_cap if n_rows else 1
        rows = max(n_rows, 1)
        return (np.empty((rows, cap)), np.empty((rows, cap)), np.zeros((rows, cap), dtype=np.bool_),
                np.zeros((rows, cap), dtype=np.int64), np.zeros(rows, dtype=np.int64))

    def _kernel_args(self):
        return (self.min_step_ms, self.max_step_ms, self.max_steps, self.order, self.expo)

    def _ensure_extra(self, state, t0):
        raise NotImplementedError


class LocalAdaptiveKernel(_AdaptiveKernel):
    """Local adaptive strategy: each cell its own step size and history.

    Parameters
    ----------
    network : Network
    stepper : {"bs32", "dp54", "rodas3", "bdf"}
    rtol : float
        Relative tolerance (states with a physical zero only).
    atol : float
        Absolute tolerance in units of each state's scale.
    scale : dict, optional
        Model name -> per-state scales; default: each model's own scales.
    record_steps : sequence of int, optional
        Cells whose steps (time, size, accepted) are kept; see :meth:`step_trace`.
    auto_scale : bool
        Measure the scales with :func:`pilot_scales` (exclusive with ``scale``).
    min_step_ms, max_steps, max_step_ms
        Limits: a step below ``min_step_ms`` or more than ``max_steps`` steps in
        one cell end the run as diverged, naming the cell and time.

    Attributes
    ----------
    scale_used : dict
        Model name -> list of per-state scales used (stored in run.json).
    scale_table : ndarray, shape (n_models, max_states)
    """

    strategy = "local-adaptive"

    def _trace_rows(self):
        return len(self.record_cells)

    def _ensure_extra(self, state, t0):
        n = self.network.n_cells
        width = self.network.y0.shape[1]
        # created lazily; if the first window is rerun, start it afresh
        if "h" not in state.extra or self._extra_made_at == t0:
            state.extra["h"] = np.zeros(n)
            state.extra["err_prev"] = np.full(n, 1e-4)
            bdf = self.stepper_name == "bdf"
            state.extra["bdf_D"] = np.zeros((n, D_ROWS, width) if bdf else (n, 0, 0))
            state.extra["bdf_J"] = np.zeros((n, width, width) if bdf else (n, 0, 0))
            state.extra["bdf"] = np.zeros((n, N_BDF))   # order 0: no history yet
            self._extra_made_at = t0

    def _run(self, state, t0, t1, arrivals, spikes, counters, tr):
        n = self.network.n_cells
        slot = np.full(n, -1, dtype=np.int64)
        for k, c in enumerate(self.record_cells):
            slot[c] = k
        args = (self.stepper, state.code, state.y, state.p, state.refractory_until,
                state.div_time, state.div_code, state.extra["h"], state.extra["err_prev"],
                state.lower, state.upper, self._scale, self._pzero, state.n_states,
                float(t0), float(t1), self.rtol, self.atol,
                arrivals.ptr, arrivals.time_ms, arrivals.receptor, arrivals.weight,
                spikes.count, spikes.time_ms, counters, self.rstate,
                state.extra["bdf_D"], state.extra["bdf_J"], state.extra["bdf"],
                slot, tr[0], tr[1], tr[2], tr[3], tr[4], *self._kernel_args())
        if n >= PARALLEL_MIN_CELLS and numba.get_num_threads() > 1:
            local_window_parallel(max(1, min(n, 8 * numba.get_num_threads())), *args)
        else:
            local_chunk(0, n, *args)

    def _trace_rows_of(self, tr):
        return [(c, tr[0][k, :int(tr[4][k])].copy(), tr[1][k, :int(tr[4][k])].copy(),
                 tr[2][k, :int(tr[4][k])].copy(), tr[3][k, :int(tr[4][k])].copy())
                for k, c in enumerate(self.record_cells)]


class GlobalAdaptiveKernel(_AdaptiveKernel):
    """Global adaptive strategy: one step size for the whole network.

    Parameters and attributes as :class:`LocalAdaptiveKernel`; ``max_steps``
    counts the network's steps. With ``bdf`` the network is one BDF system
    (one step and one order; every event restarts every cell). ``record_steps`` lists cells as well: each
    gets the network's steps in :meth:`step_trace` (they are the same for all).
    """

    strategy = "global-adaptive"

    def __init__(self, network, stepper, rtol, atol, scale=None, record_steps=None, **kw):
        super().__init__(network, stepper, rtol, atol, scale=scale, record_steps=record_steps, **kw)
        n = network.n_cells
        width = network.y0.shape[1]
        self._KK = np.empty((n, N_ROWS, width))
        self._MM = np.empty((n, width, width))
        self._JJ = np.empty((n, width, width))
        self._PIV = np.empty((n, width), dtype=np.int64)
        self._WORK = np.empty((n, 2, width))
        self._LUC = np.empty(n)

    def _trace_rows(self):
        return 1 if self.record_cells else 0

    def _ensure_extra(self, state, t0):
        if "global" not in state.extra or self._extra_made_at == t0:
            # [proposed step (0: estimate), PI memory, network steps taken]
            state.extra["global"] = np.array([0.0, 1e-4, 0.0])
            n = self.network.n_cells
            width = self.network.y0.shape[1]
            bdf = self.stepper_name == "bdf"
            state.extra["bdf_D"] = np.zeros((n, D_ROWS, width) if bdf else (n, 0, 0))
            state.extra["bdf_J"] = np.zeros((n, width, width) if bdf else (n, 0, 0))
            state.extra["bdf"] = np.zeros((n, N_BDF))   # order 0: no history yet
            self._extra_made_at = t0

    def _run(self, state, t0, t1, arrivals, spikes, counters, tr):
        global_window(self.stepper, state.code, state.y, state.p, state.refractory_until,
                      state.div_time, state.div_code, state.extra["global"], state.lower,
                      state.upper, self._scale, self._pzero, state.n_states, float(t0), float(t1),
                      self.rtol, self.atol, arrivals.ptr, arrivals.time_ms, arrivals.receptor,
                      arrivals.weight, spikes.count, spikes.time_ms, counters, self.rstate,
                      self._KK, self._MM,
                      state.extra["bdf_J"] if self.stepper_name == "bdf" else self._JJ,
                      self._PIV, self._WORK, state.extra["bdf_D"], state.extra["bdf"], self._LUC,
                      bool(self.record_cells), tr[0], tr[1], tr[2], tr[3], tr[4],
                      *self._kernel_args())

    def _trace_rows_of(self, tr):
        m = int(tr[4][0])
        return [(c, tr[0][0, :m].copy(), tr[1][0, :m].copy(), tr[2][0, :m].copy(),
                 tr[3][0, :m].copy()) for c in self.record_cells]
