"""Network builder and drive stream: degrees, distributions, files, determinism, Poisson drive."""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from spikegauge.models import MODELS
from spikegauge.models.base import P_IEXT, RECEPTOR_CURRENT, RECEPTOR_EXC, RECEPTOR_INH
from spikegauge.network import DRIVE_BLOCK_MS, DriveStream, build_network
from spikegauge.scenario import load_scenario

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"

# A significance level for the statistical checks below: at a fixed seed each
# check either passes or fails for ever, and 1e-3 keeps the chance that a
# correct builder fails with a given seed small.
ALPHA = 1e-3


def build_text(tmp_path: Path, text: str):
    path = tmp_path / "net.toml"
    path.write_text(text)
    scenario = load_scenario(path)
    return scenario, build_network(scenario)


def header(duration_ms=100.0, seed=3) -> str:
    return f'[scenario]\nname = "n"\nduration_ms = {duration_ms}\nseed = {seed}\n'


def group(name, size, model="lif-current", extra="") -> str:
    return f'\n[[group]]\nname = "{name}"\nsize = {size}\nmodel = "{model}"\n{extra}'


def pathway(src, tgt, connect, weight="weight_pa = 10.0", delay="delay_ms = 1.0", receptor="excitatory",
            extra="") -> str:
    return (f'\n[[pathway]]\nsource = "{src}"\ntarget = "{tgt}"\nconnect = "{connect}"\nreceptor = "{receptor}"\n'
            f'{weight}\n{delay}\n{extra}')


def chi2_discrete_pvalue(values: np.ndarray, dist) -> float:
    """Chi-square goodness of fit of integer samples to a discrete scipy distribution.

    (The Kolmogorov-Smirnov test assumes a continuous law; with ties it is not
    valid for counts.) Bins are single integers, merged from the tails inward
    until each expects at least 5 samples.
    """
    n = values.size
    lo, hi = int(dist.ppf(1e-4)), int(dist.ppf(1 - 1e-4))
    edges = list(range(lo, hi + 1))  # bin j holds k <= edges[0], then k == edges[j], the last k >= edges[-1]
    cdf = dist.cdf(np.array(edges))
    probs = np.diff(np.concatenate([[0.0], cdf[:-1], [1.0]]))
    observed = np.array([np.count_nonzero(values <= edges[0])]
                        + [np.count_nonzero(values == k) for k in edges[1:-1]]
                        + [np.count_nonzero(values >= edges[-1])], dtype=float)
    expected = probs * n
    # Merge small bins into their inner neighbours.
    obs, exp = list(observed), list(expected)
    while len(exp) > 2 and exp[0] < 5:
        e, o = exp.pop(0), obs.pop(0)
        exp[0] += e
        obs[0] += o
    while len(exp) > 2 and exp[-1] < 5:
        e, o = exp.pop(), obs.pop()
        exp[-1] += e
        obs[-1] += o
    return stats.chisquare(obs, exp).pvalue


def edges_of(net):
    """(source, target, delay, weight, receptor) of every synapse, from the CSR arrays."""
    src = np.repeat(np.arange(net.n_cells), np.diff(net.syn_ptr))
    return src, net.syn_target, net.syn_delay_ms, net.syn_weight, net.syn_receptor


# -- connectivity ------------------------------------------------------------


