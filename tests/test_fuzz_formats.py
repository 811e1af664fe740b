"""Fuzzed SONATA spike files, NWB files and SONATA edges files: one-line input errors, never a traceback.

Each case is a valid file written by the reference library (h5py following the
SONATA specification, pynwb) and then damaged, either at the byte level
(flipped bytes, zeroed blocks, truncation) or in its structure through h5py
(datasets removed, retyped, reshaped, filled with NaN, negative or huge values;
attributes replaced by other types or unknown words). A damaged HDF5 file can
crash the HDF5 C library instead of raising, so the cases are read in child
processes (many per process, to keep the test CI-sized) with a time limit; the
parent restarts a child after a crash or a hang and reports which file did it.
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np

from _formatutil import rasters, write_nwb, write_sonata
from test_formats_edges import OFFSETS, edges, scenario, write_sonata_edges

CHILD = Path(__file__).with_name("_fuzz_hdf5_child.py")
BATCH_TIMEOUT_S = 300.0


def _byte_damage(src: Path, dst: Path, rng: np.random.Generator) -> None:
    data = bytearray(src.read_bytes())
    how = rng.integers(0, 4)
    if how == 0:                                   # flip a few bytes anywhere
        for pos in rng.integers(0, len(data), rng.integers(1, 20)):
            data[pos] ^= int(rng.integers(1, 256))
    elif how == 1:                                 # zero a block
        pos = int(rng.integers(0, len(data)))
        data[pos:pos + int(rng.integers(1, 512))] = bytes(min(len(data) - pos, 512))[:len(data[pos:pos + 512])]
    elif how == 2:                                 # truncate
        data = data[: int(rng.integers(0, len(data)))]
    else:                                          # flip bytes in the first 2 kB (superblock, root group)
        for pos in rng.integers(0, min(len(data), 2048), rng.integers(1, 8)):
            data[pos] ^= int(rng.integers(1, 256))
    dst.write_bytes(bytes(data))


WEIRD_VALUES = [np.nan, np.inf, -np.inf, -1.0, 1e300, -5e18, 0.5, 2 ** 63]


def _weird_dataset(rng):
    k = rng.integers(0, 6)
    if k == 0:
        return np.array([b"abc", b"de"])               # strings
    if k == 1:
        return np.zeros((3, 2))                        # 2-D
    if k == 2:
        return np.array([])                            # empty
    if k == 3:
        return np.float64(3.0)                         # scalar
    if k == 4:
        return rng.normal(size=int(rng.integers(1, 50))) * 1e6
    return np.array([1, 2, 3], dtype=np.int8)


def _weird_attribute(rng):
    return [b"ms", "s", "hours", "", 7, np.array([1, 2]), np.array(["ms", "s"], dtype=object), 2.5,
            "by_time", "sideways", np.uint8(9)][int(rng.integers(0, 11))]


def _structural_damage(path: Path, rng: np.random.Generator) -> None:
    """Change the file's structure through h5py (the file stays valid HDF5)."""
    with h5py.File(path, "r+") as f:
        objects = []
        f.visititems(lambda name, obj: objects.append(name))
        datasets = [n for n in objects if isinstance(f[n], h5py.Dataset)]
        for _ in range(int(rng.integers(1, 4))):
            if not objects:
                break
            k = rng.integers(0, 5)
            name = datasets[int(rng.integers(0, len(datasets)))] if datasets else None
            try:
                if k == 0 and name:                                 # remove a dataset
                    del f[name]
                    datasets.remove(name)
                elif k == 1 and name:                               # replace by a weird dataset
                    del f[name]
                    f[name] = _weird_dataset(rng)
                elif k == 2 and name and f[name].dtype.kind in "iuf" and f[name].size:
                    data = f[name][()]
                    flat = np.asarray(data, dtype=np.float64).ravel()
                    flat[int(rng.integers(0, flat.size))] = WEIRD_VALUES[int(rng.integers(0, len(WEIRD_VALUES)))]
                    del f[name]
                    f[name] = flat.reshape(np.shape(data))
                elif k == 3:                                        # replace or add an attribute
                    target = f[objects[int(rng.integers(0, len(objects)))]]
                    key = ["units", "sorting", "node_population", "n_cells", "group_first", "colnames"][
                        int(rng.integers(0, 6))]
                    target.attrs[key] = _weird_attribute(rng)
                elif k == 4:                                        # a group where a dataset was
                    if name:
                        del f[name]
                        f.create_group(name)
                        datasets.remove(name)
            except (KeyError, ValueError, TypeError, OSError):
                pass   # a mutation h5py itself refuses is simply not made


