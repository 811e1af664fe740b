"""The report: rebuilt from stored results, every number equal to results.csv / profile.json."""
from __future__ import annotations

import json
import re

import pandas as pd
from click.testing import CliRunner

import spikegauge.cli.profile  # noqa: F401  (registers the command)
import spikegauge.cli.report  # noqa: F401
from spikegauge.cli.main import cli
from spikegauge.report.report import fmt

from test_advice import SWEEP
from test_profile import TINY


def test_report_numbers_match_the_results(tmp_path):
    scen = tmp_path / "tiny.toml"
    scen.write_text(TINY + SWEEP)
    out = tmp_path / "p"
    res = CliRunner().invoke(cli, ["profile", str(scen), "--out", str(out), "--quiet", "--seeds", "2"],
                             catch_exceptions=False)
    assert res.exit_code == 0, res.output
    before = {p: p.stat().st_mtime_ns for p in (out / "points").rglob("spikes.npz")}
    res = CliRunner().invoke(cli, ["report", str(out)], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    # nothing was rerun
    assert {p: p.stat().st_mtime_ns for p in (out / "points").rglob("spikes.npz")} == before

    md = (out / "report.md").read_text()
    page = (out / "report.html").read_text()
    table = pd.read_csv(out / "results.csv").set_index("point")
    doc = json.loads((out / "profile.json").read_text())
    assert (table["status"] == "ok").all(), table[["label", "status", "message"]].to_string()
    figures = sorted(p.name for p in (out / "figures").glob("*.png"))
    assert {"front.png", "front_work.png", "convergence.png", "raster_recommended.png",
            "error_growth.png", "steps_local-adaptive.png", "steps_global-adaptive.png",
            "steps_vs_rate.png"} <= set(figures)
    # the raster of the best fixed step is the verdict's, not merely the coarsest one
    best_fixed = doc["verdict"]["cheapest"].get("fixed")
    shows_fixed = best_fixed is not None and best_fixed["point"] != doc["verdict"]["recommended"]["point"]
    assert ("raster_best_fixed_step.png" in figures) == shows_fixed
    # self-contained: every figure embedded, no external file referenced
    assert page.count("src='data:image/png;base64,") == len(figures)
    assert "src='figures/" not in page
    # the verdict comes first
    assert md.index("## Verdict") < md.index("## Reference") < md.index("## Figures")
    assert doc["verdict"]["text"] in md
    # two seeds: two references, two ladders, the verdict says how often it held
    assert doc["seeds"] == [4, 5] and len(doc["references"]) == 2 and len(doc["ladder"]) == 2
    assert f"held for {doc['verdict']['seeds_held']} of 2 seeds" in doc["verdict"]["text"]

    # the cheapest-per-strategy rows carry the results.csv values
    section = md[md.index("## Cheapest setting"):md.index("## How the sweep ran")]
    rows = {line.split("|")[1].strip(): [c.strip() for c in line.split("|")[1:-1]]
            for line in section.splitlines() if re.match(r"\| (fixed|global-adaptive|local-adaptive) \|", line)}
    assert set(rows) == set(doc["verdict"]["cheapest"])
    for strategy, c in doc["verdict"]["cheapest"].items():
        r = table.loc[c["point"]]
        assert rows[strategy][1] == r["label"]
        assert rows[strategy][3:9] == [fmt(r["cpu_s"]), fmt(r["work"]), fmt(1e6 * r["cpu_s"] / r["steps"]),
                                       fmt(r["target_shift_rms_ms"]), fmt(r["target_mismatch_fraction"]),
                                       fmt(r["steps_per_cell_ms"])]
    # the reference's uncertainty and the horizons as profile.json has them
    u = doc["references"][0]["uncertainty"]
    assert f"RMS {fmt(u['shift_rms_ms'])} ms" in md
    for kind, p in doc["ladder"][0]["probes"].items():
        assert re.search(rf"\| {kind} \| {re.escape(fmt(p['size']))} \| >? ?{re.escape(fmt(p['median_horizon_ms']))} ms \|", md)
    for f in doc["fits"]:
        assert f"{fmt(f['slope'])} ± {fmt(f['stderr'])}" in md
