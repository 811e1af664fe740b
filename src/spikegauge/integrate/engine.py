"""The window loop every strategy shares.

All drivers advance in windows no longer than the smallest delay: once every
cell has reached ``t0``, every arrival before ``t0 + d_min`` is known, and inside
a window each cell is independent. This module owns what is common to all
strategies:

* :class:`CellState`: per-cell state, parameters, refractory end, divergence.
* :class:`ArrivalQueue`: spikes emitted so far, turned into arrivals by
  walking the CSR connectivity; handed out window by window.
* :func:`run_windows`: gathers each window's arrivals (network + drive), sorts
  them per cell in the fixed order (time, source, synapse), calls the
  strategy's window kernel, collects spikes in cell order and schedules them
  (open loop: schedules a replayed raster's spikes of the window instead, see
  :mod:`spikegauge.integrate.replay`).

A strategy supplies a *window kernel*: an object with

``boundaries(t_stop_ms) -> ndarray``
    window edges, first 0, last ``t_stop_ms``; none longer than ``d_min``.
``effective_time(time_ms) -> ndarray``
    the time at which an arrival acts (identity, or the next grid point).
``advance(state, t0, t1, arrivals, spikes, counters)``
    integrate every cell from ``t0`` to ``t1``.
``widens_spike_buffer`` (optional attribute, default False)
    True when ``advance`` replaces ``spikes.time_ms`` by a wider array itself
    whenever a cell emits more spikes than it has columns (so that the spike
    buffer never overflows); :func:`run_windows` then skips the per-window
    state snapshot it otherwise keeps to rerun an overflowed window.

Determinism: kernels write only to their own cell's rows; every reduction
here runs in cell order, so the thread count never changes a bit.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .._numba import jit
from ..errors import ComputationError
from ..models import state_bounds, state_scales
from ..network.drive import DriveStream

# Columns of the per-cell cost counters.
C_STEPS = 0          # accepted steps (fixed: every (sub)step)
C_RHS = 1            # right-hand-side evaluations
C_NEWTON = 2         # Newton iterations (implicit steppers)
C_ARRIVALS = 3       # arrivals applied (synaptic and current events)
C_REJECTED = 4       # rejected steps (adaptive)
C_JACOBIAN = 5       # Jacobian evaluations (implicit steppers)
N_COUNTERS = 6
COUNTER_NAMES = ("steps", "rhs_evals", "newton_iters", "arrivals", "rejected_steps", "jacobian_evals")

# Divergence codes (``CellState.div_code``).
DIV_NONE = 0
DIV_BOUNDS = 1       # non-finite state or a state outside its model's bounds
DIV_NEWTON = 2       # Newton iteration of an implicit stepper failed
DIV_MIN_STEP = 3     # adaptive step fell below the minimum step
DIV_MAX_STEPS = 4    # adaptive step count exceeded the maximum
DIV_MESSAGES = {
    DIV_BOUNDS: "a state turned non-finite or left its model's bounds",
    DIV_NEWTON: "the Newton iteration of the implicit stepper failed",
    DIV_MIN_STEP: "the step size fell below the minimum step",
    DIV_MAX_STEPS: "the maximum number of steps was exceeded",
}

EDGE_MERGE_MS = 1e-9
"""Window edges closer than this are one edge; arrivals this early still count as on time (ms)."""

MAX_WINDOW_MS = 100.0
"""Window length used when the network has no synapses (no delay bounds it)."""


@dataclass
class CellState:
    """Mutable per-cell integration state.

    Attributes
    ----------
    code : ndarray of int64, shape (n_cells,)
        Model code of each cell.
    y : ndarray of float64, shape (n_cells, max_states)
    p : ndarray of float64, shape (n_cells, max_params)
        Parameters; ``p[:, P_IEXT]`` changes with current-step drive.
    refractory_until : ndarray of float64, shape (n_cells,)
        Time (ms) at which the voltage clamp ends; -inf when not refractory.
    div_time : ndarray of float64, shape (n_cells,)
        Time (ms) at which the cell diverged; inf while it has not.
    div_code : ndarray of int64, shape (n_cells,)
    lower, upper, scale : ndarray of float64, shape (n_cells, max_states)
        Divergence bounds and typical magnitude of each state of each cell.
    n_states : ndarray of int64, shape (n_cells,)
    """

    code: np.ndarray
    y: np.ndarray
    p: np.ndarray
    refractory_until: np.ndarray
    div_time: np.ndarray
    div_code: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    scale: np.ndarray
    n_states: np.ndarray
    extra: dict = field(default_factory=dict)

    @classmethod
    def initial(cls, network, scale_override=None) -> "CellState":
        n = network.n_cells
        lower_t, upper_t = state_bounds()
        scale_t = state_scales() if scale_override is None else scale_override
        code = np.ascontiguousarray(network.cell_model, dtype=np.int64)
        y = np.array(network.y0, dtype=np.float64, order="C")
        y[np.isnan(y)] = 0.0  # padding past a model's own states
        return cls(
            code=code,
            y=y,
            p=np.array(network.params, dtype=np.float64, order="C"),
            refractory_until=np.full(n, -np.inf),
            div_time=np.full(n, np.inf),
            div_code=np.zeros(n, dtype=np.int64),
            lower=np.ascontiguousarray(lower_t[code]),
            upper=np.ascontiguousarray(upper_t[code]),
            scale=np.ascontiguousarray(scale_t[code]),
            n_states=np.ascontiguousarray(network.n_states, dtype=np.int64),
        )

    def snapshot(self):
        return (self.y.copy(), self.p.copy(), self.refractory_until.copy(),
                self.div_time.copy(), self.div_code.copy(),
                {k: v.copy() for k, v in self.extra.items()})

    def restore(self, snap):
        y, p, r, dt, dc, extra = snap
        self.y[:] = y
        self.p[:] = p
        self.refractory_until[:] = r
        self.div_time[:] = dt
        self.div_code[:] = dc
        for k, v in extra.items():
            self.extra[k][...] = v


@dataclass
class WindowArrivals:
    """Arrivals of one window, grouped per cell and sorted by (time, source, synapse).

    Arrivals of cell ``i`` are ``ptr[i]:ptr[i+1]``. ``time_ms`` is the effective
    time at which each acts (grid delivery: the grid point).
    """

    ptr: np.ndarray       # int64 (n_cells + 1,)
    time_ms: np.ndarray   # float64
    receptor: np.ndarray  # int64
    weight: np.ndarray    # float64


@dataclass
class SpikeBuffer:
    """Per-cell spike slots for one window; ``count[i] > capacity`` flags overflow."""

    count: np.ndarray     # int64 (n_cells,)
    time_ms: np.ndarray   # float64 (n_cells, capacity)

    @classmethod
    def empty(cls, n_cells: int, capacity: int) -> "SpikeBuffer":
        return cls(np.zeros(n_cells, dtype=np.int64), np.empty((n_cells, capacity)))

    @property
    def capacity(self) -> int:
        return self.time_ms.shape[1]

    def overflowed(self) -> bool:
        return bool(np.any(self.count > self.capacity))

    def collect(self) -> tuple[np.ndarray, np.ndarray]:
        """Spikes as (cell, time) arrays in cell order, time order within a cell."""
        counts = self.count
        cells = np.repeat(np.arange(counts.size, dtype=np.int64), counts)
        mask = np.arange(self.capacity)[None, :] < counts[:, None]
        return cells, self.time_ms[mask]


def expand_csr(sources: np.ndarray, ptr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Synapse indices of every spike's source, and the spike each belongs to.

    Returns ``(syn, owner)`` where ``syn`` lists ``ptr[s]:ptr[s+1]`` for each
    ``s`` in ``sources`` in order, and ``owner[k]`` is the position in
    ``sources`` of the spike that synapse ``syn[k]`` came from.
    """
    starts = ptr[sources]
    lengths = ptr[sources + 1] - starts
    total = int(lengths.sum())
    owner = np.repeat(np.arange(sources.size, dtype=np.int64), lengths)
    offsets = np.arange(total, dtype=np.int64) - np.repeat(np.cumsum(lengths) - lengths, lengths)
    return starts[owner] + offsets, owner


