"""Open-loop replay: ``simulate(open_loop=RASTER)``.

Outside references, each named again beside its check:

* Determinism (DESIGN.md, "Event semantics"): the same arrivals applied in the
  same order give the same bits. Replaying a run's own raster with its own
  setting hands every cell exactly the arrivals of the closed-loop run, so it
  must reproduce that run bit for bit; on a network without recurrent
  connections there is nothing to replay, so open and closed loop must agree
  bit for bit; and the thread count must never change a bit.
* The definition of a synapse (DESIGN.md, "Event semantics"): a spike at t_s
  over a connection of delay d arrives at t_s + d with the connection's weight
  and receptor. A replayed spike must act exactly as a drive event of that
  weight and receptor at t_s + d.
* Published spike-time error orders with interpolated threshold crossings and
  the reset carried through the rest of the step (Hansel, Mato, Meunier &
  Neltner 1998, Neural Comput 10:467-483; Shelley & Tao 2001, J Comput
  Neurosci 11:111-119): rk2 + linear 2, rk4 + cubic Hermite 4, measured here
  per cell under the exact reference's own input (open loop), over the whole
  run, against the exact event-driven reference (Rotter & Diesmann 1999
  propagator, checked against a scipy brentq twin in test_exact_reference.py).
"""
from __future__ import annotations

import numba
import numpy as np
import pytest
from click.testing import CliRunner
from scipy.stats import linregress

import spikegauge
from _netutil import (RECEPTOR_EXC, RECEPTOR_INH, assert_block_loop_identical, lif_network, lif_params,
                      poisson_drive)
from spikegauge.analysis.matching import match_rasters
from spikegauge.analysis.rasters import as_raster
from spikegauge.cli.main import cli
from spikegauge.integrate.fixed import FixedStepKernel
from spikegauge.integrate.reference import ROOT_RTOL
from spikegauge.integrate.replay import ReplayRaster, emission_steps, raster_digest
from spikegauge.simulation import replay_raster

# One setting of every strategy and loop: the block loop (grid delivery; "step" puts
# spikes on the grid, "linear"/"hermite" between grid points), the window loop (exact
# delivery, both adaptive strategies) and the exact reference.
SETTINGS = {
    "fixed-grid-rk2-linear": dict(strategy="fixed", stepper="rk2", crossing="linear",
                                  delivery="grid", dt_ms=0.1),
    "fixed-grid-rk4-step": dict(strategy="fixed", stepper="rk4", crossing="step",
                                delivery="grid", dt_ms=0.1),
    "fixed-grid-rk4-hermite": dict(strategy="fixed", stepper="rk4", crossing="hermite",
                                   delivery="grid", dt_ms=0.05),
    "fixed-exact-rk4-hermite": dict(strategy="fixed", stepper="rk4", crossing="hermite",
                                    delivery="exact", dt_ms=0.05),
    "global-adaptive-dp54": dict(strategy="global-adaptive", stepper="dp54", rtol=1e-6),
    "local-adaptive-bs32": dict(strategy="local-adaptive", stepper="bs32", rtol=1e-5),
    "exact": dict(strategy="exact"),
}


@pytest.fixture(scope="module", autouse=True)
def one_thread():
    """One thread unless a test asks for more (many short runs; a parallel launch per
    window is slow on a loaded machine). The thread-count test checks the rest."""
    before = numba.get_num_threads()
    numba.set_num_threads(1)
    yield
    numba.set_num_threads(before)


def same_spikes(a, b):
    """Bit-identical spike tables (times compared as integers, so -0.0 != 0.0 and no rounding)."""
    assert len(a.spikes) == len(b.spikes)
    np.testing.assert_array_equal(a.spikes.cell.to_numpy(), b.spikes.cell.to_numpy())
    np.testing.assert_array_equal(a.spikes.time_ms.to_numpy().view(np.int64),
                                  b.spikes.time_ms.to_numpy().view(np.int64))


# ---------------------------------------------------------------------------
# A small recurrent network (every strategy applies, the exact reference too)

