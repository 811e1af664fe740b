"""Reading spike rasters: text files, NPZ files, run folders, DataFrames, run objects; bad files."""
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from spikegauge.analysis import Raster, as_raster, load_rasters, read_run_spikes
from spikegauge.errors import InputError


def write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text)
    return path


def write_run(folder, cell, time_ms, n_cells, t_start_ms=0.0, t_stop_ms=100.0,
              group_names=("exc", "inh"), group_first=(0, 3)):
    folder.mkdir(parents=True, exist_ok=True)
    np.savez(folder / "spikes.npz", cell=np.asarray(cell, np.int64), time_ms=np.asarray(time_ms, float),
             n_cells=n_cells, t_start_ms=t_start_ms, t_stop_ms=t_stop_ms,
             group_names=np.array(group_names), group_first=np.asarray(group_first, np.int64))
    return folder


def test_csv_with_and_without_header_unsorted_input_is_sorted(tmp_path):
    a = write(tmp_path, "a.csv", "cell,time_ms\n2,5.0\n0,7.0\n0,1.5\n")
    b = write(tmp_path, "b.csv", "0,1.5\n0,7.0\n2,5.0\n")
    ra, rb = load_rasters([a, b], t_stop_ms=10.0)
    for r in (ra, rb):
        assert r.cell.dtype == np.int64 and r.time_ms.dtype == np.float64
        assert r.cell.tolist() == [0, 0, 2] and r.time_ms.tolist() == [1.5, 7.0, 5.0]
        assert r.n_cells == 3 and r.offsets.tolist() == [0, 2, 2, 3]


def test_whitespace_and_semicolon_separators_and_blank_lines(tmp_path):
    a = write(tmp_path, "a.txt", "0 1.0\n\n  1\t2.0\n")
    b = write(tmp_path, "b.csv", "0;1.0\n1;2.0\n")
    ra, rb = load_rasters([a, b], t_stop_ms=10.0)
    assert ra.cell.tolist() == rb.cell.tolist() == [0, 1]
    assert ra.time_ms.tolist() == rb.time_ms.tolist() == [1.0, 2.0]


def test_time_unit_seconds_and_header_naming_time_first(tmp_path):
    a = write(tmp_path, "a.csv", "time_s,neuron\n0.5,3\n0.25,1\n")
    (r,) = load_rasters([a], time_unit="s", t_stop_ms=1000.0)
    assert r.cell.tolist() == [1, 3] and r.time_ms.tolist() == [250.0, 500.0]


def test_named_labels_map_by_sorted_union_of_both_files(tmp_path):
    a = write(tmp_path, "a.csv", "n2,1.0\nn10,2.0\n")
    b = write(tmp_path, "b.csv", "n1,1.0\nn2,3.0\n")
    ra, rb = load_rasters([a, b], t_stop_ms=10.0)
    # union sorted: n1 -> 0, n10 -> 1, n2 -> 2
    assert ra.n_cells == rb.n_cells == 3
    assert ra.cell.tolist() == [1, 2] and ra.time_ms.tolist() == [2.0, 1.0]
    assert rb.cell.tolist() == [0, 2]


def test_numbers_mixed_with_names_sort_numbers_first(tmp_path):
    a = write(tmp_path, "a.csv", "10,1.0\n2,2.0\n")
    b = write(tmp_path, "b.csv", "x,1.0\n")
    ra, rb = load_rasters([a, b], t_stop_ms=10.0)
    assert ra.cell.tolist() == [0, 1] and ra.time_ms.tolist() == [2.0, 1.0]   # 2 -> 0, 10 -> 1
    assert rb.cell.tolist() == [2]


def test_silent_cells_count_and_transient_is_skipped(tmp_path):
    a = write(tmp_path, "a.csv", "0,1.0\n0,30.0\n1,40.0\n")
    (r,) = load_rasters([a], n_cells=5, t_start_ms=20.0, t_stop_ms=100.0)
    assert r.n_cells == 5 and r.counts().tolist() == [1, 1, 0, 0, 0]
    assert r.t_start_ms == 20.0 and r.duration_ms == 80.0


def test_duplicates_are_counted_and_kept(tmp_path):
    a = write(tmp_path, "a.csv", "0,1.0\n0,1.0\n1,2.0\n0,1.0\n")
    (r,) = load_rasters([a], t_stop_ms=10.0)
    assert r.n_duplicates == 2 and r.n_spikes == 4


def test_missing_interval_is_inferred_with_a_warning(tmp_path):
    a = write(tmp_path, "a.csv", "0,1.0\n1,9.0\n")
    with pytest.warns(UserWarning, match="t_stop_ms"):
        (r,) = load_rasters([a])
    assert r.t_start_ms == 0.0 and r.t_stop_ms > 9.0 and r.n_spikes == 2


@pytest.mark.parametrize("text, message", [
    ("0,1.0\n1,abc\n", "line 2: spike time 'abc' is not a number"),
    ("0,x\n", "line 1: spike time 'x' is not a number"),
    ("0,1.0\n-3,2.0\n", "line 2: negative cell id '-3'"),
    ("0,1.0\n,2.0\n", "line 2: missing cell id"),
    ("0,1.0\n1.5,2.0\n", "line 2: cell id '1.5' is not an integer"),
    ("0,1.0\n1,nan\n", "line 2: spike time 'nan' is not finite"),
    ("0,1.0\n1,-inf\n", "line 2: spike time '-inf' is not finite"),
    ("0,1.0\n\n1,2.0,3.0\n", "line 3: expected 2 columns, found 3"),
    ("0,1.0\n1,2.0,3.0,4.0\n", "line 2: expected 2 columns, found 4"),
    ("0,1.0\n1\n", "line 2: expected 2 columns, found 1"),
    ("0,1.0\n1,\n", "line 2: missing spike time"),
    ("cell,time\n0,1\n0 5\n", "line 3: expected 2 columns, found 1"),
    ("", "line 1: file is empty"),
    ("\n  \n", "line 1: file is empty"),
])
def test_bad_text_files_name_file_and_line(tmp_path, text, message):
    path = write(tmp_path, "bad.csv", text)
    with pytest.raises(InputError) as err:
        load_rasters([path], t_stop_ms=10.0)
    assert str(err.value) == f"{path}: {message}"