class ArrivalQueue:
    """Arrivals scheduled by emitted spikes, not yet handed to a window.

    One flat pool of pending arrivals (time, effective time, target, receptor,
    weight, source, synapse) in push order. :meth:`push` expands a window's
    spikes over the CSR connectivity straight into the pool (numba);
    :meth:`pop` moves out every arrival that acts before ``t1`` and compacts
    the rest, keeping push order. The pool holds about (max delay / window)
    windows of arrivals and grows by doubling.

    An earlier version kept one set of numpy arrays per window and filtered
    them with boolean masks on every pop; at a thousand windows a second that
    Python-level work cost as much as the integration itself.
    """

    def __init__(self, network, effective_time, capacity: int = 1024):
        self._net = network
        self._effective_time = effective_time
        self._n = 0
        self._pool = _empty_fields(capacity)

    def push(self, cells: np.ndarray, times: np.ndarray) -> None:
        net = self._net
        if cells.size == 0 or net.n_synapses == 0:
            return
        cells = np.ascontiguousarray(cells, dtype=np.int64)
        times = np.ascontiguousarray(times, dtype=np.float64)
        n_new = int((net.syn_ptr[cells + 1] - net.syn_ptr[cells]).sum())
        if n_new == 0:
            return
        need = self._n + n_new
        if need > self._pool["time"].size:
            grown = _empty_fields(max(need, 2 * self._pool["time"].size))
            for k in _FIELDS:
                grown[k][:self._n] = self._pool[k][:self._n]
            self._pool = grown
        p = self._pool
        _expand_spikes(cells, times, net.syn_ptr, net.syn_target, net.syn_delay_ms,
                       net.syn_weight, net.syn_receptor, self._n,
                       p["time"], p["cell"], p["receptor"], p["weight"], p["source"], p["syn"])
        p["eff"][self._n:need] = self._effective_time(p["time"][self._n:need])
        self._n = need

    def pop(self, t1: float) -> dict:
        """Every queued arrival whose effective time is before ``t1``, in push order."""
        p = self._pool
        taken = _empty_fields(0)
        if self._n == 0:
            return taken
        n_taken, self._n = _split_pool(self._n, float(t1), p["eff"], p["time"], p["cell"],
                                       p["receptor"], p["weight"], p["source"], p["syn"])
        # _split_pool moved the taken entries to the end of the used part, after the kept ones.
        lo = self._n
        return {k: p[k][lo:lo + n_taken].copy() for k in _FIELDS}

    def __len__(self) -> int:
        return self._n


