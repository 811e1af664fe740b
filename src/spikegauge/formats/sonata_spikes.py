"""SONATA spike files: read every population (or chosen ones) and write a run's raster.

Layout read and written (SONATA data format, "Spike file" section of the
developer guide): a group ``/spikes`` holding one group per node population,
each with the datasets ``node_ids`` (uint64) and ``timestamps`` (double, with
a text attribute ``units``), and an optional attribute ``sorting`` on the
population group (an enum ``none`` / ``by_id`` / ``by_time``). A missing
``units`` attribute means ms. Node ids are kept as cell ids; a population
given a first cell (``{"inh": 800}``) is shifted there. The files we write
also carry the attributes ``n_cells``, ``t_start_ms``, ``t_stop_ms``,
``group_names`` and ``group_first`` on the population group (what our NPZ
files carry), so a run read back compares identical to itself; other tools
ignore them.
"""
from __future__ import annotations

from pathlib import Path
from typing import Mapping

import numpy as np

from ..errors import InputError
from ._hdf5 import dataset_1d, group, open_hdf5, reading, text_attribute
from .spike_table import SpikeTable, check_ids, check_times, time_factor

SORTING_CODES = {"none": 0, "by_id": 1, "by_time": 2}
"""Values of the ``sorting`` enum (SONATA spike file specification)."""

SPEC_VERSION = (0, 1)
"""SONATA version written in the root ``version`` attribute."""

MAGIC = 0x0A7A
"""Value of the root ``magic`` attribute every SONATA HDF5 file carries."""

DEFAULT_POPULATION = "network"
"""Population name of the spike files we write."""

_OUR_ATTRIBUTES = ("n_cells", "t_start_ms", "t_stop_ms", "group_names", "group_first")


def read_sonata_spikes(path, population: str | Mapping[str, int] | None = None) -> SpikeTable:
    """Read a SONATA spike file.

    Parameters
    ----------
    path : str or Path
        The HDF5 file.
    population : str or mapping of str -> int, optional
        None: every population, node ids kept as cell ids (populations whose
        node ids overlap are refused: choose one, or place them). A name: that
        population only, node ids kept. A mapping ``{name: first_cell}``: those
        populations, node id ``n`` of ``name`` becoming cell ``first_cell + n``.

    Returns
    -------
    SpikeTable
        Times in ms (the ``units`` attribute honoured).

    Raises
    ------
    InputError
        No ``/spikes`` group, an unknown population, ``node_ids`` and
        ``timestamps`` of different lengths, an unknown time unit or sorting,
        a ``sorting`` the data contradict, non-integer or negative node ids,
        NaN, infinite or negative times, or a damaged file; the message names
        the file and the dataset.
    """
    path = Path(path)
    with open_hdf5(path) as f:
        spikes = group(f, "spikes", path, "/spikes")
        with reading(path, "/spikes"):
            available = sorted(spikes.keys())
        if not available:
            raise InputError(f"{path}: /spikes: no population groups in it")
        if population is None:
            chosen = {name: None for name in available}
        elif isinstance(population, str):
            chosen = {population: 0}
        else:
            chosen = {str(k): int(v) for k, v in population.items()}
        for name in chosen:
            if name not in available:
                raise InputError(f"{path}: /spikes/{name}: no such population; the file has "
                                 f"{', '.join(available)}")
        parts = [_read_population(spikes, name, path) for name in chosen]
        meta = _our_attributes(spikes[next(iter(chosen))], path, next(iter(chosen))) \
            if len(chosen) == 1 and next(iter(chosen.values())) in (None, 0) else {}
    if population is None and len(parts) > 1:
        _refuse_overlap(parts, path)
    cells = [ids + (first or 0) for (name, ids, _), first in zip(parts, chosen.values())]
    starts = np.cumsum([0] + [p[1].size for p in parts])

    def place(i: int) -> str:
        k = int(np.searchsorted(starts, i, side="right")) - 1
        return f"/spikes/{parts[k][0]}/node_ids[{i - starts[k]}]"

    return SpikeTable(cell=np.concatenate(cells) if cells else np.zeros(0, np.int64),
                      time_ms=np.concatenate([p[2] for p in parts]), source=str(path), place=place, **meta)


def _read_population(spikes, name: str, path: Path):
    """(name, node ids, times in ms) of one population, validated."""
    g = group(spikes, name, path, f"/spikes/{name}")
    ids = dataset_1d(g, "node_ids", path, f"/spikes/{name}/node_ids")
    times = dataset_1d(g, "timestamps", path, f"/spikes/{name}/timestamps", kinds="iuf")
    if ids.size != times.size:
        raise InputError(f"{path}: /spikes/{name}: node_ids has {ids.size} entries but timestamps "
                         f"has {times.size}")
    with reading(path, f"/spikes/{name}/timestamps"):
        ts = g["timestamps"]
        unit = text_attribute(ts, "units", path, f"/spikes/{name}/timestamps")
    factor = time_factor(unit, path, f"/spikes/{name}/timestamps attribute 'units'")
    time_ms = times.astype(np.float64) * factor
    check_times(time_ms, path, lambda i: f"/spikes/{name}/timestamps[{i}]")
    ids = check_ids(ids, path, lambda i: f"/spikes/{name}/node_ids[{i}]")
    sorting = text_attribute(g, "sorting", path, f"/spikes/{name}")
    if sorting is not None:
        if sorting not in SORTING_CODES:
            raise InputError(f"{path}: /spikes/{name}: attribute 'sorting' is {sorting!r}; expected one "
                             f"of {', '.join(SORTING_CODES)}")
        key, label = {"by_id": (ids, "node_ids"), "by_time": (time_ms, "timestamps")}.get(sorting, (None, ""))
        if key is not None and np.any(np.diff(key) < 0):
            i = int(np.argmax(np.diff(key) < 0)) + 1
            raise InputError(f"{path}: /spikes/{name}/{label}[{i}]: decreases, but the population's "
                             f"'sorting' attribute says {sorting}")
    return name, ids, time_ms