def test_sources_per_target_exact_distinct_no_self(tmp_path):
    text = (header() + group("e", 300) + group("i", 60)
            + pathway("e", "e", "sources-per-target", extra="sources_per_target = 40")
            + pathway("i", "e", "sources-per-target", receptor="inhibitory", extra="sources_per_target = 60")
            + pathway("i", "i", "sources-per-target", receptor="inhibitory", extra="sources_per_target = 59"))
    _, net = build_text(tmp_path, text)
    src, tgt, _, _, rec = edges_of(net)
    e_src = (src < 300) & (tgt < 300)
    # Every excitatory cell gets exactly 40 excitatory inputs, distinct, none from itself.
    assert np.array_equal(np.bincount(tgt[e_src], minlength=300), np.full(300, 40))
    assert not np.any(src[e_src] == tgt[e_src])
    pairs = src.astype(np.int64) * net.n_cells + tgt
    assert np.unique(pairs).size == pairs.size, "no duplicate connections"
    # 60 of 60 inhibitory sources: all of them (the dense branch); 59 of 59 non-self: all but itself.
    ie = (src >= 300) & (tgt < 300)
    assert np.array_equal(np.bincount(tgt[ie], minlength=300), np.full(300, 60))
    ii = (src >= 300) & (tgt >= 300)
    assert np.array_equal(np.bincount(tgt[ii] - 300, minlength=60), np.full(60, 59))
    assert not np.any(src[ii] == tgt[ii])
    assert np.all(rec[src >= 300] == RECEPTOR_INH) and np.all(rec[src < 300] == RECEPTOR_EXC)


@pytest.mark.parametrize("n, k", [(1000, 20), (400, 300)], ids=["sparse", "dense"])
def test_sources_per_target_sources_are_uniform(tmp_path, n, k):
    # Every source is a candidate for n - 1 targets, each choosing it with
    # probability k / (n - 1) independently of the other targets, so each
    # out-degree is Binomial(n - 1, k / (n - 1)) (scipy.stats.binom; chi-square
    # goodness of fit over the n sources, whose only dependence is the fixed total).
    # The two cases exercise both sampling branches (redraw duplicates / permutation).
    text = header() + group("e", n) + pathway("e", "e", "sources-per-target", extra=f"sources_per_target = {k}")
    _, net = build_text(tmp_path, text)
    src, tgt, *_ = edges_of(net)
    assert not np.any(src == tgt)
    assert np.array_equal(np.bincount(tgt, minlength=n), np.full(n, k))
    assert np.unique(src * n + tgt).size == n * k
    out_degree = np.diff(net.syn_ptr)
    assert chi2_discrete_pvalue(out_degree, stats.binom(n - 1, k / (n - 1))) > ALPHA


def test_random_pairs_degrees_within_binomial_bounds(tmp_path):
    n, p = 400, 0.05
    text = header() + group("e", n) + pathway("e", "e", "random", extra=f"p_connect = {p}")
    _, net = build_text(tmp_path, text)
    src, tgt, *_ = edges_of(net)
    assert not np.any(src == tgt)
    # Total: Binomial(n (n-1), p); bounds from scipy.stats.binom at two-sided ALPHA.
    lo, hi = stats.binom(n * (n - 1), p).interval(1 - ALPHA)
    assert lo <= src.size <= hi
    # In-degrees are Binomial(n-1, p) (scipy.stats.binom, chi-square goodness of fit).
    indeg = np.bincount(tgt, minlength=n)
    assert chi2_discrete_pvalue(indeg, stats.binom(n - 1, p)) > ALPHA
    pairs = src * n + tgt
    assert np.unique(pairs).size == pairs.size


def test_probability_one_and_all_to_all_and_one_to_one(tmp_path):
    text = (header() + group("a", 7) + group("b", 7)
            + pathway("a", "a", "random", extra="p_connect = 1.0")
            + pathway("a", "b", "all-to-all") + pathway("b", "a", "one-to-one")
            + pathway("b", "b", "all-to-all", extra="self_connections = true"))
    _, net = build_text(tmp_path, text)
    src, tgt, *_ = edges_of(net)
    got = set(zip(src.tolist(), tgt.tolist()))
    expected = {(s, t) for s in range(7) for t in range(7) if s != t}
    expected |= {(s, t) for s in range(7) for t in range(7, 14)}
    expected |= {(7 + i, i) for i in range(7)}
    expected |= {(s, t) for s in range(7, 14) for t in range(7, 14)}
    assert got == expected and src.size == len(expected)