_FIELDS = ("time", "eff", "cell", "receptor", "weight", "source", "syn")
_DTYPES = (np.float64, np.float64, np.int64, np.int64, np.float64, np.int64, np.int64)


def _empty_fields(n: int) -> dict:
    return {k: np.empty(n, dtype=d) for k, d in zip(_FIELDS, _DTYPES)}


@jit
def _expand_spikes(cells, times, ptr, target, delay, weight, receptor, at,
                   o_time, o_cell, o_rec, o_w, o_src, o_syn):
    """Write the arrivals of spikes (cells[k], times[k]) into the o_* arrays from ``at`` on.

    Order: spike by spike, each source's synapses in CSR order (what
    :func:`expand_csr` lists).
    """
    j = at
    for k in range(cells.size):
        c = cells[k]
        for s in range(ptr[c], ptr[c + 1]):
            o_time[j] = times[k] + delay[s]
            o_cell[j] = target[s]
            o_rec[j] = receptor[s]
            o_w[j] = weight[s]
            o_src[j] = c
            o_syn[j] = s
            j += 1


@jit
def _split_pool(n, t1, eff, time, cell, rec, w, src, syn):
    """Reorder pool[:n] into kept (eff >= t1) then taken (eff < t1), each in its old order.

    Returns (n_taken, n_kept).
    """
    n_taken = 0
    for j in range(n):
        if eff[j] < t1:
            n_taken += 1
    if n_taken == 0:
        return 0, n
    t_eff = np.empty(n_taken)
    t_time = np.empty(n_taken)
    t_cell = np.empty(n_taken, dtype=np.int64)
    t_rec = np.empty(n_taken, dtype=np.int64)
    t_w = np.empty(n_taken)
    t_src = np.empty(n_taken, dtype=np.int64)
    t_syn = np.empty(n_taken, dtype=np.int64)
    kept = 0
    m = 0
    for j in range(n):
        if eff[j] < t1:
            t_eff[m] = eff[j]
            t_time[m] = time[j]
            t_cell[m] = cell[j]
            t_rec[m] = rec[j]
            t_w[m] = w[j]
            t_src[m] = src[j]
            t_syn[m] = syn[j]
            m += 1
        else:
            eff[kept] = eff[j]
            time[kept] = time[j]
            cell[kept] = cell[j]
            rec[kept] = rec[j]
            w[kept] = w[j]
            src[kept] = src[j]
            syn[kept] = syn[j]
            kept += 1
    for m in range(n_taken):
        eff[kept + m] = t_eff[m]
        time[kept + m] = t_time[m]
        cell[kept + m] = t_cell[m]
        rec[kept + m] = t_rec[m]
        w[kept + m] = t_w[m]
        src[kept + m] = t_src[m]
        syn[kept + m] = t_syn[m]
    return n_taken, kept


