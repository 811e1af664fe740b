"""Reproducible to the bit.

The same scenario, seed and setting must give bit-identical spike arrays:
across two runs, across 1 and 2 numba threads, and across the serial, process
and Dask executors of a profile. Changing only a drive's rate must leave the
connectivity (and parameters and initial state) untouched. ``run.json`` must
record what reproducing a run needs, and that record must indeed reproduce it.
"""
from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import numba
import numpy as np
import pytest

import spikegauge
from spikegauge.network import build_network
from spikegauge.scenario import load_scenario, parse_scenario

LIF = "scenarios/demo-lif.toml"                      # current-based LIF, Poisson drive
LIF_COND = "scenarios/demo-lif-conductance.toml"     # conductance LIF, Poisson + step + spike file
SETTINGS = {
    "fixed-rk4": dict(strategy="fixed", stepper="rk4", dt_ms=0.05, crossing="hermite", delivery="exact"),
    "fixed-grid": dict(strategy="fixed", stepper="expeuler", dt_ms=0.1, crossing="step", delivery="grid"),
    "global-dp54": dict(strategy="global-adaptive", stepper="dp54", rtol=1e-4),
    "local-bs32": dict(strategy="local-adaptive", stepper="bs32", rtol=1e-4),
    "local-rodas3": dict(strategy="local-adaptive", stepper="rodas3", rtol=1e-4),
}
T_STOP_MS = 100.0


def _same_spikes(a, b):
    np.testing.assert_array_equal(a.spikes["cell"].to_numpy(), b.spikes["cell"].to_numpy())
    # Bit for bit: compare the float64 bit patterns, so even -0.0 against 0.0 would show.
    np.testing.assert_array_equal(a.spikes["time_ms"].to_numpy().view(np.int64),
                                  b.spikes["time_ms"].to_numpy().view(np.int64))


def _counters(run):
    return {k: v for k, v in run.cost.items()
            if "wall" not in k and "per_s" not in k and "compile" not in k and "cpu" not in k}


@pytest.fixture
def restore_threads():
    before = numba.get_num_threads()
    yield
    numba.set_num_threads(before)


@pytest.mark.parametrize("name", sorted(SETTINGS))
def test_bit_identical_across_runs_and_thread_counts(name, restore_threads):
    if numba.config.NUMBA_NUM_THREADS < 2:
        pytest.fail("this machine offers one numba thread; the check needs two")
    s = SETTINGS[name]
    one = spikegauge.simulate(LIF_COND, threads=1, t_stop_ms=T_STOP_MS, **s)
    again = spikegauge.simulate(LIF_COND, threads=1, t_stop_ms=T_STOP_MS, **s)
    two = spikegauge.simulate(LIF_COND, threads=2, t_stop_ms=T_STOP_MS, **s)
    assert one.status == "ok" and len(one.spikes) > 100
    assert one.settings["threads"] == 1 and two.settings["threads"] == 2
    for other in (again, two):
        _same_spikes(one, other)
        assert _counters(one) == _counters(other)


def test_exact_reference_is_bit_identical_across_thread_counts(restore_threads):
    one = spikegauge.simulate(LIF, strategy="exact", threads=1, t_stop_ms=T_STOP_MS)
    two = spikegauge.simulate(LIF, strategy="exact", threads=2, t_stop_ms=T_STOP_MS)
    assert len(one.spikes) > 100
    _same_spikes(one, two)


def test_changing_only_the_drive_rate_leaves_the_network_identical():
    text = Path(LIF).read_text()
    faster = re.sub(r"rate_hz = 800\.0", "rate_hz = 950.0", text)
    assert faster != text
    a = build_network(parse_scenario(text, source=Path(LIF)))
    b = build_network(parse_scenario(faster, source=Path(LIF)))
    for field in ("syn_ptr", "syn_target", "syn_delay_ms", "syn_weight", "syn_receptor", "params", "y0",
                  "cell_model", "n_states", "group_first"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field), err_msg=field)
    assert a.d_min_ms == b.d_min_ms
    # ... while the drive did change, and only where it was asked to.
    assert [float(d.rate_hz[0]) for d in a.poisson] == [800.0, 400.0]
    assert [float(d.rate_hz[0]) for d in b.poisson] == [950.0, 400.0]
    from spikegauge.network.drive import DriveStream
    ea, eb = DriveStream(a).take(0.0, 50.0), DriveStream(b).take(0.0, 50.0)
    assert eb[0].size > ea[0].size
    # The untouched drive (id 1, into 'inh') draws the very same events.
    keep_a, keep_b = ea[4] == -2, eb[4] == -2
    np.testing.assert_array_equal(ea[0][keep_a], eb[0][keep_b])
    np.testing.assert_array_equal(ea[1][keep_a], eb[1][keep_b])