@pytest.fixture(scope="module")
def small_network():
    """40 lif-current cells, sparse excitatory and inhibitory recurrence, Poisson input."""
    rng = np.random.default_rng(16)  # the test's own network draw
    n = 40
    params = lif_params(n, i_bias_pa=rng.uniform(150.0, 250.0, n))
    y0 = np.column_stack([rng.uniform(-65.0, -50.0, n), np.zeros(n), np.zeros(n)])
    synapses = []
    for tgt in range(n):
        for src in rng.choice([c for c in range(n) if c != tgt], 6, replace=False):
            exc = src < 32
            synapses.append((int(src), tgt, float(rng.uniform(1.0, 3.0)), 60.0 if exc else 150.0,
                             RECEPTOR_EXC if exc else RECEPTOR_INH))
    drives = [poisson_drive(0, np.arange(n), 800.0, 30.0, RECEPTOR_EXC)]
    return lif_network(params, y0, 150.0, synapses=synapses, poisson=drives, seed=3)


@pytest.mark.parametrize("name", sorted(SETTINGS))
def test_replaying_its_own_raster_reproduces_a_run(small_network, name):
    # Determinism (DESIGN.md): the replayed raster is the run's own, so every cell gets
    # the closed-loop run's arrivals in the same order, through the same window plan.
    closed = spikegauge.simulate(small_network, **SETTINGS[name])
    assert closed.status == "ok", closed.message
    assert len(closed.spikes) > 200
    opened = spikegauge.simulate(small_network, open_loop=closed, **SETTINGS[name])
    same_spikes(opened, closed)
    assert opened.cost["arrivals"] == closed.cost["arrivals"]
    assert opened.settings["open_loop"] is True and "open_loop" not in closed.settings
    record = opened.meta["open_loop_raster"]
    assert record["spikes"] == len(closed.spikes)
    assert record["sha256"] == raster_digest(closed.spikes.cell, closed.spikes.time_ms)


def test_a_replayed_raster_from_arrays_equals_one_from_the_run(small_network):
    s = SETTINGS["fixed-exact-rk4-hermite"]
    ref = spikegauge.simulate(small_network, strategy="exact")
    from_run = spikegauge.simulate(small_network, open_loop=ref, **s)
    shuffled = np.random.default_rng(0).permutation(len(ref.spikes))
    pair = (ref.spikes.cell.to_numpy()[shuffled], ref.spikes.time_ms.to_numpy()[shuffled])
    from_pair = spikegauge.simulate(small_network, open_loop=pair, **s)
    same_spikes(from_pair, from_run)
    assert from_pair.meta["open_loop_raster"]["sha256"] == from_run.meta["open_loop_raster"]["sha256"]
    # Replaying another raster than one's own is a different run (the check above can fail).
    closed = spikegauge.simulate(small_network, **s)
    assert not np.array_equal(closed.spikes.time_ms.to_numpy(), from_run.spikes.time_ms.to_numpy())


# ---------------------------------------------------------------------------
# A replayed spike is a synaptic arrival: delay, weight and receptor of each synapse

def _relay_network(events=()):
    """Cell 0 never fires on its own; it projects to cell 1 (excitatory, 1.5 ms) and to
    cell 2 (inhibitory, 2.25 ms). Cell 2 fires regularly on its bias current."""
    params = lif_params(3, i_bias_pa=[0.0, 150.0, 300.0])
    y0 = [[-65.0, 0.0, 0.0], [-60.0, 0.0, 0.0], [-58.0, 0.0, 0.0]]
    synapses = [(0, 1, 1.5, 900.0, RECEPTOR_EXC), (0, 2, 2.25, 700.0, RECEPTOR_INH)]
    return lif_network(params, y0, 80.0, synapses=synapses, events=events, seed=2)


REPLAYED_MS = np.array([10.0123, 25.5, 25.83, 40.07])