def _concat(chunks: list[dict]) -> dict:
    if not chunks:
        return _empty_fields(0)
    if len(chunks) == 1:
        return chunks[0]
    return {k: np.concatenate([c[k] for c in chunks]) for k in _FIELDS}


class DriveFeed:
    """Drive events by effective time: events that act after a window are carried over."""

    def __init__(self, network, effective_time):
        self._stream = DriveStream(network)
        self._effective_time = effective_time
        self._carry = _concat([])
        # A network without drive skips the stream's per-window work entirely.
        self._none = not network.poisson and network.events.time_ms.size == 0

    def take(self, t0: float, t1: float) -> dict:
        if self._none:
            return self._carry
        time, cell, receptor, weight, source = self._stream.take(t0, t1)
        new = dict(time=time, eff=self._effective_time(time), cell=cell, receptor=receptor,
                   weight=weight, source=source,
                   syn=np.zeros(time.size, dtype=np.int64))
        merged = _concat([self._carry, new])
        m = merged["eff"] < t1
        self._carry = {k: v[~m] for k, v in merged.items()}
        return {k: v[m] for k, v in merged.items()}


@jit
def _arrival_order(cell, time, source, syn, n_cells):
    """Permutation sorting arrivals by (cell, time, source, synapse), stable; and the cell pointer.

    A counting sort by cell, then an insertion sort inside each cell: a cell
    gets a handful of arrivals per window, already nearly in order.
    """
    n = cell.size
    ptr = np.zeros(n_cells + 1, dtype=np.int64)
    for j in range(n):
        ptr[cell[j] + 1] += 1
    for c in range(n_cells):
        ptr[c + 1] += ptr[c]
    pos = ptr[:-1].copy()
    order = np.empty(n, dtype=np.int64)
    for j in range(n):
        order[pos[cell[j]]] = j
        pos[cell[j]] += 1
    for c in range(n_cells):
        for a in range(ptr[c] + 1, ptr[c + 1]):
            x = order[a]
            b = a - 1
            while b >= ptr[c]:
                y = order[b]
                if time[y] > time[x] or (time[y] == time[x] and (
                        source[y] > source[x] or (source[y] == source[x] and syn[y] > syn[x]))):
                    order[b + 1] = y
                    b -= 1
                else:
                    break
            order[b + 1] = x
    return order, ptr


