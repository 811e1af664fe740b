"""Spike rasters in the open formats (SONATA, NWB, Neo): read by content, compared exactly as the CSV.

Outside references: the files are written by the reference libraries themselves
(h5py following the published SONATA spike-file layout, pynwb, neo; see
tests/_formatutil.py), never by spikegauge. The check is exact: a raster read
from any format gives the same comparison, bit for bit, as the same raster
written as a CSV file.
"""
from __future__ import annotations

import json
import sys

import h5py
import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from _formatutil import (GROUPS, N_CELLS, T_STOP_MS, neo_trains, rasters, write_csv, write_nwb,
                         write_sonata)
from spikegauge.analysis import as_raster, compare
from spikegauge.cli.main import cli
from spikegauge.errors import InputError

INTERVAL = dict(n_cells=N_CELLS, t_start_ms=0.0, t_stop_ms=T_STOP_MS)


def assert_same_comparison(a, b):
    assert json.dumps(a.summary, sort_keys=True) == json.dumps(b.summary, sort_keys=True)
    pd.testing.assert_frame_equal(a.pairs, b.pairs, check_exact=True)
    pd.testing.assert_frame_equal(a.per_cell, b.per_cell, check_exact=True)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("formats")
    (rc, rt), (tc, tt) = rasters()
    out = {"ref_csv": write_csv(d / "ref.csv", rc, rt), "test_csv": write_csv(d / "test.csv", tc, tt),
           "raw": ((rc, rt), (tc, tt)), "dir": d}
    return out


@pytest.fixture(scope="module")
def csv_comparison(files):
    return compare(files["ref_csv"], files["test_csv"], time_unit="s", **INTERVAL)


@pytest.mark.parametrize("units,sorting", [("ms", "by_time"), ("s", "by_id"), ("ms", None), ("s", "none")])
def test_sonata_file_compares_exactly_as_csv(files, csv_comparison, units, sorting):
    (rc, rt), (tc, tt) = files["raw"]
    d = files["dir"]
    ref = write_sonata(d / f"ref_{units}_{sorting}.h5", {"v1": (rc, rt)}, units=units, sorting=sorting)
    test = write_sonata(d / f"test_{units}_{sorting}.h5", {"v1": (tc, tt)}, units=units, sorting=sorting)
    assert_same_comparison(compare(ref, test, **INTERVAL), csv_comparison)
    # Mixed: SONATA test against the CSV reference.
    assert_same_comparison(compare(files["ref_csv"], test, time_unit="s", **INTERVAL), csv_comparison)


def test_sonata_populations_placed_or_chosen(files, csv_comparison):
    """Two populations whose node ids both start at 0, placed at their groups' first cells."""
    (rc, rt), (tc, tt) = files["raw"]
    d = files["dir"]
    first = GROUPS["inh"][0]

    def split(c, t):
        return {"exc": (c[c < first], t[c < first]), "inh": (c[c >= first] - first, t[c >= first])}

    ref = write_sonata(d / "ref_pops.h5", split(rc, rt))
    test = write_sonata(d / "test_pops.h5", split(tc, tt))
    placed = {"exc": 0, "inh": first}
    assert_same_comparison(compare(ref, test, population=placed, **INTERVAL), csv_comparison)
    # Every population with node ids kept: the two overlap, which is refused.
    with pytest.raises(InputError, match=r"ref_pops.h5: /spikes/inh \(node ids 0..1\) and /spikes/exc \(node ids 0..8\) overlap"):
        compare(ref, test, **INTERVAL)
    # One population chosen: only its spikes.
    r = as_raster(ref, population="inh", n_cells=3, t_stop_ms=T_STOP_MS)
    assert r.n_spikes == int(np.count_nonzero(rc >= first))
    with pytest.raises(InputError, match=r"ref_pops.h5: /spikes/lgn: no such population; the file has exc, inh"):
        as_raster(ref, population="lgn", t_stop_ms=T_STOP_MS)