@pytest.mark.parametrize("name", sorted(SETTINGS))
def test_a_replayed_spike_acts_as_an_arrival_after_the_synapse_delay(name):
    # Definition of a synapse (DESIGN.md): the spike of cell 0 at t_s reaches cell 1 at
    # t_s + 1.5 ms with +900 pA excitatory and cell 2 at t_s + 2.25 ms with 700 pA
    # inhibitory: exactly what drive events of that weight and receptor at those times do.
    events = [(t + 1.5, 1, RECEPTOR_EXC, 900.0) for t in REPLAYED_MS]
    events += [(t + 2.25, 2, RECEPTOR_INH, 700.0) for t in REPLAYED_MS]
    as_drive = spikegauge.simulate(_relay_network(events), **SETTINGS[name])
    replayed = spikegauge.simulate(_relay_network(), open_loop=(np.zeros(4, np.int64), REPLAYED_MS),
                                   **SETTINGS[name])
    silent = spikegauge.simulate(_relay_network(), **SETTINGS[name])
    same_spikes(replayed, as_drive)
    # The replayed spikes are input only: cell 0 itself stays silent, and cell 1 fires
    # only because of them.
    assert not (replayed.spikes.cell == 0).any()
    assert (replayed.spikes.cell == 1).sum() >= 3 and not (silent.spikes.cell == 1).any()


# ---------------------------------------------------------------------------
# Without recurrent connections open loop changes nothing

@pytest.mark.parametrize("name", sorted(SETTINGS))
def test_open_and_closed_loop_agree_without_recurrent_connections(name):
    # Determinism (DESIGN.md): with no synapse there is nothing to deliver, whatever is replayed.
    rng = np.random.default_rng(5)
    n = 30
    params = lif_params(n, i_bias_pa=rng.uniform(120.0, 220.0, n))
    y0 = np.column_stack([rng.uniform(-65.0, -50.0, n), np.zeros(n), np.zeros(n)])
    net = lif_network(params, y0, 100.0, poisson=[poisson_drive(0, np.arange(n), 900.0, 30.0)],
                      seed=4)
    closed = spikegauge.simulate(net, **SETTINGS[name])
    assert len(closed.spikes) > 100
    raster = (rng.integers(0, n, 500), rng.uniform(0.0, 100.0, 500))
    opened = spikegauge.simulate(net, open_loop=raster, **SETTINGS[name])
    same_spikes(opened, closed)
    assert opened.cost["arrivals"] == closed.cost["arrivals"]
    assert opened.cost["steps"] == closed.cost["steps"]


# ---------------------------------------------------------------------------
# Orders over the whole run on a network that amplifies differences

CHAOS_T_MS = 100.0
DTS = (0.025, 0.05, 0.1, 0.2)
MATCH_WINDOW_MS = 0.5
# (stepper, crossing, published order: Hansel et al. 1998; Shelley & Tao 2001)
ORDERS = [("rk2", "linear", 2.0), ("rk4", "hermite", 4.0)]
ORDER_TOL = 0.5


@pytest.fixture(scope="module")
def strong_network():
    """200 lif-current cells (160 excitatory, 40 inhibitory) with strong recurrence.

    Each cell gets 40 excitatory inputs of 150 pA and 10 inhibitory ones of 600 pA
    (delays 1-3 ms) and Poisson input; its bias alone keeps it below threshold. A
    spike-time error of a few microseconds is enough to change the raster within
    tens of ms (checked below), so a closed-loop run is judged spike for spike only
    over a small part of the run.
    """
    rng = np.random.default_rng(16)  # the test's own network draw
    n_e, n_i = 160, 40
    n = n_e + n_i
    params = lif_params(n, i_bias_pa=rng.uniform(50.0, 150.0, n))
    y0 = np.column_stack([rng.uniform(-65.0, -50.0, n), np.zeros(n), np.zeros(n)])
    synapses = []
    for tgt in range(n):
        for src in rng.choice([c for c in range(n_e) if c != tgt], 40, replace=False):
            synapses.append((int(src), tgt, float(rng.uniform(1.0, 3.0)), 150.0, RECEPTOR_EXC))
        for src in rng.choice([c for c in range(n_e, n) if c != tgt], 10, replace=False):
            synapses.append((int(src), tgt, float(rng.uniform(1.0, 3.0)), 600.0, RECEPTOR_INH))
    drives = [poisson_drive(0, np.arange(n), 1500.0, 30.0, RECEPTOR_EXC)]
    net = lif_network(params, y0, CHAOS_T_MS, synapses=synapses, poisson=drives, seed=5)
    ref = spikegauge.simulate(net, strategy="exact")
    assert ref.status == "ok", ref.message
    return net, ref


def _against(ref_raster, run):
    """Matching of a run against the reference raster (optimal, within MATCH_WINDOW_MS)."""
    got = as_raster(run, t_start_ms=0.0, t_stop_ms=CHAOS_T_MS)
    return got, match_rasters(ref_raster, got, MATCH_WINDOW_MS)