def window_arrivals(n_cells: int, parts: list[dict]) -> WindowArrivals:
    """Merge arrival sets and sort them per cell by (time, source, synapse)."""
    a = _concat([p for p in parts if p["time"].size])
    order, ptr = _arrival_order(np.ascontiguousarray(a["cell"], dtype=np.int64),
                                np.ascontiguousarray(a["time"], dtype=np.float64),
                                np.ascontiguousarray(a["source"], dtype=np.int64),
                                np.ascontiguousarray(a["syn"], dtype=np.int64), n_cells)
    return WindowArrivals(
        ptr=ptr,
        time_ms=a["eff"][order],
        receptor=a["receptor"][order],
        weight=a["weight"][order],
    )


@dataclass
class WindowLoopResult:
    """What :func:`run_windows` returns to ``simulate``."""

    cell: np.ndarray
    time_ms: np.ndarray
    counters: dict
    status: str
    t_reached_ms: float
    message: str = ""
    wall_s: float = 0.0


def divergence(state: CellState, times: np.ndarray) -> tuple[np.ndarray, float, str]:
    """The earliest divergence: (mask of the spike ``times`` up to it, its time, the message).

    The cell named is the first in cell order among those that diverged earliest.
    """
    i = int(np.argmin(state.div_time))
    t_div = float(state.div_time[i])
    message = (f"diverged at t = {t_div:.6g} ms (cell {i}: "
               f"{DIV_MESSAGES.get(int(state.div_code[i]), 'unknown')})")
    return times <= t_div, t_div, message


def past_work_limit(counters: np.ndarray, work_limit) -> bool:
    """Whether the work so far (rhs evaluations, Newton iterations and Jacobian evaluations)
    exceeds ``work_limit``."""
    if work_limit is None:
        return False
    return (int(counters[:, C_RHS].sum()) + int(counters[:, C_NEWTON].sum())
            + int(counters[:, C_JACOBIAN].sum()) > work_limit)


def work_limit_message(t_ms: float, work_limit: float) -> str:
    return (f"stopped at t = {t_ms:.6g} ms: the work passed the limit of {work_limit:.4g} "
            f"(rhs evaluations + Newton iterations + Jacobian evaluations)")


def default_boundaries(d_min_ms: float, t_stop_ms: float) -> np.ndarray:
    """Window edges of length ``min(d_min, MAX_WINDOW_MS)``, ending exactly at ``t_stop_ms``."""
    w = min(d_min_ms, MAX_WINDOW_MS, t_stop_ms)
    n = max(1, math.ceil(t_stop_ms / w - 1e-12))
    edges = np.arange(n + 1, dtype=np.float64) * w
    edges[-1] = t_stop_ms
    return edges


