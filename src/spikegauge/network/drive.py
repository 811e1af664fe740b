"""External drive events, window by window.

Poisson trains are generated in fixed blocks of :data:`DRIVE_BLOCK_MS`: block
``b`` of drive ``d`` covers [b·B, (b+1)·B) and draws from its own Philox
stream keyed by ``SeedSequence(seed, spawn_key=(STREAM_POISSON, d, b))``. The
events of a block therefore depend only on the scenario seed, the drive and
the block, never on the windows a driver asks for, and a run holds at most
the blocks that overlap its current window. Within a block each cell gets a
Poisson number of events with mean rate·B, placed uniformly: conditioned on
its count, a Poisson process's event times are i.i.d. uniform, so this is
exactly a Poisson process of the given rate.
"""
from __future__ import annotations

import math

import numpy as np

from ..scenario import DRIVE_BLOCK_MS
from .arrays import Network, PoissonDrive
from .build import STREAM_POISSON


def poisson_block(seed: int, drive: PoissonDrive, block: int) -> tuple[np.ndarray, np.ndarray]:
    """Events of one Poisson drive in one block, before clipping to its active interval.

    Parameters
    ----------
    seed : int
        Scenario seed.
    drive : PoissonDrive
    block : int
        Block index; the block covers [block·B, (block+1)·B) ms.

    Returns
    -------
    time_ms : ndarray of float64, shape (n,)
    cell : ndarray of int64, shape (n,)
        Sorted by (cell, time).
    """
    lo, hi = block * DRIVE_BLOCK_MS, (block + 1) * DRIVE_BLOCK_MS
    bitgen = np.random.Philox(np.random.SeedSequence(seed, spawn_key=(STREAM_POISSON, drive.drive_id, block)))
    rng = np.random.Generator(bitgen)
    counts = rng.poisson(drive.rate_hz * (DRIVE_BLOCK_MS / 1000.0))
    cell = np.repeat(drive.cells, counts)
    # lo + B*u can round up to hi; keep every event inside its own block so
    # that block membership, and with it the window split, is exact.
    time = np.minimum(lo + DRIVE_BLOCK_MS * rng.random(cell.size), np.nextafter(hi, -math.inf))
    order = np.lexsort((time, cell))
    return time[order], cell[order]


class DriveStream:
    """All drive events of a network, taken in consecutive windows.

    Parameters
    ----------
    network : Network

    Notes
    -----
    Windows must be asked for in order and without gaps: the first call may
    start anywhere, every later ``t0_ms`` equals the previous ``t1_ms``. A new
    run makes a new stream.
    """

    def __init__(self, network: Network):
        self.network = network
        self._next_t0 = None
        self._blocks: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]] = {}

    def take(self, t0_ms: float, t1_ms: float):
        """Drive events with ``t0_ms <= time < t1_ms``.

        Returns
        -------
        time_ms : ndarray of float64, shape (n,)
        cell : ndarray of int64, shape (n,)
        receptor : ndarray of int64, shape (n,)
        weight : ndarray of float64, shape (n,)
        source : ndarray of int64, shape (n,)
            ``-(1 + drive index)``.

        Sorted by (cell, time, source).
        """
        if not t1_ms >= t0_ms:
            raise ValueError(f"window end {t1_ms} before its start {t0_ms}")
        if self._next_t0 is not None and t0_ms != self._next_t0:
            raise ValueError(f"windows must be contiguous: expected t0 = {self._next_t0}, got {t0_ms}")
        self._next_t0 = t1_ms
        parts = [self._poisson(d, t0_ms, t1_ms) for d in self.network.poisson]
        parts.append(self._explicit(t0_ms, t1_ms))
        time, cell, receptor, weight, source = (np.concatenate(x) for x in zip(*parts))
        order = np.lexsort((source, time, cell))
        return time[order], cell[order], receptor[order], weight[order], source[order]

    def _poisson(self, d: PoissonDrive, t0: float, t1: float):
        lo_t, hi_t = max(t0, d.start_ms), min(t1, d.stop_ms)
        times, cells = [], []
        if lo_t < hi_t:
            # One block before the nominal first guards against rounding in the division.
            b = max(0, math.floor(lo_t / DRIVE_BLOCK_MS) - 1)
            while b * DRIVE_BLOCK_MS < hi_t:
                if (b + 1) * DRIVE_BLOCK_MS > lo_t:
                    key = (d.drive_id, b)
                    if key not in self._blocks:
                        self._blocks[key] = poisson_block(self.network.seed, d, b)
                    t, c = self._blocks[key]
                    keep = (t >= lo_t) & (t < hi_t)
                    times.append(t[keep])
                    cells.append(c[keep])
                b += 1
        # Blocks ending at or before t1 cannot overlap a later window.
        for key in [k for k in self._blocks if k[0] == d.drive_id and (k[1] + 1) * DRIVE_BLOCK_MS <= t1]:
            del self._blocks[key]
        time = np.concatenate(times) if times else np.empty(0)
        cell = np.concatenate(cells) if cells else np.empty(0, np.int64)
        n = time.size
        return (time, cell, np.full(n, d.receptor, dtype=np.int64), np.full(n, d.weight),
                np.full(n, -(1 + d.drive_id), dtype=np.int64))

    def _explicit(self, t0: float, t1: float):
        # Explicit events are sorted by time; the builder records the drive
        # each comes from (EventList.source).
        ev = self.network.events
        i0, i1 = np.searchsorted(ev.time_ms, [t0, t1], side="left")
        return (ev.time_ms[i0:i1], ev.cell[i0:i1], ev.receptor[i0:i1], ev.weight[i0:i1], ev.source[i0:i1])