def _our_attributes(g, path: Path, name: str) -> dict:
    """The interval and groups our own files store on the population group (all or nothing)."""
    with reading(path, f"/spikes/{name} attributes"):
        if not all(k in g.attrs for k in _OUR_ATTRIBUTES):
            return {}
        raw = {k: np.asarray(g.attrs[k]) for k in _OUR_ATTRIBUTES}
    where = f"{path}: /spikes/{name}"
    out = {}
    for key in ("n_cells", "t_start_ms", "t_stop_ms"):
        a = raw[key]
        if a.ndim != 0 or a.dtype.kind not in "iuf" or not np.isfinite(a):
            raise InputError(f"{where}: attribute '{key}' must be a finite number, got {a!r}")
        out[key] = float(a)
    if out["n_cells"] != int(out["n_cells"]) or out["n_cells"] < 0:
        raise InputError(f"{where}: attribute 'n_cells' must be a non-negative integer")
    out["n_cells"] = int(out["n_cells"])
    names, first = raw["group_names"], raw["group_first"]
    if names.ndim != 1 or names.size == 0 or first.shape != names.shape or first.dtype.kind not in "iu":
        raise InputError(f"{where}: attributes 'group_names' and 'group_first' must be two lists of "
                         "equal length (names; first cell id of each group)")
    out["group_names"] = tuple(v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v) for v in names)
    out["group_first"] = first.astype(np.int64)
    return out


def _refuse_overlap(parts, path: Path) -> None:
    """Populations merged with their node ids kept must not share node ids."""
    spans = sorted((int(ids.min()), int(ids.max()), name) for name, ids, _ in parts if ids.size)
    for (lo_a, hi_a, a), (lo_b, hi_b, b) in zip(spans, spans[1:]):
        if lo_b <= hi_a:
            raise InputError(f"{path}: /spikes/{a} (node ids {lo_a}..{hi_a}) and /spikes/{b} (node ids "
                             f"{lo_b}..{hi_b}) overlap; read one population, or place each at its first "
                             "cell (--population NAME:FIRST_CELL)")


def write_sonata_spikes(path, cell, time_ms, *, n_cells: int, t_start_ms: float, t_stop_ms: float,
                        group_names=("all",), group_first=(0,), population: str = DEFAULT_POPULATION) -> Path:
    """Write spikes as a SONATA spike file (one population, sorted by id, times in ms).

    Parameters
    ----------
    path : str or Path
        File to write (atomically: a temporary name renamed at the end).
    cell : array_like of int, shape (n_spikes,)
        Cell ids, written as the population's node ids.
    time_ms : array_like of float, shape (n_spikes,)
        Spike times (ms).
    n_cells, t_start_ms, t_stop_ms, group_names, group_first
        Stored as attributes of the population group, for our own reader.
    population : str
        Population name.

    Returns
    -------
    Path
        The file written.
    """
    import h5py

    from ..runs import atomic_path

    cell = np.asarray(cell, dtype=np.int64)
    time_ms = np.asarray(time_ms, dtype=np.float64)
    order = np.lexsort((time_ms, cell))
    path = Path(path)
    with atomic_path(path) as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["magic"] = np.uint32(MAGIC)
            f.attrs["version"] = np.array(SPEC_VERSION, dtype=np.uint32)
            g = f.create_group("spikes").create_group(population)
            sorting = h5py.enum_dtype(SORTING_CODES, basetype=np.uint8)
            g.attrs.create("sorting", SORTING_CODES["by_id"], dtype=sorting)
            g.create_dataset("node_ids", data=cell[order].astype(np.uint64))
            ts = g.create_dataset("timestamps", data=time_ms[order])
            ts.attrs["units"] = "ms"
            g.attrs["n_cells"] = np.int64(n_cells)
            g.attrs["t_start_ms"] = float(t_start_ms)
            g.attrs["t_stop_ms"] = float(t_stop_ms)
            g.attrs["group_names"] = np.array([str(n) for n in group_names], dtype=h5py.string_dtype())
            g.attrs["group_first"] = np.asarray(group_first, dtype=np.int64)
    return path


def write_run_sonata(run_dir) -> Path:
    """Write ``RUN_DIR/spikes.h5``, the SONATA copy of a run folder's ``spikes.npz``.

    Parameters
    ----------
    run_dir : str or Path
        A run folder (``spikegauge simulate --out``, or a point of a profile).

    Returns
    -------
    Path
        The file written.
    """
    from ..analysis.rasters import read_run_spikes

    r = read_run_spikes(run_dir)
    return write_sonata_spikes(Path(run_dir) / "spikes.h5", r.cell, r.time_ms, n_cells=r.n_cells,
                               t_start_ms=r.t_start_ms, t_stop_ms=r.t_stop_ms, group_names=r.group_names,
                               group_first=r.group_first)


def write_profile_sonata(profile_dir) -> list[Path]:
    """Write ``spikes.h5`` beside ``spikes.npz`` in every stored point of a profile.

    Every point is covered: the reference run of each seed, the sensitivity
    ladder's probes and the sweep's settings (``PROFILE_DIR/points/<digest>/``).

    Returns
    -------
    list of Path
        The files written, in digest order.
    """
    points = sorted(p.parent for p in (Path(profile_dir) / "points").glob("*/spikes.npz"))
    return [write_run_sonata(p) for p in points]