@pytest.mark.parametrize("id_column", [None, "cell_id"])
def test_nwb_units_table_compares_exactly_as_csv(files, csv_comparison, id_column):
    (rc, rt), (tc, tt) = files["raw"]
    d = files["dir"]
    # With an id column the units are stored in a shuffled order: the column, not the order, maps them.
    order = None if id_column is None else np.random.default_rng(1).permutation(N_CELLS).tolist()
    ref = write_nwb(d / f"ref_{id_column}.nwb", rc, rt, order=order, id_column=id_column)
    test = write_nwb(d / f"test_{id_column}.nwb", tc, tt, order=order, id_column=id_column)
    got = compare(ref, test, unit_id_column=id_column, **INTERVAL)
    assert_same_comparison(got, csv_comparison)
    if id_column is None:  # the table order declares the cell count (silent last cell included)
        assert as_raster(ref, t_stop_ms=T_STOP_MS).n_cells == N_CELLS


@pytest.mark.parametrize("unit", ["s", "ms"])
def test_neo_spike_trains_compare_exactly_as_csv(files, csv_comparison, unit):
    (rc, rt), (tc, tt) = files["raw"]
    got = compare(neo_trains(rc, rt, unit), neo_trains(tc, tt, unit))
    assert_same_comparison(got, csv_comparison)
    assert got.summary["n_cells"] == N_CELLS and got.summary["t_stop_ms"] == T_STOP_MS


@pytest.mark.filterwarnings("ignore:The file path provided")   # pynwb's advice on the .dat name we write
def test_format_is_told_by_content_not_name(files, csv_comparison, tmp_path):
    (rc, rt), (tc, tt) = files["raw"]
    ref = write_sonata(tmp_path / "ref.csv", {"v1": (rc, rt)})          # HDF5 named .csv
    test = write_nwb(tmp_path / "test.dat", tc, tt)                     # NWB named .dat
    assert_same_comparison(compare(ref, test, **INTERVAL), csv_comparison)


def test_compare_command_reads_sonata_and_nwb_like_csv(files, tmp_path):
    (rc, rt), (tc, tt) = files["raw"]
    first = GROUPS["inh"][0]
    ref = write_sonata(tmp_path / "ref.h5", {"exc": (rc[rc < first], rt[rc < first]),
                                            "inh": (rc[rc >= first] - first, rt[rc >= first])}, units="s")
    test = write_nwb(tmp_path / "test.nwb", tc, tt)
    runner = CliRunner()
    common = ["--cells", str(N_CELLS), "--t-start-ms", "0", "--t-stop-ms", str(T_STOP_MS), "--no-figures"]
    a = runner.invoke(cli, ["compare", str(files["ref_csv"]), str(files["test_csv"]), "--time-unit", "s",
                            *common, "--out", str(tmp_path / "a")])
    b = runner.invoke(cli, ["compare", str(ref), str(test), "--population", "exc:0", "--population",
                            f"inh:{first}", *common, "--out", str(tmp_path / "b")])
    assert a.exit_code == 0, a.output
    assert b.exit_code == 0, b.output
    ja = json.loads((tmp_path / "a" / "comparison.json").read_text())
    jb = json.loads((tmp_path / "b" / "comparison.json").read_text())
    for key in ("summary", "per_group", "over_time"):
        assert ja["tests"]["test"][key] == jb["tests"]["test"][key]


# -- bad input: hand-damaged copies --------------------------------------------------------------


@pytest.fixture
def good_sonata(tmp_path, files):
    (rc, rt), _ = files["raw"]
    return write_sonata(tmp_path / "spikes.h5", {"v1": (rc, rt)})


def _edit(path, fn):
    with h5py.File(path, "r+") as f:
        fn(f)
    return path