def _first_disagreement(ref_raster, got, m):
    """Time (ms) of the first missed or extra spike."""
    return min(ref_raster.time_ms[m.ref_partner < 0].min(initial=np.inf),
               got.time_ms[m.test_partner < 0].min(initial=np.inf))


def test_exact_reference_replaying_its_raster_reproduces_itself(strong_network):
    # Determinism (DESIGN.md): the open-loop reference of every setting below is the
    # closed-loop exact raster itself.
    net, ref = strong_network
    same_spikes(spikegauge.simulate(net, strategy="exact", open_loop=ref), ref)


def test_closed_loop_agreement_is_lost_early(strong_network):
    # The network's own sensitivity: rk2 + linear at dt 0.1 and 0.2 ms (errors of a few
    # microseconds, see the order test) lose spike-for-spike agreement with the exact
    # reference within the first half of the run; open loop keeps it over the whole run.
    net, ref = strong_network
    r = as_raster(ref, t_start_ms=0.0, t_stop_ms=CHAOS_T_MS)
    for dt in (0.1, 0.2):
        s = dict(strategy="fixed", stepper="rk2", crossing="linear", delivery="exact", dt_ms=dt)
        closed = spikegauge.simulate(net, **s)
        got, m = _against(r, closed)
        assert _first_disagreement(r, got, m) < 0.5 * CHAOS_T_MS
        got, m = _against(r, spikegauge.simulate(net, open_loop=ref, **s))
        assert m.n_matched >= 0.99 * r.n_spikes and got.n_spikes <= 1.01 * r.n_spikes


@pytest.mark.parametrize("stepper,crossing,order", ORDERS)
def test_open_loop_spike_time_order_over_the_whole_run(strong_network, stepper, crossing, order):
    # Hansel et al. 1998; Shelley & Tao 2001: spike-time error O(dt^order), measured per
    # cell under the reference's own input, on spikes matched at every dt, over the whole run.
    net, ref = strong_network
    r = as_raster(ref, t_start_ms=0.0, t_stop_ms=CHAOS_T_MS)
    assert r.n_spikes > 400
    shifts, matched = [], []
    for dt in DTS:
        run = spikegauge.simulate(net, strategy="fixed", stepper=stepper, crossing=crossing,
                                  delivery="exact", dt_ms=dt, open_loop=ref)
        assert run.status == "ok", run.message
        got, m = _against(r, run)
        assert m.n_matched >= 0.99 * r.n_spikes, (dt, m.n_matched, r.n_spikes)
        ok = m.ref_partner >= 0
        shifts.append(np.where(ok, got.time_ms[np.maximum(m.ref_partner, 0)] - r.time_ms, np.nan))
        matched.append(ok)
    every = np.all(matched, axis=0)
    rms = np.array([np.sqrt(np.mean(d[every] ** 2)) for d in shifts])
    # The reference's own uncertainty: its root finding stops at a relative precision of
    # ROOT_RTOL of the absolute time; points within 3x of it measure the reference.
    floor = 3.0 * ROOT_RTOL * CHAOS_T_MS
    keep = rms > floor
    assert keep.sum() >= 3, rms
    fit = linregress(np.log(np.asarray(DTS)[keep]), np.log(rms[keep]))
    print(f"{stepper}+{crossing} open loop: rms {rms.tolist()} ms over {int(every.sum())} "
          f"spikes, slope {fit.slope:.3f}")
    assert abs(fit.slope - order) <= ORDER_TOL, (fit.slope, rms)


@pytest.mark.parametrize("name", ["fixed-exact-rk4-hermite", "local-adaptive-bs32", "exact"])
def test_open_loop_is_bit_identical_across_thread_counts(strong_network, name):
    # Determinism (DESIGN.md): per-cell writes, reductions in cell order.
    net, ref = strong_network
    s = dict(SETTINGS[name], t_stop_ms=40.0)
    one = spikegauge.simulate(net, open_loop=ref, threads=1, **s)
    two = spikegauge.simulate(net, open_loop=ref, threads=2, **s)
    assert two.settings["threads"] == 2
    same_spikes(one, two)
    assert one.cost["steps"] == two.cost["steps"]