def test_csr_is_sorted_by_source_then_target(tmp_path):
    _, net = build_text(tmp_path, header() + group("e", 200) + pathway(
        "e", "e", "random", extra="p_connect = 0.1") + pathway(
        "e", "e", "sources-per-target", receptor="inhibitory", extra="sources_per_target = 5"))
    assert net.syn_ptr[0] == 0 and net.syn_ptr[-1] == net.n_synapses
    for s in range(net.n_cells):
        t = net.syn_target[net.syn_ptr[s]:net.syn_ptr[s + 1]]
        assert np.all(np.diff(t) >= 0)
    # A pair connected by both pathways: the scenario's first pathway comes first.
    src, tgt, _, _, rec = edges_of(net)
    key = src * net.n_cells + tgt
    same = np.flatnonzero(np.diff(key) == 0)
    assert same.size > 0
    assert np.all(rec[same] == RECEPTOR_EXC) and np.all(rec[same + 1] == RECEPTOR_INH)


def test_bench_lif_network_shape():
    # Values from ../shared/limit/SPEC.md, bench-lif table.
    net = build_network(load_scenario(SCENARIOS / "bench-lif.toml"))
    src, tgt, delay, weight, rec = edges_of(net)
    assert net.n_cells == 5000 and net.n_synapses == 500_000
    assert np.array_equal(np.bincount(tgt[src < 4000], minlength=5000), np.full(5000, 80))
    assert np.array_equal(np.bincount(tgt[src >= 4000], minlength=5000), np.full(5000, 20))
    assert not np.any(src == tgt)
    assert delay.min() >= 1.0 and delay.max() <= 3.0 and net.d_min_ms == delay.min()
    assert set(np.unique(weight[rec == RECEPTOR_EXC])) == {1.5}
    assert set(np.unique(weight[rec == RECEPTOR_INH])) == {15.0}
    bias = net.params[:, P_IEXT]
    assert bias.min() >= 200.0 and bias.max() <= 300.0
    assert stats.kstest(bias, stats.uniform(200.0, 100.0).cdf).pvalue > ALPHA
    v0 = net.y0[:, 0]
    assert v0.min() >= -60.0 and v0.max() <= -50.0
    assert np.all(net.y0[:, 1:3] == 0.0)


# -- delays and weights ------------------------------------------------------


def test_delays_and_weights_follow_their_distributions(tmp_path):
    # References: scipy.stats.uniform, truncnorm and lognorm; Kolmogorov-Smirnov at a fixed seed.
    text = (header() + group("e", 400)
            + pathway("e", "e", "sources-per-target", extra="sources_per_target = 10",
                      delay='delay_ms = { distribution = "uniform", low = 0.5, high = 2.5 }',
                      weight='weight_pa = { distribution = "normal", mean = 20.0, std = 8.0, low = 5.0 }')
            + pathway("e", "e", "sources-per-target", receptor="inhibitory", extra="sources_per_target = 10",
                      delay='delay_ms = { distribution = "lognormal", mean = 2.0, std = 0.5 }',
                      weight='weight_pa = { distribution = "uniform", low = 1.0, high = 4.0 }'))
    _, net = build_text(tmp_path, text)
    _, _, delay, weight, rec = edges_of(net)
    exc, inh = rec == RECEPTOR_EXC, rec == RECEPTOR_INH
    assert stats.kstest(delay[exc], stats.uniform(0.5, 2.0).cdf).pvalue > ALPHA
    assert stats.kstest(weight[exc], stats.truncnorm((5.0 - 20.0) / 8.0, np.inf, 20.0, 8.0).cdf).pvalue > ALPHA
    sigma = math.sqrt(math.log1p((0.5 / 2.0) ** 2))
    lognorm = stats.lognorm(s=sigma, scale=math.exp(math.log(2.0) - sigma**2 / 2))
    assert stats.kstest(delay[inh], lognorm.cdf).pvalue > ALPHA
    assert stats.kstest(weight[inh], stats.uniform(1.0, 3.0).cdf).pvalue > ALPHA


# -- files -------------------------------------------------------------------