def run_windows(network, kernel, t_stop_ms: float, state: CellState | None = None,
                progress=None, spike_capacity: int = 8, on_window=None,
                extra_edges=None, work_limit=None, replay=None) -> WindowLoopResult:
    """Integrate ``network`` from 0 to ``t_stop_ms`` with a strategy's window kernel.

    Parameters
    ----------
    network : Network
    kernel : window kernel (see module docstring)
    t_stop_ms : float
    state : CellState, optional
        Start state (default: the network's initial state).
    progress : callable(t_ms) or None
        Called after each window with the time reached.
    spike_capacity : int
        Initial spike slots per cell and window; doubled (and the window rerun) on overflow.
    on_window : callable(t0, t1, state) or None
        Called after each window (used for trace recording).
    extra_edges : ndarray or None
        Further window edges (sampling times); windows only get shorter.
    work_limit : float or None
        Stop at the end of the first window after which the work (right-hand-side
        evaluations plus Newton iterations) exceeds this; status ``"stopped"``.
    replay : ReplayRaster or None
        Open loop (:mod:`spikegauge.integrate.replay`): after each window the
        raster's spikes up to its end become the arrivals, not the window's
        own spikes (which are still recorded).

    Returns
    -------
    WindowLoopResult
        Spikes in window order, cell order within a window; summed counters;
        status ``"ok"``, ``"diverged"`` or ``"stopped"``.
    """
    import time as _time

    n = network.n_cells
    state = CellState.initial(network) if state is None else state
    edges = kernel.boundaries(t_stop_ms)
    if extra_edges is not None:
        extra = np.asarray(extra_edges, dtype=np.float64)
        edges = np.unique(np.concatenate([edges, extra[(extra > 0) & (extra < edges[-1])]]))
        # Edges a rounding step apart would make empty windows (and duplicate samples).
        edges = edges[np.concatenate([[True], np.diff(edges) > EDGE_MERGE_MS])]
    queue = ArrivalQueue(network, kernel.effective_time)
    drive = DriveFeed(network, kernel.effective_time)
    feed = replay.feed() if replay is not None else None
    counters = np.zeros((n, N_COUNTERS), dtype=np.int64)
    out_cells, out_times = [], []
    status, message, t_reached = "ok", "", float(edges[-1])
    wall = 0.0
    cap = spike_capacity
    # A kernel that widens the spike buffer itself never needs the window rerun,
    # so the per-window copy of the whole state is skipped.
    self_widening = getattr(kernel, "widens_spike_buffer", False)
    for k in range(edges.size - 1):
        t0, t1 = float(edges[k]), float(edges[k + 1])
        from_network = queue.pop(t1)
        if from_network["eff"].size and from_network["eff"].min() < t0 - EDGE_MERGE_MS:
            # Windows longer than the smallest delay would apply such an arrival late.
            raise ComputationError(
                f"an arrival due at {from_network['eff'].min():.12g} ms reached the window starting "
                f"at {t0:.12g} ms: the strategy's windows are longer than the smallest delay")
        arrivals = window_arrivals(n, [from_network, drive.take(t0, t1)])
        if not self_widening:
            snap = state.snapshot()
            counters_before = counters.copy()
        while True:
            spikes = SpikeBuffer.empty(n, cap)
            tic = _time.perf_counter()
            kernel.advance(state, t0, t1, arrivals, spikes, counters)
            wall += _time.perf_counter() - tic
            cap = max(cap, spikes.capacity)  # a self-widening kernel may have widened it
            if not spikes.overflowed():
                break
            cap = max(2 * cap, int(spikes.count.max()) + 1)
            state.restore(snap)
            counters[:] = counters_before
        cells, times = spikes.collect()
        if np.isfinite(state.div_time).any():
            keep, t_reached, message = divergence(state, times)
            out_cells.append(cells[keep])
            out_times.append(times[keep])
            status = "diverged"
            break
        out_cells.append(cells)
        out_times.append(times)
        if feed is None:
            queue.push(cells, times)
        else:
            # Open loop: the replayed raster's spikes of this window take the place of the
            # window's own, pushed in the same (cell, time) order.
            queue.push(*feed.take(t1))
        if on_window is not None:
            on_window(t0, t1, state)
        if progress is not None:
            progress(t1)
        if past_work_limit(counters, work_limit) and t1 < edges[-1]:
            status, t_reached = "stopped", t1
            message = work_limit_message(t1, work_limit)
            break
    cell = np.concatenate(out_cells) if out_cells else np.empty(0, dtype=np.int64)
    time = np.concatenate(out_times) if out_times else np.empty(0)
    totals = counters.sum(axis=0)
    return WindowLoopResult(
        cell=cell, time_ms=time,
        counters={name: int(v) for name, v in zip(COUNTER_NAMES, totals)},
        status=status, t_reached_ms=t_reached, message=message, wall_s=wall,
    )