def _cases(tmp_path: Path) -> list[dict]:
    rng = np.random.default_rng(2024)
    (rc, rt), _ = rasters()
    seeds = tmp_path / "seeds"
    seeds.mkdir()
    sonata = write_sonata(seeds / "spikes.h5", {"exc": (rc[rc < 9], rt[rc < 9]),
                                               "inh": (rc[rc >= 9] - 9, rt[rc >= 9])})
    nwb = write_nwb(seeds / "units.nwb", rc, rt, id_column="cell_id")
    s, t, d, w = edges()
    edges_h5 = write_sonata_edges(seeds / "e.h5", s + 100, t, np.zeros(s.size), np.arange(s.size),
                                  np.zeros(s.size), {0: {"delay": d, "syn_weight": w}})
    cases = []
    plan = [("sonata", sonata, 200), ("nwb", nwb, 80), ("edges", edges_h5, 80)]
    for label, src, count in plan:
        for j in range(count):
            d_ = tmp_path / f"{label}_{j:03d}"
            d_.mkdir()
            dst = d_ / src.name
            if j % 2 == 0:
                _byte_damage(src, dst, rng)
            else:
                dst.write_bytes(src.read_bytes())
                _structural_damage(dst, rng)
            if label == "edges":
                cases.append({"kind": "scenario", "path": str(scenario(d_, dst.name, OFFSETS))})
            else:
                options = {"population": {"exc": 0, "inh": 9}} if label == "sonata" and j % 3 == 0 else \
                    {"unit_id_column": "cell_id"} if label == "nwb" and j % 3 == 0 else {}
                cases.append({"kind": "spikes", "path": str(dst), "options": options})
    return cases


def _run_all(cases: list[dict], tmp_path: Path) -> dict:
    """Outcome of every case: read in child processes, restarted after a crash or a hang."""
    spec = tmp_path / "cases.json"
    spec.write_text(json.dumps(cases))
    outcomes, start = {}, 0
    while start < len(cases):
        proc = subprocess.Popen([sys.executable, str(CHILD), str(spec), str(start)], stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True)
        try:
            out, err = proc.communicate(timeout=BATCH_TIMEOUT_S)
            hung = False
        except subprocess.TimeoutExpired:
            proc.kill()
            out, err = proc.communicate()
            hung = True
        begun = None
        for line in out.splitlines():
            rec = json.loads(line)
            if "begin" in rec:
                begun = rec["begin"]
            else:
                outcomes[rec["i"]] = rec
        if begun is not None and begun not in outcomes:     # the child died or hung in this case
            outcomes[begun] = {"i": begun, "outcome": "hang" if hung else "crash",
                               "msg": f"exit {proc.returncode}: {err.strip().splitlines()[-1:]}"}
        if begun is None:
            raise AssertionError(f"fuzz child did not start: {err}")
        start = begun + 1
    return outcomes


def test_fuzzed_hdf5_files_give_one_line_input_errors(tmp_path):
    cases = _cases(tmp_path)
    assert len(cases) >= 300
    outcomes = _run_all(cases, tmp_path)
    assert sorted(outcomes) == list(range(len(cases)))
    bad = [(cases[i]["path"], o["outcome"], o["msg"]) for i, o in outcomes.items()
           if o["outcome"] not in ("ok", "input")]
    assert not bad, f"{len(bad)} cases raised something else than a one-line input error: {bad[:5]}"
    for i, o in outcomes.items():
        if o["outcome"] == "input":
            msg, path = o["msg"], cases[i]["path"]
            assert "\n" not in msg and "Traceback" not in msg, msg
            assert msg.startswith(f"{path}:"), msg          # the file (or the scenario naming it) first
    errors = sum(o["outcome"] == "input" for o in outcomes.values())
    assert errors >= len(cases) // 2, "most damaged files must be refused"