@pytest.mark.parametrize("fmt", ["csv", "npz"])
def test_edge_list_file_round_trips_exactly(tmp_path, fmt):
    rng = np.random.default_rng(0)
    n_edges = 500
    s = rng.integers(0, 30, n_edges)
    t = rng.integers(0, 20, n_edges)
    d = np.round(rng.uniform(0.1, 5.0, n_edges), 6)
    w = np.round(rng.uniform(0.0, 3.0, n_edges), 6)
    if fmt == "csv":
        lines = ["source,target,delay_ms,weight"] + [f"{a},{b},{c!r},{e!r}" for a, b, c, e in zip(s.tolist(), t.tolist(), d.tolist(), w.tolist())]
        (tmp_path / "edges.csv").write_text("\n".join(lines) + "\n")
    else:
        np.savez(tmp_path / "edges.npz", source=s, target=t, delay_ms=d, weight=w)
    text = (header() + group("a", 30) + group("b", 20)
            + pathway("a", "b", "edge-list", weight="", delay="", extra=f'edges = "edges.{fmt}"'))
    _, net = build_text(tmp_path, text)
    src, tgt, delay, weight, _ = edges_of(net)
    got = sorted(zip(src.tolist(), (tgt - 30).tolist(), delay.tolist(), weight.tolist()))
    want = sorted(zip(s.tolist(), t.tolist(), d.tolist(), w.tolist()))
    assert got == want


def test_spike_file_and_current_step_drives(tmp_path):
    (tmp_path / "spikes.csv").write_text("cell,time_ms\n2,5.5\n0,1.25\n2,3.0\n1,150.0\n")
    text = (header() + group("a", 3) + group("b", 4)
            + '\n[[drive]]\ntarget = "b"\nkind = "spikes"\nfile = "spikes.csv"\nreceptor = "inhibitory"\nweight_pa = 7.0\n'
            + '\n[[drive]]\ntarget = "a"\nkind = "step"\nstart_ms = 10.0\nstop_ms = 20.0\n'
            + 'i_pa = { distribution = "uniform", low = 1.0, high = 2.0 }\n')
    _, net = build_text(tmp_path, text)
    ev = net.events
    # The spike at 150 ms lies after the 100-ms run and is dropped.
    assert ev.time_ms.tolist() == [1.25, 3.0, 5.5, 10.0, 10.0, 10.0, 20.0, 20.0, 20.0]
    assert ev.cell.tolist() == [3, 5, 5, 0, 1, 2, 0, 1, 2]
    assert ev.receptor.tolist() == [RECEPTOR_INH] * 3 + [RECEPTOR_CURRENT] * 6
    assert ev.source.tolist() == [-1] * 3 + [-2] * 6
    assert np.all(ev.weight[:3] == 7.0)
    on, off = ev.weight[3:6], ev.weight[6:9]
    assert np.all((on >= 1.0) & (on < 2.0)) and np.array_equal(off, -on)


def test_initial_state_defaults_and_hh_gates_at_steady_state(tmp_path):
    text = (header() + group("l", 3, extra="[group.parameters]\ne_l_mv = -70.0\ni_bias_pa = 100.0\n")
            + group("h", 50, "hh-squid",
                    '[group.initial]\nv_mv = { distribution = "uniform", low = -70.0, high = -60.0 }\n'))
    _, net = build_text(tmp_path, text)
    # LIF with no input rests at E_L (closed form), whatever its bias current.
    assert np.allclose(net.y0[:3, :3], [[-70.0, 0.0, 0.0]] * 3)
    assert np.all(np.isnan(net.y0[:3, 3:])) and np.all(np.isnan(net.params[:3, MODELS["lif-current"].n_params:]))
    # HH gates at x_inf(V0) with the Hodgkin & Huxley 1952 rate functions (modern
    # convention, as in ../shared/limit/SPEC.md), written out here independently.
    v = net.y0[3:, 0]
    am = 0.1 * (v + 40) / (1 - np.exp(-(v + 40) / 10))
    bm = 4 * np.exp(-(v + 65) / 18)
    ah = 0.07 * np.exp(-(v + 65) / 20)
    bh = 1 / (1 + np.exp(-(v + 35) / 10))
    an = 0.01 * (v + 55) / (1 - np.exp(-(v + 55) / 10))
    bn = 0.125 * np.exp(-(v + 65) / 80)
    assert np.allclose(net.y0[3:, 1], am / (am + bm), rtol=1e-12)
    assert np.allclose(net.y0[3:, 2], ah / (ah + bh), rtol=1e-12)
    assert np.allclose(net.y0[3:, 3], an / (an + bn), rtol=1e-12)
    assert np.all(net.y0[3:, 4:6] == 0.0)