def _damage_cases():
    def missing_spikes(f):
        f.move("spikes", "not_spikes")

    def short_timestamps(f):
        t = f["spikes/v1/timestamps"][:-1]
        units = f["spikes/v1/timestamps"].attrs["units"]
        del f["spikes/v1/timestamps"]
        f["spikes/v1/timestamps"] = t
        f["spikes/v1/timestamps"].attrs["units"] = units

    def unit(f):
        f["spikes/v1/timestamps"].attrs["units"] = "fortnights"

    def nan_time(f):
        f["spikes/v1/timestamps"][5] = np.nan

    def negative_time(f):
        f["spikes/v1/timestamps"][7] = -1.0

    def float_ids(f):
        ids = f["spikes/v1/node_ids"][:].astype(float) + 0.5
        del f["spikes/v1/node_ids"]
        f["spikes/v1/node_ids"] = ids

    def lying_sorting(f):
        enum = h5py.enum_dtype({"none": 0, "by_id": 1, "by_time": 2}, basetype="u1")
        f["spikes/v1"].attrs.create("sorting", 1, dtype=enum)   # by_id, but the file is sorted by time

    return [
        (missing_spikes, r"/spikes: group missing"),
        (short_timestamps, r"/spikes/v1: node_ids has \d+ entries but timestamps has \d+"),
        (unit, r"/spikes/v1/timestamps attribute 'units': unknown time unit 'fortnights'"),
        (nan_time, r"/spikes/v1/timestamps\[\d+\]: spike time nan is not finite"),
        (negative_time, r"/spikes/v1/timestamps\[\d+\]: spike time -1.0 ms is negative"),
        (float_ids, r"/spikes/v1/node_ids\[0\]: node id \S+ is not an integer"),
        (lying_sorting, r"/spikes/v1/node_ids\[\d+\]: decreases, but the population's 'sorting' attribute says by_id"),
    ]


@pytest.mark.parametrize("damage,message", _damage_cases(), ids=lambda x: getattr(x, "__name__", ""))
def test_damaged_sonata_files_one_line_naming_file_and_dataset(good_sonata, damage, message):
    _edit(good_sonata, damage)
    with pytest.raises(InputError) as err:
        as_raster(good_sonata, t_stop_ms=T_STOP_MS)
    msg = str(err.value)
    assert msg.startswith(f"{good_sonata}: ") and "\n" not in msg
    assert __import__("re").search(message, msg), msg


def test_ids_beyond_the_cells_name_the_node_ids_entry(good_sonata, tmp_path, files):
    with pytest.raises(InputError, match=r"spikes.h5: /spikes/v1/node_ids\[\d+\]: cell id \d+ but the raster has 5 cells \(ids 0..4\)"):
        as_raster(good_sonata, n_cells=5, t_stop_ms=T_STOP_MS)


