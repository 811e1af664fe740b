"""Rasters written as SONATA spike files by simulate and profile, read back.

Outside reference: h5py reads the written files following the SONATA spike-file
layout (dataset and attribute names of the published specification), so other
tools can read what we write; the round trip through our reader compares
identical to the run itself.
"""
from __future__ import annotations

import json

import h5py
import numpy as np
from click.testing import CliRunner

from spikegauge.analysis import as_raster, compare, read_run_spikes
from spikegauge.cli.main import cli
from spikegauge.formats import read_sonata_spikes
from test_profile import SWEEP, TINY

SCENARIO = """
[scenario]
name = "roundtrip"
duration_ms = 300.0
seed = 5

[[group]]
name = "exc"
size = 16
model = "lif-current"

[[group]]
name = "inh"
size = 4
model = "lif-current"

[[pathway]]
source = "exc"
target = "inh"
connect = "sources-per-target"
sources_per_target = 4
receptor = "excitatory"
weight_pa = 60.0
delay_ms = 1.5

[[drive]]
target = "exc"
kind = "poisson"
rate_hz = 3000.0
receptor = "excitatory"
weight_pa = 40.0

[[drive]]
target = "inh"
kind = "poisson"
rate_hz = 1500.0
receptor = "excitatory"
weight_pa = 40.0
"""


def test_simulate_sonata_round_trip_compares_identical(tmp_path):
    scen = tmp_path / "s.toml"
    scen.write_text(SCENARIO)
    out = tmp_path / "run"
    res = CliRunner().invoke(cli, ["simulate", str(scen), "--dt-ms", "0.05", "--stepper", "rk2",
                                   "--crossing", "linear", "--sonata", "--quiet", "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert "spikes.h5" in res.output
    run = read_run_spikes(out)
    assert run.n_spikes > 50, "the scenario must make the check meaningful"

    # The layout of the published specification, read with h5py alone.
    with h5py.File(out / "spikes.h5", "r") as f:
        assert int(f.attrs["magic"]) == 0x0A7A
        g = f["spikes/network"]
        assert h5py.check_enum_dtype(g.attrs.get_id("sorting").dtype) == {"none": 0, "by_id": 1, "by_time": 2}
        assert int(g.attrs["sorting"]) == 1                                  # by_id
        assert g["node_ids"].dtype == np.uint64 and g["timestamps"].dtype == np.float64
        assert g["timestamps"].attrs["units"] in ("ms", b"ms")
        assert np.array_equal(g["node_ids"][:], run.cell) and np.array_equal(g["timestamps"][:], run.time_ms)

    back = as_raster(out / "spikes.h5")
    assert (back.n_cells, back.t_start_ms, back.t_stop_ms) == (run.n_cells, run.t_start_ms, run.t_stop_ms)
    assert back.group_names == ("exc", "inh") and back.group_first.tolist() == [0, 16]
    c = compare(out, out / "spikes.h5")
    s = c.summary
    assert s["matched"] == s["n_ref"] == s["n_test"] == run.n_spikes
    assert s["missed"] == s["extra"] == 0 and s["shift_max_abs_ms"] == 0.0
    assert json.dumps(compare(out / "spikes.h5", out / "spikes.h5").summary, sort_keys=True) == \
        json.dumps(compare(out, out).summary, sort_keys=True)


def test_profile_sonata_writes_every_point(tmp_path):
    scen = tmp_path / "tiny.toml"
    scen.write_text(TINY + SWEEP)
    out = tmp_path / "p"
    res = CliRunner().invoke(cli, ["profile", str(scen), "--out", str(out), "--quiet", "--sonata"])
    assert res.exit_code == 0, res.output
    points = sorted((out / "points").iterdir())
    assert points and all((p / "spikes.h5").is_file() for p in points)
    assert f"SONATA spike files: {len(points)} written" in res.output
    for p in points:   # (a failed point has an empty interval, which a comparison refuses: read the table)
        a, b = read_run_spikes(p), read_sonata_spikes(p / "spikes.h5")
        assert np.array_equal(a.cell, b.cell) and np.array_equal(a.time_ms, b.time_ms)
        assert (a.n_cells, a.t_start_ms, a.t_stop_ms) == (b.n_cells, b.t_start_ms, b.t_stop_ms)
