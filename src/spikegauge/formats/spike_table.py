"""The record every spike-format reader returns, and the checks all of them share."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..errors import InputError

TIME_UNIT_FACTORS = {"ms": 1.0, "msec": 1.0, "millisecond": 1.0, "milliseconds": 1.0,
                     "s": 1000.0, "sec": 1000.0, "second": 1000.0, "seconds": 1000.0}
"""Time units accepted in a file's ``units`` attribute (lower case) and their factor to ms."""


@dataclass
class SpikeTable:
    """Spikes read from a file of an open format, before they become a Raster.

    Attributes
    ----------
    cell : ndarray of int64, shape (n_spikes,)
        Cell id of each spike (>= 0).
    time_ms : ndarray of float64, shape (n_spikes,)
        Spike times (ms), finite and >= 0.
    source : str
        The file (or a description), for messages.
    place : callable (int -> str)
        Names where spike ``i`` sits in the file, e.g. ``/spikes/v1/node_ids[17]``.
    n_cells : int, optional
        Cell count when the file states one (NWB units tables, our own SONATA files).
    t_start_ms, t_stop_ms : float, optional
        Interval, when the file states one.
    group_names : tuple of str, optional
    group_first : ndarray of int64, shape (n_groups,), optional
        Group structure, when the file states one.
    """

    cell: np.ndarray
    time_ms: np.ndarray
    source: str
    place: Callable[[int], str]
    n_cells: int | None = None
    t_start_ms: float | None = None
    t_stop_ms: float | None = None
    group_names: tuple | None = None
    group_first: np.ndarray | None = None


def time_factor(unit: str | None, path, name: str) -> float:
    """Factor from the time unit ``unit`` to ms; None means ms. Unknown units are an InputError."""
    if unit is None:
        return 1.0
    factor = TIME_UNIT_FACTORS.get(unit.strip().lower())
    if factor is None:
        raise InputError(f"{path}: {name}: unknown time unit {unit!r} (expected ms or s)")
    return factor


def check_times(time_ms: np.ndarray, path, place: Callable[[int], str]) -> None:
    """Refuse NaN, infinite and negative spike times, naming the first one."""
    bad = ~np.isfinite(time_ms)
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"{path}: {place(i)}: spike time {time_ms[i]} is not finite")
    bad = time_ms < 0
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"{path}: {place(i)}: spike time {time_ms[i]} ms is negative")


def check_ids(ids: np.ndarray, path, place: Callable[[int], str], what: str = "node id") -> np.ndarray:
    """Integer ids >= 0 that fit in int64 (integer-valued floats are accepted); returns int64."""
    if ids.dtype.kind == "f":
        bad = ~np.isfinite(ids) | (ids != np.round(ids))
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"{path}: {place(i)}: {what} {ids[i]} is not an integer")
        too_big = np.abs(ids) >= 2.0 ** 63
    elif ids.dtype.kind == "u":
        too_big = ids > np.iinfo(np.int64).max
    elif ids.dtype.kind == "i":
        too_big = np.zeros(ids.shape, bool)
    else:
        raise InputError(f"{path}: {place(0)}: {what}s must be integers, got dtype {ids.dtype}")
    if too_big.any():
        i = int(np.argmax(too_big))
        raise InputError(f"{path}: {place(i)}: {what} {ids[i]} is too large")
    out = ids.astype(np.int64)
    bad = out < 0
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"{path}: {place(i)}: negative {what} {out[i]}")
    return out