def test_parameters_override_defaults_per_cell(tmp_path):
    np.save(tmp_path / "tau.npy", np.arange(1.0, 6.0))
    text = header() + group("l", 5, extra='[group.parameters]\ntau_m_ms = { file = "tau.npy" }\nv_th_mv = -45.0\n')
    _, net = build_text(tmp_path, text)
    spec = MODELS["lif-current"]
    slots = {p.key: p.slot for p in spec.params}
    assert np.array_equal(net.params[:, slots["tau_m_ms"]], np.arange(1.0, 6.0))
    assert np.all(net.params[:, slots["v_th_mv"]] == -45.0)
    defaults = spec.default_params()
    assert np.all(net.params[:, slots["c_m_pf"]] == defaults[slots["c_m_pf"]])


# -- determinism -------------------------------------------------------------

DEMO = SCENARIOS / "demo-lif.toml"


def network_arrays(net) -> dict:
    return dict(params=net.params, y0=net.y0, ptr=net.syn_ptr, target=net.syn_target,
                delay=net.syn_delay_ms, weight=net.syn_weight, receptor=net.syn_receptor)


def test_same_scenario_same_arrays():
    a = build_network(load_scenario(DEMO))
    b = build_network(load_scenario(DEMO))
    for name, arr in network_arrays(a).items():
        assert np.array_equal(arr, network_arrays(b)[name], equal_nan=True), name
    ev_a = DriveStream(a).take(0.0, 100.0)
    ev_b = DriveStream(b).take(0.0, 100.0)
    assert all(np.array_equal(x, y) for x, y in zip(ev_a, ev_b))


def test_changing_a_drive_rate_leaves_the_network_identical(tmp_path):
    text = DEMO.read_text()
    assert "rate_hz = 800.0" in text
    (tmp_path / "other.toml").write_text(text.replace("rate_hz = 800.0", "rate_hz = 900.0"))
    a = build_network(load_scenario(DEMO))
    b = build_network(load_scenario(tmp_path / "other.toml"))
    for name, arr in network_arrays(a).items():
        assert np.array_equal(arr, network_arrays(b)[name], equal_nan=True), name
    assert not np.array_equal(a.poisson[0].rate_hz, b.poisson[0].rate_hz)
    # The other drive (its own streams) is unchanged event for event.
    ev_a, ev_b = DriveStream(a).take(0.0, 200.0), DriveStream(b).take(0.0, 200.0)
    other_a, other_b = ev_a[4] == -2, ev_b[4] == -2
    assert all(np.array_equal(x[other_a], y[other_b]) for x, y in zip(ev_a, ev_b))


# -- Poisson drive -----------------------------------------------------------


def poisson_net(tmp_path, rate=40.0, n=200, duration=5000.0, extra=""):
    text = (header(duration) + group("e", n)
            + f'\n[[drive]]\ntarget = "e"\nkind = "poisson"\nrate_hz = {rate}\nreceptor = "excitatory"\n'
              f'weight_pa = 2.5\n{extra}')
    return build_text(tmp_path, text)[1]