def test_id_beyond_the_given_cell_count_names_the_line(tmp_path):
    path = write(tmp_path, "a.csv", "0,1.0\n0,2.0\n7,3.0\n")
    with pytest.raises(InputError, match=r"a.csv: line 3: cell id 7 but the raster has 5 cells"):
        load_rasters([path], n_cells=5, t_stop_ms=10.0)


def test_npz_files(tmp_path):
    np.savez(tmp_path / "a.npz", cell=np.array([1, 0]), time_ms=np.array([2.0, 3.0]))
    (r,) = load_rasters([tmp_path / "a.npz"], t_stop_ms=10.0)
    assert r.cell.tolist() == [0, 1] and r.time_ms.tolist() == [3.0, 2.0]
    np.savez(tmp_path / "b.npz", cell=np.array([0]))
    with pytest.raises(InputError, match=r"b.npz: key 'time_ms' missing"):
        load_rasters([tmp_path / "b.npz"])
    np.savez(tmp_path / "c.npz", cell=np.array([0, 1]), time_ms=np.array([1.0, np.inf]))
    with pytest.raises(InputError, match=r"c.npz: entry 1: spike time inf is not finite"):
        load_rasters([tmp_path / "c.npz"])
    np.savez(tmp_path / "d.npz", cell=np.array([0, -1]), time_ms=np.array([1.0, 2.0]))
    with pytest.raises(InputError, match=r"d.npz: entry 1: negative cell id -1"):
        load_rasters([tmp_path / "d.npz"])
    (tmp_path / "e.npz").write_text("not an npz")
    with pytest.raises(InputError, match=r"e.npz: not a readable NPZ file"):
        load_rasters([tmp_path / "e.npz"])


def test_run_folder_carries_cells_interval_and_groups(tmp_path):
    run = write_run(tmp_path / "run", [4, 0, 4], [50.0, 10.0, 20.0], n_cells=6, t_start_ms=0.0,
                    t_stop_ms=200.0)
    r = read_run_spikes(run)
    assert r.n_cells == 6 and (r.t_start_ms, r.t_stop_ms) == (0.0, 200.0)
    assert r.cell.tolist() == [0, 4, 4] and r.time_ms.tolist() == [10.0, 20.0, 50.0]
    assert r.group_names == ("exc", "inh") and r.group_first.tolist() == [0, 3]
    assert r.group_of(np.array([0, 2, 3, 5])).tolist() == [0, 0, 1, 1]
    assert as_raster(run).n_spikes == 3


def test_saved_run_object_reads_back(tmp_path):
    # The engine's own Run (spikegauge.runs), whose group_first carries a trailing boundary.
    from spikegauge.runs import Run
    run = Run(spikes=pd.DataFrame({"cell": np.array([3, 1], np.int64), "time_ms": [2.0, 4.0]}), n_cells=4,
              t_start_ms=0.0, t_stop_ms=10.0, group_names=("e", "i"), group_first=np.array([0, 2, 4]),
              settings={})
    for source in (run, run.save(tmp_path / "run")):
        (r,) = load_rasters([source])
        assert r.cell.tolist() == [1, 3] and r.group_first.tolist() == [0, 2] and r.n_cells == 4


def test_run_folders_of_different_networks_are_refused(tmp_path):
    a = write_run(tmp_path / "a", [0], [1.0], n_cells=6)
    b = write_run(tmp_path / "b", [0], [1.0], n_cells=7)
    with pytest.raises(InputError, match="different sizes"):
        load_rasters([a, b])


def test_run_object_and_dataframe_by_duck_typing():
    run = SimpleNamespace(spikes=pd.DataFrame({"cell": [1, 0], "time_ms": [5.0, 6.0]}), n_cells=3,
                          t_start_ms=0.0, t_stop_ms=50.0, group_names=["a", "b"], group_first=[0, 2])
    frame = pd.DataFrame({"cell": [0, 2], "time_ms": [6.5, 7.0]})
    r_run, r_frame = load_rasters([run, frame])
    assert r_run.n_cells == r_frame.n_cells == 3
    assert r_frame.t_stop_ms == 50.0 and r_frame.group_names == ("a", "b")
    assert r_run.cell.tolist() == [0, 1]
    with pytest.raises(InputError, match="row 1: negative cell id"):
        load_rasters([pd.DataFrame({"cell": [0, -2], "time_ms": [1.0, 2.0]})])
    with pytest.raises(InputError, match="column 'time_ms' missing"):
        load_rasters([pd.DataFrame({"cell": [0]})])


def test_raster_from_arrays_drops_spikes_outside_the_interval():
    r = Raster.from_arrays([0, 0, 0], [-1.0, 5.0, 10.0], n_cells=1, t_start_ms=0.0, t_stop_ms=10.0)
    assert r.time_ms.tolist() == [5.0]


def test_unknown_sources_and_options_are_refused(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        load_rasters([tmp_path / "missing.csv"])
    with pytest.raises(InputError, match="time unit"):
        load_rasters([pd.DataFrame({"cell": [0], "time_ms": [1.0]})], time_unit="h")
    with pytest.raises(InputError, match="cannot read spikes"):
        load_rasters([42])
