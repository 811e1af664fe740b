"""The README's examples run as written: the scenario, the model list, the sweep file, the Python snippets."""
from __future__ import annotations

import contextlib
import io
import re
from pathlib import Path

import pytest
from click.testing import CliRunner

from spikegauge.cli import main  # noqa: F401  (registers every command)
from spikegauge.cli.main import cli
from spikegauge.profile import run_profile
from spikegauge.profile.sweep import load_sweep_file
from spikegauge.scenario import load_scenario, parse_scenario

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def section(title: str) -> str:
    """The text of the README section (any heading level) called ``title``, up to the next heading."""
    match = re.search(rf"^#+ {re.escape(title)}\n(.*?)(?=^#+ |\Z)", README, flags=re.S | re.M)
    assert match, f"README has no section {title!r}"
    return match.group(1)


def blocks(text: str, lang: str) -> list[str]:
    return re.findall(rf"^```{lang}\n(.*?)^```", text, flags=re.S | re.M)


def test_scenario_example_is_a_valid_scenario():
    (toml,) = blocks(section("Scenario files"), "toml")
    scenario = parse_scenario(toml)
    (pathway,) = scenario.pathways
    assert pathway.connect == "random" and pathway.p_connect == 0.2


def test_model_list_is_what_the_command_prints():
    (shown,) = blocks(section("Models and their keys"), "")
    command, *printed = shown.splitlines()
    assert command == "$ spikegauge models"
    res = CliRunner().invoke(cli, ["models"])
    assert res.exit_code == 0 and res.output.splitlines() == printed


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    """A folder like the repository root after the README's first command (with the sweep file)."""
    d = tmp_path_factory.mktemp("readme")
    (d / "scenarios").symlink_to(ROOT / "scenarios")
    (toml,) = blocks(section("The sweep file"), "toml")
    (d / "sweep.toml").write_text(toml)
    with contextlib.chdir(d):
        run_profile("scenarios/demo-profile.toml", "demo-profile", sweep_file="sweep.toml")
    return d


def test_sweep_file_example_expands_as_its_comments_say(workdir):
    settings = load_sweep_file(workdir / "sweep.toml")
    assert len(settings) == 4 + 2
    assert [s["stepper"] for s in settings[:4]] == ["rk2", "rk2", "rk4", "rk4"]
    assert {s["strategy"] for s in settings[4:]} == {"local-adaptive"}


def test_python_snippets_run(workdir):
    snippets = blocks(section("From Python"), "python")
    assert len(snippets) == 3
    namespace = {}
    out = io.StringIO()
    with contextlib.chdir(workdir), contextlib.redirect_stdout(out):
        for code in snippets:
            exec(compile(code, "README.md", "exec"), namespace)
    # The objects the snippets name are what the text says they are.
    assert namespace["ref"].status == "ok" and namespace["ref"].t_stop_ms == 300.0
    assert len(namespace["cells"]) == namespace["scenario"].n_cells
    assert list(namespace["tests"].to_frame()["test"]) == ["rk2 dt=0.1", "rk2 dt=0.05"]
    # the sweep file's 6 settings, and what the sweep added at its edges
    assert (namespace["results"]["origin"] == "sweep").sum() == 6 and "verdict" in namespace["profile"]
    assert namespace["profile"]["verdict"]["text"] in out.getvalue()


def test_benchmark_network_table_matches_the_bundled_short_copies():
    text = section("Published benchmark networks")
    (commands,) = blocks(text, "")
    named = set(re.findall(r"scenarios/(\S+\.toml)", commands))
    assert named == {f"brette2007-lif-{m}{s}.toml" for m in ("conductance", "current") for s in ("", "-short")}
    for name in named:
        assert (ROOT / "scenarios" / name).is_file()
    # The table's "profiled" column states each short copy's size and duration.
    rows = re.findall(r"^\| `(brette2007-[a-z-]+)` .*$", text, flags=re.M)
    assert sorted(rows) == ["brette2007-lif-conductance", "brette2007-lif-current"]
    for row in rows:
        sc = load_scenario(ROOT / "scenarios" / f"{row}-short.toml")
        line = next(l for l in text.splitlines() if l.startswith(f"| `{row}`"))
        assert f"{sc.n_cells} cells, {sc.duration_ms:g} ms (`-short`)" in line
