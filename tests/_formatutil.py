"""Spike files of the open formats written by the reference libraries themselves, for the format tests.

SONATA files are written with h5py following the SONATA data format's "Spike
file" section (``/spikes/<population>/node_ids`` uint64, ``timestamps``
double with a ``units`` attribute, ``sorting`` enum on the population group,
root ``magic`` and ``version`` attributes); NWB files with pynwb (units table);
Neo trains with neo. None of them goes through spikegauge's writers.
"""
from __future__ import annotations

from datetime import datetime, timezone

import h5py
import numpy as np

N_CELLS = 12
T_STOP_MS = 2000.0
GROUPS = {"exc": (0, 9), "inh": (9, 12)}   # cell ranges [first, end)


def rasters(seed: int = 0):
    """Reference and test rasters (cell, time in s) on a grid of 1/1024 s.

    Times k/1024 s are exact in binary, and so are their values in ms
    (125 k / 128), so seconds -> ms conversions are exact and every format
    holds the same numbers as the CSV file.
    """
    rng = np.random.default_rng(seed)
    n = 300
    cell = rng.integers(0, N_CELLS - 1, n)          # the last cell stays silent
    k = rng.integers(0, 2 * 1024, n)
    keep = rng.random(n) > 0.05
    shift = rng.integers(-3, 4, n)
    test_k = np.clip(k + shift, 0, 2 * 1024 - 1)
    add_cell, add_k = rng.integers(0, N_CELLS - 1, 10), rng.integers(0, 2 * 1024, 10)
    ref = (cell, k / 1024.0)
    test = (np.concatenate([cell[keep], add_cell]), np.concatenate([test_k[keep], add_k]) / 1024.0)
    return ref, test


def write_csv(path, cell, time_s):
    lines = ["cell,time_s"] + [f"{c},{t!r}" for c, t in zip(np.asarray(cell).tolist(), np.asarray(time_s).tolist())]
    path.write_text("\n".join(lines) + "\n")
    return path


def write_sonata(path, populations: dict, units: str = "ms", sorting: str | None = "by_time"):
    """populations: {name: (node_ids, times in s)}; times are written in ``units``."""
    factor = {"ms": 1000.0, "s": 1.0}[units]
    with h5py.File(path, "w") as f:
        f.attrs["magic"] = np.uint32(0x0A7A)
        f.attrs["version"] = np.array([0, 1], dtype=np.uint32)
        top = f.create_group("spikes")
        for name, (ids, t_s) in populations.items():
            ids, t = np.asarray(ids), np.asarray(t_s) * factor
            order = np.argsort(t, kind="stable") if sorting == "by_time" else \
                np.lexsort((t, ids)) if sorting == "by_id" else np.arange(ids.size)
            g = top.create_group(name)
            if sorting is not None:
                enum = h5py.enum_dtype({"none": 0, "by_id": 1, "by_time": 2}, basetype="u1")
                g.attrs.create("sorting", {"none": 0, "by_id": 1, "by_time": 2}[sorting], dtype=enum)
            g.create_dataset("node_ids", data=ids[order].astype(np.uint64))
            ts = g.create_dataset("timestamps", data=t[order].astype(np.float64))
            ts.attrs["units"] = units
    return path


def write_nwb(path, cell, time_s, order=None, id_column: str | None = None):
    """One unit per cell 0..N_CELLS-1 (in ``order``), spike times in s; optionally a cell-id column."""
    from pynwb import NWBHDF5IO, NWBFile

    nwb = NWBFile(session_description="formats test", identifier="formats-test",
                  session_start_time=datetime(2024, 1, 1, tzinfo=timezone.utc))
    if id_column:
        nwb.add_unit_column(name=id_column, description="cell id")
    cell, time_s = np.asarray(cell), np.asarray(time_s)
    for c in (range(N_CELLS) if order is None else order):
        kw = {id_column: int(c)} if id_column else {}
        nwb.add_unit(spike_times=np.sort(time_s[cell == c]).tolist(), **kw)
    with NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    return path


def neo_trains(cell, time_s, unit: str = "s"):
    import neo
    import quantities as pq

    factor = {"s": 1.0, "ms": 1000.0}[unit]
    cell, time_s = np.asarray(cell), np.asarray(time_s)
    return [neo.SpikeTrain(np.sort(time_s[cell == c]) * factor * pq.Quantity(1.0, unit),
                           t_start=0.0 * pq.s, t_stop=T_STOP_MS / 1000.0 * pq.s) for c in range(N_CELLS)]
