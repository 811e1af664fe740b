"""``spikegauge compare`` on hand-written CSV files and on run folders."""
import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

import spikegauge.cli.compare  # noqa: F401  (registers the command on the group)
from spikegauge.analysis import perturbed, poisson_raster
from spikegauge.cli.main import cli


def invoke(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


@pytest.fixture
def csv_pair(tmp_path):
    # Hand-written: cell 0 shifted by +0.5 ms, cell 1's spike at 20 ms missed, an extra spike at 45 ms in cell 2.
    ref = tmp_path / "reference.csv"
    ref.write_text("cell,time_ms\n0,10.0\n1,20.0\n2,30.0\n")
    test = tmp_path / "candidate.csv"
    test.write_text("2,45.0\n0,10.5\n2,30.0\n")       # unsorted, no header
    return ref, test


def write_run(folder, raster):
    folder.mkdir()
    np.savez(folder / "spikes.npz", cell=raster.cell, time_ms=raster.time_ms, n_cells=raster.n_cells,
             t_start_ms=raster.t_start_ms, t_stop_ms=raster.t_stop_ms,
             group_names=np.array(["exc", "inh"]), group_first=np.array([0, 8]))
    return folder


def test_two_hand_written_csv_files(tmp_path, csv_pair):
    ref, test = csv_pair
    out = tmp_path / "out"
    result = invoke("compare", ref, test, "--cells", 4, "--t-stop-ms", 100, "--out", out)
    assert result.exit_code == 0, result.output
    lines = result.output.splitlines()
    assert lines[0] == "reference " + str(ref) + ": 3 spikes, 4 cells, 0-100 ms"
    header, row = lines[1].split(), lines[2].split()
    assert row[0] == "candidate" and dict(zip(header[1:4], row[1:4])) == {"matched": "2", "missed": "1",
                                                                         "extra": "1"}
    doc = json.loads((out / "comparison.json").read_text())
    s = doc["tests"]["candidate"]["summary"]
    assert (s["matched"], s["missed"], s["extra"], s["shift_max_abs_ms"]) == (2, 1, 1, 0.5)
    per_cell = pd.read_csv(out / "per_cell.csv")
    assert len(per_cell) == 4 and per_cell["test"].unique().tolist() == ["candidate"]
    pairs = pd.read_csv(out / "pairs.csv")
    assert pairs["shift_ms"].tolist() == [0.5, 0.0]
    figures = sorted(p.name for p in (out / "figures").iterdir())
    assert figures == ["error_over_time.png", "jitter_histogram.png", "jitter_vs_rate.png",
                       "raster_difference.png"]
    # The legend under the table explains the column heads; the figure's subset is printed.
    assert header[4] == "(missed+extra)/ref" and row[4] == "66.67%"
    assert "(missed+extra)/ref: missed plus extra spikes per reference spike" in lines
    assert any(line.startswith("vR: van Rossum distance (tau 5 ms)") for line in lines)
    assert any(line.startswith("Γ: coincidence factor (window 2 ms)") for line in lines)
    assert "figures/raster_difference.png shows all 3 firing cells of 4, 0-100 ms (the whole interval)" in lines


def test_front_figure_with_costs(tmp_path, csv_pair):
    ref, test = csv_pair
    costs = tmp_path / "costs.csv"
    costs.write_text("candidate 2.5\n")
    result = invoke("compare", ref, test, "--t-stop-ms", 100, "--costs", costs, "--out", tmp_path / "o")
    assert result.exit_code == 0, result.output
    assert (tmp_path / "o" / "figures" / "front.png").exists()
    assert result.output.splitlines()[1].split()[-2:] == ["cost", "front"]


def test_two_run_folders_with_costs(tmp_path):
    rng = np.random.default_rng(0)
    ref = poisson_raster(16, 20.0, 500.0, rng)
    runs = [write_run(tmp_path / "ref", ref),
            write_run(tmp_path / "dt_0.1", perturbed(ref, rng, jitter_ms=0.05, drop=0.0, add=0.0)),
            write_run(tmp_path / "dt_0.5", perturbed(ref, rng, jitter_ms=0.5, drop=0.05, add=0.05))]
    costs = tmp_path / "costs.csv"
    costs.write_text("name,cost\ndt_0.1,5.0\ndt_0.5,1.0\n")
    out = tmp_path / "out"
    result = invoke("compare", *runs, "--costs", costs, "--no-figures", "--out", out)
    assert result.exit_code == 0, result.output
    assert "16 cells, 0-500 ms" in result.output
    doc = json.loads((out / "comparison.json").read_text())
    assert set(doc["tests"]) == {"dt_0.1", "dt_0.5"} and doc["front"] == ["dt_0.5", "dt_0.1"]
    assert doc["tests"]["dt_0.1"]["summary"]["mismatch_fraction"] == 0.0
    assert sorted(doc["tests"]["dt_0.1"]["per_group"][i]["group"] for i in range(2)) == ["exc", "inh"]
    assert not (out / "figures").exists()
    per_cell = pd.read_csv(out / "per_cell.csv")
    assert len(per_cell) == 32


def test_json_costs_and_unknown_names(tmp_path, csv_pair):
    ref, test = csv_pair
    costs = tmp_path / "costs.json"
    costs.write_text('{"candidate": 2.5}')
    result = invoke("compare", ref, test, "--t-stop-ms", 100, "--costs", costs, "--no-figures",
                    "--out", tmp_path / "o")
    assert result.exit_code == 0, result.output
    assert json.loads((tmp_path / "o" / "comparison.json").read_text())["front"] == ["candidate"]
    costs.write_text('{"other": 2.5}')
    result = invoke("compare", ref, test, "--t-stop-ms", 100, "--costs", costs, "--out", tmp_path / "o")
    assert result.exit_code == 2 and "costs for unknown test(s) other" in result.output


def test_duplicates_are_reported(tmp_path, csv_pair):
    ref, _ = csv_pair
    dup = tmp_path / "dup.csv"
    dup.write_text("0,10.0\n0,10.0\n1,20.0\n")
    result = invoke("compare", ref, dup, "--t-stop-ms", 100, "--no-figures", "--out", tmp_path / "o")
    assert result.exit_code == 0
    assert "dup (" in result.output and "1 duplicate spike(s)" in result.output


def test_time_unit_seconds(tmp_path):
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    a.write_text("0,0.010\n")
    b.write_text("0,0.0105\n")
    result = invoke("compare", a, b, "--time-unit", "s", "--t-stop-ms", 100, "--no-figures",
                    "--out", tmp_path / "o")
    assert result.exit_code == 0, result.output
    pairs = pd.read_csv(tmp_path / "o" / "pairs.csv")
    assert pairs["shift_ms"].tolist() == pytest.approx([0.5])


@pytest.mark.parametrize("text, message", [
    ("0,1.0\n1,abc\n", "line 2: spike time 'abc' is not a number"),
    ("0,1.0\n-1,2.0\n", "line 2: negative cell id '-1'"),
    ("0,1.0\n,2.0\n", "line 2: missing cell id"),
    ("0,1.0\n1,nan\n", "line 2: spike time 'nan' is not finite"),
    ("0,1.0\n1,inf\n", "line 2: spike time 'inf' is not finite"),
    ("0,1.0\n1,2.0,3.0\n", "line 2: expected 2 columns, found 3"),
    ("0,1.0\n1\n", "line 2: expected 2 columns, found 1"),
    ("", "line 1: file is empty"),
])
def test_bad_files_give_one_line_and_status_2(tmp_path, csv_pair, text, message):
    ref, _ = csv_pair
    bad = tmp_path / "bad.csv"
    bad.write_text(text)
    result = invoke("compare", ref, bad, "--t-stop-ms", 100, "--out", tmp_path / "o")
    assert result.exit_code == 2
    assert result.output == f"error: {bad}: {message}\n"
