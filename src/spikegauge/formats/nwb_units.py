"""NWB files: spike rasters from the units table (one unit = one cell), read with pynwb.

An NWB 2 file keeps sorted spikes in its units table (``/units``): a ragged
column ``spike_times`` (seconds, relative to the session's reference time) with
one row per unit. Unit ``k`` of the table becomes cell ``k`` (table order), or
the cell named by an integer column of the table (``id`` is the table's own
row ids). Times are converted to ms. pynwb is an optional dependency (the
``formats`` extra).
"""
from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np

from ..errors import InputError
from ._hdf5 import one_line, open_hdf5
from .spike_table import SpikeTable, check_ids, check_times

INSTALL_HINT = "pip install 'spikegauge[formats]'"


def is_nwb(f) -> bool:
    """True if the open HDF5 file ``f`` says it is an NWB file (root ``nwb_version`` or type ``NWBFile``)."""
    attrs = f.attrs
    kind = attrs.get("neurodata_type")
    kind = kind.decode() if isinstance(kind, bytes) else kind
    return "nwb_version" in attrs or kind == "NWBFile"


def read_nwb_units(path, id_column: str | None = None) -> SpikeTable:
    """Read the units table of an NWB file.

    Parameters
    ----------
    path : str or Path
        The NWB (HDF5) file.
    id_column : str, optional
        None: unit ``k`` (table order) is cell ``k`` and the raster has as many
        cells as the table has units. Otherwise an integer column of the table
        (``"id"`` for the table's row ids) gives each unit's cell id; ids must
        be distinct and non-negative.

    Returns
    -------
    SpikeTable
        Times in ms (the file's seconds times 1000).

    Raises
    ------
    InputError
        pynwb missing, no units table, no ``spike_times`` column, an unknown or
        non-integer id column, repeated ids, NaN or negative times, or a file
        pynwb cannot read; the message names the file and the dataset.
    """
    path = Path(path)
    with open_hdf5(path) as f:
        if "units" not in f:
            raise InputError(f"{path}: /units: this NWB file has no units table (no sorted spikes to read)")
    try:
        from pynwb import NWBHDF5IO
    except ImportError:
        raise InputError(f"{path}: reading NWB files needs pynwb; install it with {INSTALL_HINT}") from None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with NWBHDF5IO(str(path), "r", load_namespaces=True) as io:
                units = io.read().units
                if units is None:
                    raise InputError(f"{path}: /units: this NWB file has no units table")
                if "spike_times" not in units.colnames:
                    raise InputError(f"{path}: /units/spike_times: column missing from the units table")
                ends = np.asarray(units["spike_times"].data[:])
                flat = np.asarray(units["spike_times"].target.data[:])
                labels = None
                if id_column is not None:
                    if id_column == "id":
                        labels = np.asarray(units.id.data[:])
                    elif id_column in units.colnames:
                        labels = np.asarray(units[id_column].data[:])
                    else:
                        raise InputError(f"{path}: /units/{id_column}: no such column; the units table has "
                                         f"id, {', '.join(units.colnames)}")
    except InputError:
        raise
    except Exception as exc:  # pynwb/hdmf raise many types on files they cannot map to the schema
        raise InputError(f"{path}: /units: cannot read the units table ({one_line(exc)})") from None
    return _table(path, ends, flat, labels, id_column)


def _table(path: Path, ends: np.ndarray, flat: np.ndarray, labels, id_column) -> SpikeTable:
    """Turn the ragged spike_times column into (cell, time_ms), validated."""
    name = "/units/spike_times"
    if ends.ndim != 1 or flat.ndim != 1 or ends.dtype.kind not in "iu" or flat.dtype.kind not in "iuf":
        raise InputError(f"{path}: {name}: expected a ragged column of numbers (spike_times_index, spike_times)")
    ends = ends.astype(np.int64)
    if ends.size and (ends[0] < 0 or np.any(np.diff(ends) < 0) or ends[-1] != flat.size):
        raise InputError(f"{path}: /units/spike_times_index: must rise from 0 to the {flat.size} entries "
                         f"of spike_times, got {ends[:1].tolist()}..{ends[-1:].tolist()}")
    if not ends.size and flat.size:
        raise InputError(f"{path}: /units/spike_times_index: empty, but spike_times has {flat.size} entries")
    counts = np.diff(np.concatenate([[0], ends]))

    def place(i: int) -> str:
        return f"{name}[{i}] (unit {int(np.searchsorted(ends, i, side='right'))})"

    time_ms = flat.astype(np.float64) * 1000.0
    check_times(time_ms, path, place)
    n_cells = None
    if labels is None:
        ids = np.arange(ends.size, dtype=np.int64)
        n_cells = int(ends.size)
    else:
        col = f"/units/{id_column}"
        if labels.ndim != 1 or labels.size != ends.size:
            raise InputError(f"{path}: {col}: expected one id per unit ({ends.size}), got shape {labels.shape}")
        ids = check_ids(labels, path, lambda i: f"{col}[{i}]", what="cell id")
        uniq, first, counts_id = np.unique(ids, return_index=True, return_counts=True)
        if np.any(counts_id > 1):
            dup = uniq[np.argmax(counts_id > 1)]
            rows = np.flatnonzero(ids == dup)[:2].tolist()
            raise InputError(f"{path}: {col}: units {rows[0]} and {rows[1]} both have id {dup}; "
                             "one unit must be one cell")
    cell = np.repeat(ids, counts)
    return SpikeTable(cell=cell, time_ms=time_ms, source=str(path), place=place, n_cells=n_cells)