@pytest.mark.parametrize("stepper,crossing", [("rk2", "linear"), ("rk4", "step")])
def test_open_loop_block_loop_is_bit_identical_across_thread_counts_and_blocks(strong_network,
                                                                               stepper, crossing):
    # Determinism (DESIGN.md); small blocks spread the 200 cells over both threads.
    net, ref = strong_network
    replay = replay_raster(ref, net, 40.0)
    kernel = FixedStepKernel(net, 0.1, stepper, crossing, "grid")
    assert_block_loop_identical(kernel, net, 40.0, ((1, 256), (2, 32), (2, 7)), replay=replay)


# ---------------------------------------------------------------------------
# Pieces and the command line

def test_emission_step_puts_grid_points_at_the_end_of_their_step():
    dt = 0.1
    n = np.arange(0, 5000)
    on_grid = (n + 1) * dt                      # a "step" crossing: the end of step n
    np.testing.assert_array_equal(emission_steps(on_grid, dt), n)
    inside = (n + 0.5) * dt
    np.testing.assert_array_equal(emission_steps(inside, dt), n)
    after = np.nextafter(n * dt, np.inf)[1:]    # just past the start of step n
    np.testing.assert_array_equal(emission_steps(after, dt), n[1:])


def test_replay_raster_refuses_cells_outside_the_network(small_network):
    with pytest.raises(spikegauge.InputError, match="cell id 40"):
        replay_raster((np.array([3, 40]), np.array([1.0, 2.0])), small_network, 150.0)
    with pytest.raises(spikegauge.InputError, match="not an integer"):
        replay_raster((np.array([3.5]), np.array([1.0])), small_network, 150.0)
    # Spikes before the start or at or after the end of the run cannot act in it.
    kept = replay_raster((np.array([1, 2, 3, 4]), np.array([-1.0, 0.0, 149.9, 150.0])),
                         small_network, 150.0)
    np.testing.assert_array_equal(kept.cell, [2, 3])
    with pytest.raises(spikegauge.InputError, match="not finite"):
        ReplayRaster(np.array([1]), np.array([np.nan]), 40)
    other = spikegauge.simulate(_relay_network(), strategy="exact")
    with pytest.raises(spikegauge.InputError, match="3 cells"):
        replay_raster(other, small_network, 150.0)


def test_simulate_command_replays_a_run_folder(tmp_path):
    options = ["--stepper", "rk2", "--dt-ms", "0.1", "--crossing", "linear", "--delivery", "grid",
               "--quiet"]
    res = CliRunner().invoke(cli, ["simulate", "scenarios/demo-lif.toml", *options, "--csv",
                                   "--out", str(tmp_path / "closed")])
    assert res.exit_code == 0, res.output
    res = CliRunner().invoke(cli, ["simulate", "scenarios/demo-lif.toml", *options,
                                   "--open-loop", str(tmp_path / "closed"),
                                   "--out", str(tmp_path / "open")])
    assert res.exit_code == 0, res.output
    assert "open loop: replayed" in res.output
    closed, opened = spikegauge.load_run(tmp_path / "closed"), spikegauge.load_run(tmp_path / "open")
    same_spikes(opened, closed)
    assert opened.settings["open_loop"] is True
    assert opened.meta["open_loop_raster"]["sha256"] == raster_digest(closed.spikes.cell,
                                                                      closed.spikes.time_ms)
    # The same raster as a CSV file (cell, time_ms), as another simulator would write it.
    res = CliRunner().invoke(cli, ["simulate", "scenarios/demo-lif.toml", *options,
                                   "--open-loop", str(tmp_path / "closed" / "spikes.csv"),
                                   "--out", str(tmp_path / "open-csv")])
    assert res.exit_code == 0, res.output
    from_csv = spikegauge.load_run(tmp_path / "open-csv")
    same_spikes(from_csv, closed)
    assert from_csv.meta["open_loop_raster"]["sha256"] == opened.meta["open_loop_raster"]["sha256"]
    res = CliRunner().invoke(cli, ["simulate", "scenarios/demo-lif.toml", *options,
                                   "--open-loop", str(tmp_path / "missing"),
                                   "--out", str(tmp_path / "x")])
    assert res.exit_code == 2 and "missing" in res.output
