"""simulate(), run files and the simulate command: outside checks and behaviour."""
import numba
import numpy as np
import pytest
from click.testing import CliRunner
from scipy.integrate import solve_ivp

import spikegauge
from spikegauge.cli.main import cli
from spikegauge.models import get_model
from spikegauge.bench import SINGLE_HH_TOML as SINGLE_HH
from spikegauge.models.kernels import rhs



def _write(tmp_path, text, name="s.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


@pytest.fixture(scope="module")
def hh_reference_spikes():
    """Spike times of one HH cell at 10 uA/cm2 from rest, 1000 ms, by scipy DOP853.

    Outside reference: scipy.integrate.solve_ivp (DOP853, rtol = atol = 1e-12) with
    an upward event at 0 mV, on the package's right-hand side (the method and
    tolerances of the SPEC.md single-HH reference).
    """
    spec = get_model("hh-squid")
    p = spec.default_params()
    p[0] = 10.0
    from spikegauge.models import steady_state_at
    y0 = steady_state_at(spec, p[None, :], np.array([-65.0]))[0]
    out = np.empty(spec.n_states)

    def f(t, y):
        rhs(spec.code, np.ascontiguousarray(y), p, False, out)
        return out.copy()

    def ev(t, y):
        return y[0]
    ev.direction = 1
    sol = solve_ivp(f, (0.0, 1000.0), y0, method="DOP853", rtol=1e-12, atol=1e-12, events=ev)
    return sol.t_events[0]


def test_hh_rk4_hermite_matches_dop853(tmp_path, hh_reference_spikes):
    # Outside reference: scipy DOP853 at 1e-12 (fixture). SPEC.md measured 1.2e-7 ms
    # for RK4 + Hermite crossing at dt 0.005 ms; the issue bounds it by 1e-6 ms.
    run = spikegauge.simulate(_write(tmp_path, SINGLE_HH.format(duration=1000.0)),
                              strategy="fixed", stepper="rk4", crossing="hermite",
                              delivery="exact", dt_ms=0.005)
    t = run.spikes["time_ms"].to_numpy()
    assert t.size == hh_reference_spikes.size == 69   # SPEC.md: 69 spikes
    assert np.max(np.abs(t - hh_reference_spikes)) < 1e-6
    # Steady firing 68.32 Hz at 10 uA/cm2 (CHECKS.md, computed from the 1952 equations).
    assert 1000.0 / np.mean(np.diff(t[-20:])) == pytest.approx(68.32, abs=0.1)


def test_euler_on_bench_hh_diverges_with_a_time():
    # A too-large explicit step is a result, not a crash (issue 3): euler at 0.2 ms on HH.
    run = spikegauge.simulate("scenarios/bench-hh.toml", stepper="euler", crossing="linear",
                              delivery="grid", dt_ms=0.2, t_stop_ms=50.0)
    assert run.status == "diverged"
    assert "diverged at t =" in run.message
    assert 0.0 < run.t_stop_ms < 50.0
    assert (run.spikes["time_ms"] <= run.t_stop_ms).all()


@pytest.mark.parametrize("settings", [
    dict(stepper="rk2", crossing="linear", delivery="grid", dt_ms=0.1),
    dict(stepper="rk4", crossing="hermite", delivery="exact", dt_ms=0.05),
])
def test_bit_identical_across_runs_and_threads(settings):
    if numba.config.NUMBA_NUM_THREADS < 2:
        pytest.fail("this machine offers one numba thread; the check needs two")
    a = spikegauge.simulate("scenarios/demo-lif.toml", threads=1, t_stop_ms=300.0, **settings)
    b = spikegauge.simulate("scenarios/demo-lif.toml", threads=2, t_stop_ms=300.0, **settings)
    c = spikegauge.simulate("scenarios/demo-lif.toml", threads=2, t_stop_ms=300.0, **settings)
    assert len(a.spikes) > 100
    for other in (b, c):
        np.testing.assert_array_equal(a.spikes["cell"].to_numpy(), other.spikes["cell"].to_numpy())
        np.testing.assert_array_equal(a.spikes["time_ms"].to_numpy(), other.spikes["time_ms"].to_numpy())
    assert {k: v for k, v in a.cost.items() if not k.endswith("_s")} == \
           {k: v for k, v in b.cost.items() if not k.endswith("_s")}


def test_state_traces_are_recorded_on_the_grid(tmp_path):
    run = spikegauge.simulate(_write(tmp_path, SINGLE_HH.format(duration=20.0)), stepper="rk4",
                              crossing="hermite", delivery="exact", dt_ms=0.01,
                              record_cells=[0], record_interval_ms=0.5)
    tr = run.traces
    assert len(tr) == 40
    np.testing.assert_allclose(tr["time_ms"].to_numpy(), np.arange(1, 41) * 0.5, atol=1e-12)
    assert tr["state0"].max() > 0.0        # the first spike from rest peaks above 0 mV
    # the trace does not change the run itself
    plain = spikegauge.simulate(_write(tmp_path, SINGLE_HH.format(duration=20.0)), stepper="rk4",
                                crossing="hermite", delivery="exact", dt_ms=0.01)
    np.testing.assert_array_equal(plain.spikes["time_ms"], run.spikes["time_ms"])


def test_adaptive_options_are_refused_for_fixed_and_back():
    with pytest.raises(spikegauge.InputError, match="rtol"):
        spikegauge.simulate("scenarios/demo-lif.toml", strategy="fixed", rtol=1e-3, t_stop_ms=1.0)
    with pytest.raises(spikegauge.InputError, match="crossing"):
        spikegauge.simulate("scenarios/demo-lif.toml", strategy="fixed", crossing="dense", t_stop_ms=1.0)
    with pytest.raises(spikegauge.InputError, match="delivery"):
        spikegauge.simulate("scenarios/demo-lif.toml", strategy="local-adaptive", rtol=1e-4,
                            delivery="grid", t_stop_ms=1.0)
    with pytest.raises(spikegauge.InputError, match="stepper"):
        spikegauge.simulate("scenarios/demo-lif.toml", strategy="fixed", stepper="rk7", t_stop_ms=1.0)


def test_grid_delivery_refuses_delay_shorter_than_step():
    with pytest.raises(spikegauge.InputError, match="delay"):
        spikegauge.simulate("scenarios/demo-lif.toml", delivery="grid", dt_ms=5.0, t_stop_ms=10.0)


def test_simulate_command_writes_a_run_folder(tmp_path):
    out = tmp_path / "run"
    res = CliRunner().invoke(cli, ["simulate", "scenarios/demo-lif.toml", "--stepper", "rk2",
                                   "--dt-ms", "0.1", "--crossing", "linear", "--delivery", "grid",
                                   "--csv", "--quiet", "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert "mean rate" in res.output
    run = spikegauge.load_run(out)
    assert run.settings["stepper"] == "rk2" and len(run.spikes) > 0
    assert (out / "spikes.csv").exists()
    assert run.meta["scenario_digest"] and "demo-lif" in run.meta["scenario_text"]


def test_simulate_command_input_error_exit_2(tmp_path):
    res = CliRunner().invoke(cli, ["simulate", "scenarios/demo-lif.toml", "--strategy", "fixed",
                                   "--rtol", "1e-3", "--out", str(tmp_path / "x")])
    assert res.exit_code == 2
    assert res.output.count("\n") == 1 and "rtol" in res.output


def test_t_stop_beyond_duration_is_refused():
    # The drive is defined up to the duration only (step ends, Poisson trains): running
    # past it would silently lose input.
    with pytest.raises(spikegauge.InputError, match="duration_ms"):
        spikegauge.simulate("scenarios/demo-lif.toml", t_stop_ms=1500.0)


def test_simulate_command_memory_limit_option(tmp_path):
    # --max-memory-gb overrides the machine's memory; a tiny limit refuses before any work.
    res = CliRunner().invoke(cli, ["simulate", "scenarios/bench-lif.toml", "--max-memory-gb", "0.001",
                                   "--quiet", "--out", str(tmp_path / "x")])
    assert res.exit_code == 2
    assert "max_memory_gb" in res.output and "GB" in res.output
    assert not (tmp_path / "x").exists()


def test_simulate_command_stops_early_with_t_stop_ms(tmp_path):
    # The stopped run is the whole run cut short: the same network and drive, so the
    # spikes before the stop time are the whole run's, bit for bit.
    args = ["simulate", "scenarios/demo-lif.toml", "--stepper", "rk2", "--dt-ms", "0.1", "--crossing",
            "linear", "--delivery", "grid", "--quiet"]
    res = CliRunner().invoke(cli, [*args, "--t-stop-ms", "100", "--out", str(tmp_path / "short")])
    assert res.exit_code == 0, res.output
    assert "over 100 ms" in res.output
    short = spikegauge.load_run(tmp_path / "short")
    assert short.t_stop_ms == 100.0 and len(short.spikes) > 0
    assert short.spikes["time_ms"].max() < 100.0
    whole = spikegauge.simulate("scenarios/demo-lif.toml", stepper="rk2", dt_ms=0.1, crossing="linear",
                                delivery="grid")
    before = whole.spikes[whole.spikes["time_ms"] < 100.0].reset_index(drop=True)
    np.testing.assert_array_equal(short.spikes["cell"].to_numpy(), before["cell"].to_numpy())
    np.testing.assert_array_equal(short.spikes["time_ms"].to_numpy(), before["time_ms"].to_numpy())


def test_simulate_command_t_stop_ms_help_and_refusal(tmp_path):
    assert "--t-stop-ms" in CliRunner().invoke(cli, ["simulate", "--help"]).output
    res = CliRunner().invoke(cli, ["simulate", "scenarios/demo-lif.toml", "--t-stop-ms", "2000", "--quiet",
                                   "--out", str(tmp_path / "x")])
    assert res.exit_code == 2
    assert res.output.count("\n") == 1 and "--t-stop-ms" in res.output and "1000" in res.output
    assert not (tmp_path / "x").exists()


@pytest.mark.parametrize("settings", [
    dict(strategy="fixed", stepper="rk4", dt_ms=0.025, crossing="hermite", delivery="grid"),
    dict(strategy="fixed", stepper="rk2", dt_ms=0.05, crossing="linear", delivery="exact"),
    dict(strategy="local-adaptive", stepper="bs32", rtol=1e-3),
    dict(strategy="global-adaptive", stepper="dp54", rtol=1e-3),
])
def test_work_limit_stops_the_run_at_a_window_end(settings):
    """A run stopped by its work limit is the same run cut short: the spikes up to the stop,
    the work just past the limit (it is checked at window ends), status "stopped"."""
    net = spikegauge.build_network(spikegauge.load_scenario("scenarios/demo-profile.toml"))
    full = spikegauge.simulate(net, threads=1, t_stop_ms=60.0, **settings)
    work = full.cost["rhs_evals"] + full.cost["newton_iters"]
    cut = spikegauge.simulate(net, threads=1, t_stop_ms=60.0, work_limit=work / 3, **settings)
    assert full.status == "ok" and cut.status == "stopped" and "passed the limit" in cut.message
    assert 0 < cut.t_stop_ms < 60.0
    assert cut.cost["rhs_evals"] + cut.cost["newton_iters"] > work / 3
    before = full.spikes[full.spikes["time_ms"] <= cut.t_stop_ms]
    assert np.array_equal(before.to_numpy(), cut.spikes.to_numpy())
    # a limit the run never reaches changes nothing
    again = spikegauge.simulate(net, threads=1, t_stop_ms=60.0, work_limit=2 * work, **settings)
    assert again.status == "ok" and again.spikes.equals(full.spikes)
