"""Open-loop replay: a given raster as the network's recurrent input.

In an open-loop run every synapse delivers the spikes of a given raster (with
its own delay, weight and receptor) instead of the network's own spikes. Drive
is as usual, and a cell's own spikes still reset it, start its refractory
period and are recorded as the run's spikes; they only no longer reach other
cells. Replaying a reference's raster in this way measures the integration
error of a setting per cell over the whole run, past the time at which a
chaotic network's own rasters part (a lower bound on closed-loop error: it
leaves out what a cell inherits from its inputs).

Replay enters the loops where a window's own spikes would be turned into
arrivals, and nowhere else: the window plan, the arrival order and the
arithmetic of delivery are those of a closed-loop run, so replaying a
setting's own raster with the same setting reproduces that raster bit for bit.

* The window loop (:func:`spikegauge.integrate.engine.run_windows`) pushes, at
  the end of each window, the raster's spikes at or before the window's end
  not yet pushed (:meth:`ReplayRaster.feed`), in the order it would push its
  own: cell order, time order within a cell.
* The block loop of fixed step with grid delivery
  (:mod:`spikegauge.integrate.fixed_block`) scatters, at the start of each
  window, the raster's spikes emitted in earlier steps not yet scattered, in
  its own (step, cell, time) order (:meth:`ReplayRaster.by_step`).

Only the arrivals of one window's worth of spikes are queued at a time, as in
a closed-loop run; the raster itself is held once, as two arrays.
"""
from __future__ import annotations

import hashlib

import numpy as np

from ..errors import InputError


def raster_digest(cell: np.ndarray, time_ms: np.ndarray) -> str:
    """SHA-256 (hex) of a raster's spikes.

    The spikes are taken in (time, cell) order, the order of a run's spike
    table, so the digest of a run's ``spikes`` equals the digest of the same
    spikes replayed: int64 little-endian cell ids, then float64 little-endian
    times (ms).
    """
    cell = np.asarray(cell, dtype=np.int64)
    time_ms = np.asarray(time_ms, dtype=np.float64)
    order = np.lexsort((cell, time_ms))
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(cell[order], dtype="<i8").tobytes())
    h.update(np.ascontiguousarray(time_ms[order], dtype="<f8").tobytes())
    return h.hexdigest()


def emission_steps(time_ms: np.ndarray, dt_ms: float) -> np.ndarray:
    """Index ``n`` of the fixed step ``(n dt, (n+1) dt]`` in which each spike was emitted.

    Grid points are ``n * dt`` computed as the block loop computes them (never a
    running sum), so a spike that a closed-loop run put at the end of step ``n``
    (``(n+1) * dt`` exactly) gets ``n`` back.

    Parameters
    ----------
    time_ms : ndarray of float64, shape (n_spikes,)
    dt_ms : float

    Returns
    -------
    ndarray of int64, shape (n_spikes,)
    """
    t = np.asarray(time_ms, dtype=np.float64)
    k = np.ceil(t / dt_ms).astype(np.int64)
    # The quotient may round across a grid point: settle on (k-1) dt < t <= k dt.
    k = np.where(k * dt_ms < t, k + 1, k)
    k = np.where((k - 1) * dt_ms >= t, k - 1, k)
    return k - 1


class ReplayRaster:
    """The spikes an open-loop run replays, sorted by (time, cell).

    Parameters
    ----------
    cell : array_like of int, shape (n_spikes,)
        Cell ids, ``0 <= cell < n_cells``.
    time_ms : array_like of float, shape (n_spikes,)
        Spike times (ms), finite.
    n_cells : int
        Cells of the network that replays them.
    source : str
        Where the spikes came from, for messages and the run's record.

    Raises
    ------
    InputError
        Cell ids outside the network, non-finite times, arrays of unequal length.
    """

    def __init__(self, cell, time_ms, n_cells: int, source: str = "<memory>"):
        cell = np.asarray(cell)
        time_ms = np.asarray(time_ms, dtype=np.float64)
        if cell.ndim != 1 or cell.shape != time_ms.shape:
            raise InputError(f"{source}: cell and time arrays must be 1-D and of equal length, "
                             f"got shapes {cell.shape} and {time_ms.shape}")
        cell = cell.astype(np.int64)
        bad = (cell < 0) | (cell >= n_cells)
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"{source}: entry {i}: cell id {cell[i]} is not a cell of the network "
                             f"(ids 0..{n_cells - 1})")
        bad = ~np.isfinite(time_ms)
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"{source}: entry {i}: spike time {time_ms[i]} is not finite")
        order = np.lexsort((cell, time_ms))
        self.cell = np.ascontiguousarray(cell[order])
        self.time_ms = np.ascontiguousarray(time_ms[order])
        self.source = str(source)

    @property
    def n_spikes(self) -> int:
        return int(self.time_ms.size)

    @property
    def digest(self) -> str:
        """:func:`raster_digest` of the replayed spikes."""
        return raster_digest(self.cell, self.time_ms)

    def feed(self) -> "ReplayFeed":
        """A cursor handing the spikes out window by window (the window loop)."""
        return ReplayFeed(self)

    def by_step(self, dt_ms: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(step, cell, time) of every spike, sorted by (step, cell, time) (the block loop).

        ``step`` is the fixed step of emission (:func:`emission_steps`).
        """
        step = emission_steps(self.time_ms, dt_ms)
        order = np.lexsort((self.time_ms, self.cell, step))
        return (np.ascontiguousarray(step[order]), np.ascontiguousarray(self.cell[order]),
                np.ascontiguousarray(self.time_ms[order]))


class ReplayFeed:
    """Spikes of a :class:`ReplayRaster` not yet handed out."""

    def __init__(self, raster: ReplayRaster):
        self._raster = raster
        self._at = 0

    def take(self, t1: float) -> tuple[np.ndarray, np.ndarray]:
        """Spikes at or before ``t1`` (ms) not handed out yet: (cell, time) in cell order,
        time order within a cell."""
        r = self._raster
        hi = int(np.searchsorted(r.time_ms, t1, side="right"))
        cell, time = r.cell[self._at:hi], r.time_ms[self._at:hi]
        self._at = max(self._at, hi)
        order = np.lexsort((time, cell))
        return cell[order], time[order]
