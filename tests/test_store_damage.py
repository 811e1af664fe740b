"""A damaged point store: found, reported once, computed again, never read into a table.

A profile is run; then its stored points are damaged the ways a disk or a
careless copy damages files: ``spikes.npz`` cut short or overwritten with
other bytes, ``run.json`` cut short or replaced by a JSON document that is no
run record, a point folder holding another point's files, a ``comparison.json``
cut short. The profile run again must name each damaged point once, compute
exactly the damaged points again, and write the same table as before (time
columns aside).
"""
from __future__ import annotations

import json
import re
import shutil
import warnings

import pandas as pd
import pytest
from click.testing import CliRunner

import spikegauge.cli.profile  # noqa: F401  (registers the command)
from spikegauge.cli.main import cli
from spikegauge.errors import InputError
from spikegauge.profile import run_profile
from spikegauge.profile.store import DamagedPointWarning, PointStore
from spikegauge.runs import load_run

from test_profile import SWEEP, TINY


def _time_free(table: pd.DataFrame) -> pd.DataFrame:
    """Drop the columns that depend on the machine's speed (names with wall, cpu, compile, per_s)."""
    timed = [c for c in table.columns if any(w in c for w in ("wall", "cpu", "compile", "per_s"))]
    return table.drop(columns=timed)


def _cut(path, keep=0.5):
    data = path.read_bytes()
    path.write_bytes(data[:int(len(data) * keep)])


@pytest.fixture(scope="module")
def profiled(tmp_path_factory):
    root = tmp_path_factory.mktemp("damage")
    scen = root / "tiny.toml"
    scen.write_text(TINY + SWEEP)
    out = root / "whole"
    run_profile(scen, out)
    return scen, out


def _points(out):
    return sorted(d.name for d in (out / "points").iterdir() if not d.name.startswith("."))


def test_saved_points_record_their_digest(profiled):
    _, out = profiled
    for digest in _points(out):
        assert json.loads((out / "points" / digest / "run.json").read_text())["point_digest"] == digest


def test_each_kind_of_damage_is_found_reported_once_and_recomputed(profiled, tmp_path):
    scen, whole = profiled
    out = tmp_path / "copy"
    shutil.copytree(whole, out)
    points = _points(out)
    before = _time_free(pd.read_csv(out / "results.csv"))
    compared = [d for d in points[1:] if (out / "points" / d / "comparison.json").is_file()]
    victims = compared[-1:] + [d for d in points[1:] if d not in compared[-1:]][-5:]
    p = {name: out / "points" / d for name, d in zip(
        ("comparison_cut", "npz_cut", "npz_garbage", "json_cut", "json_other", "foreign"), victims)}
    _cut(p["npz_cut"] / "spikes.npz")
    (p["npz_garbage"] / "spikes.npz").write_bytes(b"\x00not a zip file\xff" * 64)
    _cut(p["json_cut"] / "run.json")
    (p["json_other"] / "run.json").write_text(json.dumps({"note": "valid JSON, not a run"}))
    # a folder that holds another point's files (copied under the wrong name)
    shutil.rmtree(p["foreign"])
    shutil.copytree(out / "points" / points[0], p["foreign"])
    _cut(p["comparison_cut"] / "comparison.json")
    damaged_runs = {p[k].name for k in ("npz_cut", "npz_garbage", "json_cut", "json_other", "foreign")}

    # the store's verdict, point by point
    store = PointStore(out)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for digest in points:
            assert store.has(digest) == (digest not in damaged_runs), digest
            assert store.has(digest) == (digest not in damaged_runs), digest  # asked twice...
    assert sorted(d for d, _ in store.damaged) == sorted(damaged_runs)       # ...reported once
    assert len([w for w in caught if issubclass(w.category, DamagedPointWarning)]) == len(damaged_runs)
    reasons = dict(store.damaged)
    assert "belongs to point " + points[0] in reasons[p["foreign"].name]
    assert "not a run record" in reasons[p["json_other"].name]
    for digest in damaged_runs:
        with pytest.raises(InputError):
            store.load(digest)                 # never handed out as a run

    # the profile again: each damaged point named once, exactly those computed again
    res = CliRunner().invoke(cli, ["profile", str(scen), "--out", str(out), "--quiet"],
                             catch_exceptions=False)
    assert res.exit_code == 0, res.output
    named = [m.group(1) for m in re.finditer(r"^warning: damaged point (\w+) ", res.stderr, re.M)]
    assert sorted(named) == sorted(damaged_runs | {p["comparison_cut"].name})     # each once
    doc = json.loads((out / "profile.json").read_text())
    # the first run's timing stays; this rerun's own is added
    assert doc["reruns"][-1]["points_computed"] == len(damaged_runs)
    assert doc["timing"]["points_computed"] > len(damaged_runs)
    pd.testing.assert_frame_equal(_time_free(pd.read_csv(out / "results.csv")), before, check_exact=True)
    for digest in points:
        run = load_run(out / "points" / digest)
        assert run.meta["point_digest"] == digest
    json.loads((p["comparison_cut"] / "comparison.json").read_text())      # rewritten whole


def test_the_library_reports_damage_as_warnings(profiled, tmp_path):
    scen, whole = profiled
    out = tmp_path / "copy"
    shutil.copytree(whole, out)
    victim = _points(out)[3]
    _cut(out / "points" / victim / "spikes.npz", keep=0.9)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        run_profile(scen, out)
    found = [w for w in caught if issubclass(w.category, DamagedPointWarning)]
    assert len(found) == 1 and victim in str(found[0].message)
    assert load_run(out / "points" / victim).meta["point_digest"] == victim