def test_run_json_records_what_reproduces_the_run(tmp_path, restore_threads):
    run = spikegauge.simulate(LIF_COND, threads=2, t_stop_ms=100.0, **SETTINGS["global-dp54"])
    doc = json.loads((run.save(tmp_path / "run") / "run.json").read_text())
    text = Path(LIF_COND).read_text()
    assert doc["scenario_text"] == text
    assert doc["scenario_digest"] == hashlib.sha256(text.encode()).hexdigest()
    assert doc["seed"] == load_scenario(LIF_COND).seed
    assert doc["settings"]["threads"] == 2
    for key, value in SETTINGS["global-dp54"].items():
        assert doc["settings"][key] == value
    assert doc["t_requested_ms"] == 100.0
    versions = doc["versions"]
    assert versions["spikegauge"] == spikegauge.__version__
    # The dependencies whose code computes a run: the kernels (numba, numpy), the
    # rest state and truncated-normal draws (scipy), the tables (pandas), Python.
    import scipy
    for name, module_version in (("numpy", np.__version__), ("numba", numba.__version__),
                                 ("scipy", scipy.__version__)):
        assert versions.get(name) == module_version, (name, versions)
    assert "python" in versions and "pandas" in versions

    # The record is enough: the text (files it names resolve from the recorded path)
    # and the settings rerun the same spikes.
    scen = parse_scenario(doc["scenario_text"], source=doc["scenario_path"])
    s = {k: v for k, v in doc["settings"].items() if k in ("strategy", "stepper", "dt_ms", "crossing",
                                                           "delivery", "rtol", "atol")}
    rerun = spikegauge.simulate(scen, threads=1, t_stop_ms=doc["t_requested_ms"], **s)
    _same_spikes(run, rerun)


def test_bit_identical_across_serial_process_and_dask_executors():
    from distributed import LocalCluster

    from spikegauge.profile.executors import DaskExecutor, ProcessExecutor, SerialExecutor
    from spikegauge.simulation import resolve_settings

    path = Path(LIF_COND).resolve()
    text = re.sub(r"duration_ms = 1000\.0", "duration_ms = 100.0", path.read_text())
    digest = hashlib.sha256(text.encode()).hexdigest()
    tasks = [dict(scenario_text=text, scenario_source=str(path), scenario_digest=digest, seed=seed,
                  settings=resolve_settings(None, **SETTINGS[name]), probe=None, record_steps=None,
                  threads=None, digest=f"{name}-{seed}")
             for name in ("fixed-rk4", "local-bs32", "global-dp54") for seed in (11, 12)]

    def run_all(executor):
        try:
            runs = dict(executor.run(tasks))
        finally:
            executor.close()
        assert sorted(runs) == list(range(len(tasks)))
        return [runs[i] for i in range(len(tasks))]

    serial = run_all(SerialExecutor())
    processes = run_all(ProcessExecutor(2))
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        dask = run_all(DaskExecutor(cluster.scheduler_address))
    for i, task in enumerate(tasks):
        assert serial[i].status == "ok" and len(serial[i].spikes) > 50, (task["digest"], serial[i].message)
        for other in (processes[i], dask[i]):
            _same_spikes(serial[i], other)
            assert _counters(serial[i]) == _counters(other)
    # The two seeds are different networks: the comparison above is not trivially true.
    assert len(serial[0].spikes) != len(serial[1].spikes) or not np.array_equal(
        serial[0].spikes["time_ms"], serial[1].spikes["time_ms"])