def test_poisson_counts_and_intervals(tmp_path):
    rate, n, duration = 40.0, 200, 5000.0
    net = poisson_net(tmp_path, rate, n, duration)
    time, cell, receptor, weight, source = DriveStream(net).take(0.0, duration)
    assert np.all(receptor == RECEPTOR_EXC) and np.all(weight == 2.5) and np.all(source == -1)
    # Total count: Poisson with mean rate * n * T; bounds from scipy.stats.poisson.
    lo, hi = stats.poisson(rate * n * duration / 1000.0).interval(1 - ALPHA)
    assert lo <= time.size <= hi
    # Per-cell counts are Poisson(rate T) too (scipy.stats.poisson, chi-square goodness of fit).
    counts = np.bincount(cell, minlength=n)
    assert chi2_discrete_pvalue(counts, stats.poisson(rate * duration / 1000.0)) > ALPHA
    # Intervals within each cell are exponential with mean 1/rate (scipy.stats.expon).
    same = np.diff(cell) == 0
    isi = np.diff(time)[same]
    assert stats.kstest(isi, stats.expon(scale=1000.0 / rate).cdf).pvalue > ALPHA
    # Event times are uniform over the run: no trace of the block boundaries.
    phase = np.mod(time, DRIVE_BLOCK_MS) / DRIVE_BLOCK_MS
    assert stats.kstest(phase, stats.uniform().cdf).pvalue > ALPHA


def test_window_splitting_does_not_change_the_events(tmp_path):
    net = poisson_net(tmp_path, rate=300.0, n=50, duration=120.0, extra="start_ms = 7.3\nstop_ms = 95.0\n")
    whole = DriveStream(net).take(0.0, 120.0)
    rng = np.random.default_rng(4)
    for cuts in ([], [10.0, 20.0, 30.0], np.sort(rng.uniform(0, 120, 40)).tolist(),
                 [0.0, 0.0, 9.999999999999998, 10.0, 55.5, 55.5, 119.0]):
        stream = DriveStream(net)
        edges = [0.0] + list(cuts) + [120.0]
        parts = [stream.take(a, b) for a, b in zip(edges[:-1], edges[1:])]
        for part, (a, b) in zip(parts, zip(edges[:-1], edges[1:])):
            t, c, _, _, s = part
            assert np.all((t >= a) & (t < b))
            assert np.all(np.diff(np.lexsort((s, t, c))) == 1), "each window sorted by (cell, time, source)"
        joined = [np.concatenate(x) for x in zip(*parts)]
        order = np.lexsort((joined[4], joined[0], joined[1]))
        assert all(np.array_equal(x[order], y) for x, y in zip(joined, whole))
    t = whole[0]
    assert t.min() >= 7.3 and t.max() < 95.0


def test_drive_stream_rejects_gaps(tmp_path):
    stream = DriveStream(poisson_net(tmp_path, duration=100.0))
    stream.take(0.0, 10.0)
    with pytest.raises(ValueError, match="contiguous"):
        stream.take(11.0, 20.0)


def test_explicit_and_poisson_events_merge_sorted(tmp_path):
    (tmp_path / "spikes.csv").write_text("cell,time_ms\n0,5.0\n0,5.0\n1,2.0\n")
    text = (header(20.0) + group("e", 2)
            + '\n[[drive]]\ntarget = "e"\nkind = "poisson"\nrate_hz = 2000.0\nreceptor = "excitatory"\nweight_pa = 1.0\n'
            + '\n[[drive]]\ntarget = "e"\nkind = "spikes"\nfile = "spikes.csv"\nreceptor = "inhibitory"\nweight_pa = 3.0\n')
    _, net = build_text(tmp_path, text)
    t, c, r, w, s = DriveStream(net).take(0.0, 20.0)
    assert np.all(np.diff(np.lexsort((s, t, c))) == 1)
    explicit = s == -2
    assert sorted(zip(c[explicit].tolist(), t[explicit].tolist())) == [(0, 5.0), (0, 5.0), (1, 2.0)]
    assert np.all(r[explicit] == RECEPTOR_INH) and np.all(w[explicit] == 3.0)
    assert np.all(r[~explicit] == RECEPTOR_EXC) and np.count_nonzero(~explicit) > 0
