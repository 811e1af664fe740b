"""SONATA edges files: connections of a pathway, with delays and weights, mapped onto scenario groups.

Layout read (SONATA data format, "Representing Edges"): ``/edges/<population>``
holds ``source_node_id`` and ``target_node_id`` (one entry per edge),
``edge_type_id``, ``edge_group_id`` and ``edge_group_index``, and one group per
edge group id (``/edges/<population>/0``, ...) whose datasets hold per-edge
attributes. Two attributes are read:

* ``delay`` (ms) becomes the connection delay,
* ``syn_weight`` becomes the weight, in the target model's weight unit.

Each is taken from the edge's group dataset where the file has one, else from
the column of that name in the edge types table (a CSV file of columns
separated by spaces, with an ``edge_type_id`` column and, for files with
several populations, a ``population`` column), looked up by the edge's
``edge_type_id``; as the specification says, the HDF5 value overrides the
table's. Every other attribute is ignored.

A pathway takes the edges whose source node id lies in
``[source_node_offset, source_node_offset + size of the source group)`` and
whose target node id lies in the same range for the target group; node id
``offset + k`` is cell ``k`` of the group. Edges outside these ranges belong
to other pathways and are left out.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError
from ._hdf5 import dataset_1d, group, is_hdf5, open_hdf5, reading
from .spike_table import check_ids

PATHWAY_KEYS = ("source_node_offset", "target_node_offset", "edge_population", "edge_types")
"""Pathway keys of a SONATA edges file (the edge-list pathway's file given as HDF5)."""

ATTRIBUTES = {"delay": "delay_ms", "syn_weight": "weight"}
"""SONATA edge attributes read, and the edge-list column each becomes."""


@dataclass(frozen=True)
class SonataEdges:
    """Edges of one SONATA edge population, node ids as in the file.

    Attributes
    ----------
    population : str
        The edge population read.
    source_node, target_node : ndarray of int64, shape (n_edges,)
        Node ids of each edge's ends.
    values : dict of str -> ndarray of float64, shape (n_edges,)
        ``"delay"`` (ms) and ``"syn_weight"``, where the file or the edge types
        table gives them for every edge.
    origin : dict of str -> str
        Where each attribute came from (a dataset, the edge types table, or both).
    """

    population: str
    source_node: np.ndarray
    target_node: np.ndarray
    values: dict
    origin: dict


def read_sonata_edges(path, population: str | None = None, edge_types=None) -> SonataEdges:
    """Read one edge population of a SONATA edges file.

    Parameters
    ----------
    path : str or Path
        The HDF5 edges file.
    population : str, optional
        Edge population; may be omitted when the file has exactly one.
    edge_types : str or Path, optional
        The edge types CSV file, read for attributes the HDF5 file lacks.

    Raises
    ------
    InputError
        A missing ``/edges`` group or dataset, an unknown population, datasets
        of different lengths, node ids that are not non-negative integers, an
        edge group or edge type the file or table lacks, an index beyond its
        group's datasets, an attribute given for some edges only, or a damaged
        file; the message names the file and the dataset.
    """
    path = Path(path)
    with open_hdf5(path) as f:
        edges = group(f, "edges", path, "/edges")
        with reading(path, "/edges"):
            available = sorted(edges.keys())
        if population is None:
            if len(available) != 1:
                raise InputError(f"{path}: /edges: holds {len(available)} populations "
                                 f"({', '.join(available) or 'none'}); say which (edge_population)")
            population = available[0]
        if population not in available:
            raise InputError(f"{path}: /edges/{population}: no such population; the file has "
                             f"{', '.join(available) or 'none'}")
        root = f"/edges/{population}"
        pop = group(edges, population, path, root)
        src = dataset_1d(pop, "source_node_id", path, f"{root}/source_node_id", kinds="iuf")
        tgt = dataset_1d(pop, "target_node_id", path, f"{root}/target_node_id", kinds="iuf")
        if src.size != tgt.size:
            raise InputError(f"{path}: {root}: source_node_id has {src.size} entries but target_node_id "
                             f"has {tgt.size}")
        src = check_ids(src, path, lambda i: f"{root}/source_node_id[{i}]")
        tgt = check_ids(tgt, path, lambda i: f"{root}/target_node_id[{i}]")
        n = src.size
        values = {a: np.full(n, np.nan) for a in ATTRIBUTES}
        origin = {a: [] for a in ATTRIBUTES}
        with reading(path, root):
            group_ids = sorted(k for k in pop.keys() if k.isdigit())
        if group_ids:
            gid = _per_edge(pop, "edge_group_id", path, root, n)
            gidx = _per_edge(pop, "edge_group_index", path, root, n)
            for g in np.unique(gid):
                sel = np.flatnonzero(gid == g)
                if str(g) not in group_ids:
                    raise InputError(f"{path}: {root}/edge_group_id[{sel[0]}]: edge group {g} but {root} "
                                     f"has groups {', '.join(group_ids)}")
                grp = group(pop, str(g), path, f"{root}/{g}")
                for attr in ATTRIBUTES:
                    with reading(path, f"{root}/{g}"):
                        present = attr in grp
                    if not present:
                        continue
                    name = f"{root}/{g}/{attr}"
                    data = dataset_1d(grp, attr, path, name)
                    idx = gidx[sel]
                    bad = np.flatnonzero(idx >= data.size)
                    if bad.size:
                        raise InputError(f"{path}: {root}/edge_group_index[{sel[bad[0]]}]: index {idx[bad[0]]} "
                                         f"beyond the {data.size} entries of {name}")
                    values[attr][sel] = data[idx].astype(np.float64)
                    origin[attr].append(name)
        missing = [a for a in ATTRIBUTES if np.isnan(values[a]).any()]
        if missing and edge_types is not None:
            type_ids = _per_edge(pop, "edge_type_id", path, root, n)
            _fill_from_types(values, origin, missing, type_ids, Path(edge_types), population, path, root)
    for attr in ATTRIBUTES:
        have = ~np.isnan(values[attr])
        if have.any() and not have.all():
            i = int(np.argmax(~have))
            hint = "" if edge_types is not None else " (and no edge types table was given)"
            raise InputError(f"{path}: {root}: edge {i} has no '{attr}' in its edge group or edge type{hint}, "
                             "though other edges have one")
        if not have.any():
            values.pop(attr)
            origin[attr] = []
        else:
            bad = np.flatnonzero(~np.isfinite(values[attr]))
            if bad.size:
                raise InputError(f"{path}: {root}: edge {bad[0]}: {attr} is not finite")
    return SonataEdges(population=population, source_node=src, target_node=tgt, values=values,
                       origin={a: " and ".join(v) for a, v in origin.items() if v})


def _per_edge(pop, key: str, path: Path, root: str, n: int) -> np.ndarray:
    """A per-edge integer dataset of the population, checked for length and sign."""
    data = dataset_1d(pop, key, path, f"{root}/{key}", kinds="iu")
    if data.size != n:
        raise InputError(f"{path}: {root}/{key}: has {data.size} entries but there are {n} edges")
    return check_ids(data, path, lambda i: f"{root}/{key}[{i}]", what=key.replace("_", " "))


def _fill_from_types(values, origin, missing, type_ids, types_path: Path, population, path, root) -> None:
    """Fill attributes the HDF5 file lacks from the edge types table (CSV, space separated)."""
    if not types_path.is_file():
        raise InputError(f"{types_path}: edge types file not found")
    try:
        table = pd.read_csv(types_path, sep=r"\s+", quotechar='"', comment=None)
    except (OSError, ValueError, UnicodeDecodeError, pd.errors.ParserError) as exc:
        raise InputError(f"{types_path}: cannot read the edge types table ({' '.join(str(exc).split())})") \
            from None
    if "edge_type_id" not in table.columns:
        raise InputError(f"{types_path}: column 'edge_type_id' missing")
    if "population" in table.columns:
        table = table[table["population"].astype(str) == population]
    ids = pd.to_numeric(table["edge_type_id"], errors="coerce").to_numpy(dtype=np.float64)
    if np.any(~np.isfinite(ids) | (ids != np.round(ids))):
        raise InputError(f"{types_path}: edge_type_id: every entry must be an integer")
    if np.unique(ids).size != ids.size:
        raise InputError(f"{types_path}: edge_type_id: repeated edge type (for population {population})")
    row = {int(v): i for i, v in enumerate(ids)}
    for attr in missing:
        if attr not in table.columns:
            continue
        column = pd.to_numeric(table[attr], errors="coerce").to_numpy(dtype=np.float64)
        need = np.flatnonzero(np.isnan(values[attr]))
        unknown = [i for i in need if int(type_ids[i]) not in row]
        if unknown:
            raise InputError(f"{path}: {root}/edge_type_id[{unknown[0]}]: edge type {type_ids[unknown[0]]} "
                             f"is not in {types_path.name}")
        rows = np.array([row[int(type_ids[i])] for i in need], dtype=np.int64)
        picked = column[rows]
        bad = np.flatnonzero(~np.isfinite(picked))
        if bad.size:
            raise InputError(f"{types_path}: {attr}: edge type {type_ids[need[bad[0]]]} has no number")
        values[attr][need] = picked
        origin[attr].append(f"{types_path.name} column {attr}")


def pathway_edge_columns(path: Path, where: str, table: dict, source, target, same: bool,
                         base_dir: Path) -> dict:
    """The edge-list columns of a pathway whose file is a SONATA edges file.

    Parameters
    ----------
    path : Path
        The HDF5 edges file.
    where : str
        The pathway in messages (``"scenario.toml: pathway[2]"``).
    table : dict
        The pathway's TOML table: ``source_node_offset`` and
        ``target_node_offset`` (required), ``edge_population`` and
        ``edge_types`` (optional; paths relative to ``base_dir``).
    source, target : Group
        The scenario groups (``name``, ``size``).
    same : bool
        Source and target are one group and self-connections are refused.

    Returns
    -------
    dict
        ``source``, ``target`` (cell indices within the groups), ``delay_ms`` and,
        where the file gives it, ``weight``: float64 arrays of the selected edges.
    """
    offsets = {}
    for key in ("source_node_offset", "target_node_offset"):
        if key not in table:
            raise InputError(f"{where}: missing key '{key}' (node id of the group's first cell in the SONATA "
                             "edges file)")
        v = table[key]
        if isinstance(v, bool) or not isinstance(v, int) or v < 0:
            raise InputError(f"{where}.{key}: must be a non-negative integer, got {v!r}")
        offsets[key] = v
    population = table.get("edge_population")
    if population is not None and not isinstance(population, str):
        raise InputError(f"{where}.edge_population: must be a string, got {population!r}")
    types = table.get("edge_types")
    if types is not None:
        if not isinstance(types, str):
            raise InputError(f"{where}.edge_types: must be a file name, got {types!r}")
        types = (base_dir / types).resolve()
    try:
        edges = read_sonata_edges(path, population, types)
    except InputError as exc:  # the scenario's place first, then the file's (by name) and dataset
        msg = str(exc)
        msg = path.name + msg[len(str(path)):] if msg.startswith(str(path)) else msg
        raise InputError(f"{where}: {msg}") from None
    root = f"/edges/{edges.population}"
    s0, t0 = offsets["source_node_offset"], offsets["target_node_offset"]
    keep = (edges.source_node >= s0) & (edges.source_node < s0 + source.size) \
        & (edges.target_node >= t0) & (edges.target_node < t0 + target.size)
    sel = np.flatnonzero(keep)
    if not sel.size:
        raise InputError(f"{where}: {path.name}: no edge of {root} goes from node ids {s0}..{s0 + source.size - 1} "
                         f"('{source.name}') to node ids {t0}..{t0 + target.size - 1} ('{target.name}'); "
                         "check source_node_offset and target_node_offset")
    if "delay" not in edges.values:
        raise InputError(f"{where}: {path.name}: {root}: no delay dataset in the edge groups"
                         + (" nor a 'delay' column in the edge types table" if types is not None
                            else " and no edge types table (edge_types) to take it from"))
    cols = {"source": (edges.source_node[sel] - s0).astype(np.float64),
            "target": (edges.target_node[sel] - t0).astype(np.float64),
            "delay_ms": edges.values["delay"][sel]}
    if "syn_weight" in edges.values:
        cols["weight"] = edges.values["syn_weight"][sel]
    for col, name in (("delay_ms", "delay"), ("weight", "syn_weight")):
        if col not in cols:
            continue
        bad = np.flatnonzero(~(cols[col] > 0) if col == "delay_ms" else cols[col] < 0)
        if bad.size:
            need = "positive" if col == "delay_ms" else "non-negative"
            raise InputError(f"{where}: {path.name}: {root} edge {sel[bad[0]]}: {name} must be {need}, got "
                             f"{cols[col][bad[0]]:g} (from {edges.origin[name]})")
    if same:
        bad = np.flatnonzero(cols["source"] == cols["target"])
        if bad.size:
            raise InputError(f"{where}: {path.name}: {root} edge {sel[bad[0]]} connects node "
                             f"{edges.source_node[sel[bad[0]]]} to itself; set self_connections = true to allow it")
    return cols


def refuse_sonata_keys(where: str, table: dict, path: Path | None = None) -> None:
    """SONATA-only pathway keys with a CSV/NPZ edge list (``path``) or without an edge list are an error."""
    for key in PATHWAY_KEYS:
        if key in table:
            why = f"{path.name} is a table" if path is not None else "this pathway has no edge list"
            raise InputError(f"{where}.{key}: only used when the edge list is a SONATA edges file (HDF5); {why}")


__all__ = ["PATHWAY_KEYS", "SonataEdges", "is_hdf5", "pathway_edge_columns", "read_sonata_edges",
           "refuse_sonata_keys"]