@pytest.mark.parametrize("how", ["truncated", "overwritten"])
def test_damaged_hdf5_file_is_one_line(good_sonata, how):
    data = bytearray(good_sonata.read_bytes())
    if how == "truncated":
        data = data[: len(data) // 2]
    else:
        data[8:200] = b"\xff" * 192   # the superblock after the signature
    good_sonata.write_bytes(bytes(data))
    with pytest.raises(InputError) as err:
        as_raster(good_sonata, t_stop_ms=T_STOP_MS)
    assert str(err.value).startswith(f"{good_sonata}: ") and "\n" not in str(err.value)


def test_nwb_without_units_table(tmp_path):
    from pynwb import NWBHDF5IO, NWBFile
    from datetime import datetime, timezone

    path = tmp_path / "session.nwb"
    with NWBHDF5IO(str(path), "w") as io:
        io.write(NWBFile(session_description="no units", identifier="x",
                         session_start_time=datetime(2024, 1, 1, tzinfo=timezone.utc)))
    with pytest.raises(InputError, match=r"session.nwb: /units: this NWB file has no units table"):
        as_raster(path, t_stop_ms=T_STOP_MS)


def test_nwb_bad_id_column_and_negative_time(tmp_path, files):
    (rc, rt), _ = files["raw"]
    path = write_nwb(tmp_path / "u.nwb", rc, rt, id_column="cell_id")
    with pytest.raises(InputError, match=r"u.nwb: /units/depth: no such column; the units table has id, cell_id"):
        as_raster(path, unit_id_column="depth", t_stop_ms=T_STOP_MS)
    with h5py.File(path, "r+") as f:
        f["units/spike_times"][0] = -0.5
    with pytest.raises(InputError, match=r"u.nwb: /units/spike_times\[0\] \(unit 0\): spike time -500.0 ms is negative"):
        as_raster(path, t_stop_ms=T_STOP_MS)


def test_missing_optional_libraries_say_how_to_install(tmp_path, files, monkeypatch):
    (rc, rt), _ = files["raw"]
    path = write_nwb(tmp_path / "u.nwb", rc, rt)
    monkeypatch.setitem(sys.modules, "pynwb", None)   # import pynwb now raises ImportError
    with pytest.raises(InputError, match=r"u.nwb: reading NWB files needs pynwb; install it with "
                                         r"pip install 'spikegauge\[formats\]'"):
        as_raster(path, t_stop_ms=T_STOP_MS)
    result = CliRunner().invoke(cli, ["compare", str(path), str(path), "--no-figures", "--t-stop-ms", "10",
                                      "--out", str(tmp_path / "o")])
    assert result.exit_code == 2
    assert "needs pynwb" in result.output and "Traceback" not in result.output


def test_cli_bad_sonata_exits_2_with_one_line(good_sonata, tmp_path, files):
    _edit(good_sonata, lambda f: f["spikes/v1/timestamps"].attrs.__setitem__("units", "minutes"))
    result = CliRunner().invoke(cli, ["compare", str(files["ref_csv"]), str(good_sonata), "--no-figures",
                                      "--out", str(tmp_path / "o")])
    assert result.exit_code == 2
    lines = [ln for ln in result.output.splitlines() if ln.startswith("error:")]
    assert len(lines) == 1 and "spikes.h5: /spikes/v1/timestamps attribute 'units'" in lines[0]


def test_neo_trains_refuse_non_time_units_and_negative_times():
    import neo
    import quantities as pq

    good = neo.SpikeTrain([1.0, 2.0] * pq.ms, t_stop=10 * pq.ms)
    early = neo.SpikeTrain([-1.0, 2.0] * pq.ms, t_start=-5 * pq.ms, t_stop=10 * pq.ms)
    with pytest.raises(InputError, match=r"<neo.SpikeTrain list>: item 1 spike 0: spike time -1.0 ms is negative"):
        as_raster([good, early])
    with pytest.raises(InputError, match=r"cannot read spikes from a list"):
        as_raster([good, np.array([1.0])])


def test_hdf5_file_of_neither_format(tmp_path):
    path = tmp_path / "other.h5"
    with h5py.File(path, "w") as f:
        f["data"] = np.arange(3.0)
    with pytest.raises(InputError, match=r"other.h5: /spikes: group missing \(an HDF5 file that is neither a "
                                         r"SONATA spike file nor an NWB file\)"):
        as_raster(path, t_stop_ms=T_STOP_MS)


def test_cli_ids_beyond_the_run_cells_exit_2(tmp_path, files):
    """A SONATA test raster with a node id beyond the reference run's cells: one line naming the entry."""
    (rc, rt), _ = files["raw"]
    run = tmp_path / "run"
    run.mkdir()
    np.savez(run / "spikes.npz", cell=np.asarray(rc, np.int64), time_ms=np.asarray(rt) * 1000.0, n_cells=N_CELLS,
             t_start_ms=0.0, t_stop_ms=T_STOP_MS, group_names=np.array(["exc", "inh"]),
             group_first=np.array([0, 9]))
    ids = np.asarray(rc).copy()
    ids[3] = N_CELLS + 4
    test = write_sonata(tmp_path / "test.h5", {"v1": (ids, rt)}, sorting=None)
    result = CliRunner().invoke(cli, ["compare", str(run), str(test), "--no-figures", "--out", str(tmp_path / "o")])
    assert result.exit_code == 2, result.output
    assert f"error: {test}: /spikes/v1/node_ids[3]: cell id {N_CELLS + 4} but the raster has {N_CELLS} cells" \
        in result.output
