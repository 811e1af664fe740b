"""Pathways from SONATA edges files: the same network arrays as the equivalent CSV edge list.

Outside reference: the edges files are written with h5py following the SONATA
data format's "Representing Edges" section (``/edges/<population>/
source_node_id``, ``target_node_id`` with their ``node_population``
attributes, ``edge_type_id``, ``edge_group_id``, ``edge_group_index``, edge
groups ``0``, ``1`` holding ``delay`` and ``syn_weight``) and its edge types
table (CSV separated by spaces with an ``edge_type_id`` column).
"""
from __future__ import annotations

import dataclasses

import h5py
import numpy as np
import pytest

from spikegauge.errors import InputError
from spikegauge.network import build_network
from spikegauge.scenario import load_scenario

A_SIZE, B_SIZE = 30, 20
A_FIRST, B_FIRST = 100, 0         # node ids of cell 0 of groups a and b in the SONATA node population


def scenario(tmp_path, edges_file, extra="", weight="", name="net.toml"):
    text = f"""[scenario]
name = "edges"
duration_ms = 100.0
seed = 3

[[group]]
name = "a"
size = {A_SIZE}
model = "lif-current"

[[group]]
name = "b"
size = {B_SIZE}
model = "lif-current"

[[pathway]]
source = "a"
target = "b"
connect = "edge-list"
edges = "{edges_file}"
receptor = "excitatory"
{weight}
{extra}
"""
    path = tmp_path / name
    path.write_text(text)
    return path


def edges(seed=0, n=400):
    rng = np.random.default_rng(seed)
    s = rng.integers(0, A_SIZE, n)
    t = rng.integers(0, B_SIZE, n)
    d = np.round(rng.uniform(0.1, 5.0, n), 6)
    w = np.round(rng.uniform(0.0, 3.0, n), 6)
    return s, t, d, w


def write_csv(path, s, t, d, w=None):
    head = "source,target,delay_ms" + (",weight" if w is not None else "")
    rows = [f"{a},{b},{c!r}" + (f",{e!r}" if w is not None else "")
            for a, b, c, e in zip(s.tolist(), t.tolist(), d.tolist(), (w if w is not None else d).tolist())]
    path.write_text("\n".join([head] + rows) + "\n")
    return path


def write_sonata_edges(path, s_node, t_node, group_id, group_index, type_id, groups: dict, population="cortex"):
    """groups: {group id: {attribute: values}}."""
    with h5py.File(path, "w") as f:
        f.attrs["magic"] = np.uint32(0x0A7A)
        f.attrs["version"] = np.array([0, 1], dtype=np.uint32)
        pop = f.create_group("edges").create_group(population)
        for key, data in (("source_node_id", s_node), ("target_node_id", t_node)):
            ds = pop.create_dataset(key, data=np.asarray(data, dtype=np.uint64))
            ds.attrs["node_population"] = "cortex"
        pop.create_dataset("edge_group_id", data=np.asarray(group_id, dtype=np.uint32))
        pop.create_dataset("edge_group_index", data=np.asarray(group_index, dtype=np.uint64))
        pop.create_dataset("edge_type_id", data=np.asarray(type_id, dtype=np.uint32))
        for gid, attrs in groups.items():
            g = pop.create_group(str(gid))
            for name, values in attrs.items():
                g.create_dataset(name, data=np.asarray(values, dtype=np.float64))
    return path


def same_network(p, q):
    a, b = build_network(load_scenario(p)), build_network(load_scenario(q))
    for f in dataclasses.fields(a):
        x, y = getattr(a, f.name), getattr(b, f.name)
        if isinstance(x, np.ndarray):
            assert x.dtype == y.dtype and np.array_equal(x, y, equal_nan=True), f.name
        elif f.name != "events":
            assert x == y, f.name
    return a


OFFSETS = f"source_node_offset = {A_FIRST}\ntarget_node_offset = {B_FIRST}"


def test_edges_in_hdf5_datasets_give_the_csv_network(tmp_path):
    s, t, d, w = edges()
    csv = scenario(tmp_path, write_csv(tmp_path / "e.csv", s, t, d, w).name, name="csv.toml")
    # Two edge groups, rows stored in a shuffled order, plus edges b -> a of another pathway that
    # must be left out (their source lies outside a's node ids).
    n = s.size
    other_s, other_t = np.arange(5) + B_FIRST, np.arange(5) + A_FIRST
    gid = np.concatenate([np.arange(n) % 2, [0] * 5])
    idx = np.zeros(n + 5, np.int64)
    for g in (0, 1):
        sel = np.flatnonzero(gid == g)
        idx[sel] = np.random.default_rng(g).permutation(sel.size)
    delay = np.concatenate([d, np.ones(5)])
    weight = np.concatenate([w, np.ones(5)])
    groups = {g: {"delay": np.empty(np.count_nonzero(gid == g)), "syn_weight": np.empty(np.count_nonzero(gid == g))}
              for g in (0, 1)}
    for g in (0, 1):
        sel = np.flatnonzero(gid == g)
        groups[g]["delay"][idx[sel]] = delay[sel]
        groups[g]["syn_weight"][idx[sel]] = weight[sel]
    h5 = write_sonata_edges(tmp_path / "e.h5", np.concatenate([s + A_FIRST, other_s]),
                            np.concatenate([t + B_FIRST, other_t]), gid, idx, np.zeros(n + 5), groups)
    net = same_network(csv, scenario(tmp_path, h5.name, OFFSETS, name="sonata.toml"))
    assert net.n_synapses == n


def test_edge_types_table_fills_what_the_file_lacks(tmp_path):
    """Delays from the edge types table (by edge_type_id), weights from the HDF5 file."""
    s, t, _, w = edges(1)
    type_delay = {3: 0.5, 7: 1.25, 11: 2.0}
    types = np.random.default_rng(2).choice(list(type_delay), s.size)
    d = np.array([type_delay[k] for k in types])
    csv = scenario(tmp_path, write_csv(tmp_path / "e.csv", s, t, d, w).name, name="csv.toml")
    (tmp_path / "types.csv").write_text(
        "edge_type_id  model_template delay dynamics_params\n"
        + "".join(f'{k}  "exp syn"  {v!r}  params_{k}.json\n' for k, v in type_delay.items()))
    h5 = write_sonata_edges(tmp_path / "e.h5", s + A_FIRST, t + B_FIRST, np.zeros(s.size), np.arange(s.size),
                            types, {0: {"syn_weight": w}})
    sonata = scenario(tmp_path, h5.name, OFFSETS + '\nedge_types = "types.csv"', name="sonata.toml")
    same_network(csv, sonata)
    # Without the table the delays are missing: one line naming the file and the population.
    bare = scenario(tmp_path, h5.name, OFFSETS, name="bare.toml")
    with pytest.raises(InputError, match=r"pathway\[0\]: e.h5: /edges/cortex: no delay dataset in the edge "
                                         r"groups and no edge types table \(edge_types\)"):
        load_scenario(bare)


def test_weights_from_the_scenario_when_the_file_has_none(tmp_path):
    s, t, d, _ = edges(3)
    csv = scenario(tmp_path, write_csv(tmp_path / "e.csv", s, t, d).name, weight="weight_pa = 12.5",
                   name="csv.toml")
    h5 = write_sonata_edges(tmp_path / "e.h5", s + A_FIRST, t + B_FIRST, np.zeros(s.size), np.arange(s.size),
                            np.zeros(s.size), {0: {"delay": d}})
    sonata = scenario(tmp_path, h5.name, OFFSETS, weight="weight_pa = 12.5", name="sonata.toml")
    same_network(csv, sonata)


@pytest.mark.parametrize("extra,damage,message", [
    ("target_node_offset = 0", None, r"pathway\[0\]: missing key 'source_node_offset'"),
    (f"source_node_offset = 5000\ntarget_node_offset = 0", None,
     r"pathway\[0\]: e.h5: no edge of /edges/cortex goes from node ids 5000..5029 \('a'\)"),
    (OFFSETS, "negative_weight", r"/edges/cortex edge 4: syn_weight must be non-negative, got -1 "
                                 r"\(from /edges/cortex/0/syn_weight\)"),
    (OFFSETS, "short_target", r"e.h5: /edges/cortex: source_node_id has 400 entries but target_node_id has 399"),
    (OFFSETS, "index_beyond", r"e.h5: /edges/cortex/edge_group_index\[0\]: index 999 beyond the 400 entries "
                              r"of /edges/cortex/0/delay"),
    (OFFSETS, "no_edges_group", r"e.h5: /edges: group missing"),
    (OFFSETS, "truncated", r"e.h5: not a readable HDF5 file"),
])
def test_bad_edges_files_one_line(tmp_path, extra, damage, message):
    s, t, d, w = edges()
    h5 = write_sonata_edges(tmp_path / "e.h5", s + A_FIRST, t + B_FIRST, np.zeros(s.size), np.arange(s.size),
                            np.zeros(s.size), {0: {"delay": d, "syn_weight": w}})
    if damage == "truncated":
        h5.write_bytes(h5.read_bytes()[:700])
    elif damage:
        with h5py.File(h5, "r+") as f:
            pop = f["edges/cortex"]
            if damage == "negative_weight":
                pop["0/syn_weight"][4] = -1.0
            elif damage == "short_target":
                data = pop["target_node_id"][:-1]
                del pop["target_node_id"]
                pop["target_node_id"] = data
            elif damage == "index_beyond":
                pop["edge_group_index"][0] = 999
            elif damage == "no_edges_group":
                f.move("edges", "edgez")
    with pytest.raises(InputError) as err:
        load_scenario(scenario(tmp_path, h5.name, extra))
    msg = str(err.value)
    assert msg.startswith(str(tmp_path / "net.toml")) and "\n" not in msg
    assert __import__("re").search(message, msg), msg


def test_sonata_keys_refused_for_a_csv_edge_list(tmp_path):
    s, t, d, w = edges()
    path = scenario(tmp_path, write_csv(tmp_path / "e.csv", s, t, d, w).name, OFFSETS)
    with pytest.raises(InputError, match=r"pathway\[0\].source_node_offset: only used when the edge list is a "
                                         r"SONATA edges file \(HDF5\); e.csv is a table"):
        load_scenario(path)
    # ... and with a pathway drawn by a rule, which has no edge list at all.
    text = path.read_text().replace('connect = "edge-list"\nedges = "e.csv"', 'connect = "all-to-all"\ndelay_ms = 1.0\nweight_pa = 1.0')
    path.write_text(text)
    with pytest.raises(InputError, match=r"pathway\[0\].source_node_offset: only used when the edge list is a "
                                         r"SONATA edges file \(HDF5\); this pathway has no edge list"):
        load_scenario(path)
