"""The numba arrival queue and the fixed kernel's spike-buffer widening, against slow twins."""
import numpy as np

from spikegauge.integrate.engine import ArrivalQueue, expand_csr, run_windows
from spikegauge.integrate.fixed import FixedStepKernel, grid_time
from spikegauge.network import build_network
from spikegauge.scenario import parse_scenario


class _Net:
    """The fields of a Network that the queue reads."""

    def __init__(self, rng, n_cells=30, max_degree=6):
        deg = rng.integers(0, max_degree, size=n_cells)
        self.syn_ptr = np.concatenate([[0], np.cumsum(deg)]).astype(np.int64)
        n_syn = int(self.syn_ptr[-1])
        self.syn_target = rng.integers(0, n_cells, n_syn).astype(np.int64)
        self.syn_delay_ms = rng.uniform(1.0, 3.0, n_syn).round(3)
        self.syn_weight = rng.uniform(0.1, 2.0, n_syn)
        self.syn_receptor = rng.integers(0, 3, n_syn).astype(np.int64)
        self.n_synapses = n_syn


def _twin_pop(pending, t1, dt):
    """The obvious queue: a Python list of arrival tuples in push order."""
    taken = [a for a in pending if grid_time(np.array([a[0]]), dt)[0] < t1]
    kept = [a for a in pending if grid_time(np.array([a[0]]), dt)[0] >= t1]
    return taken, kept


def test_queue_matches_list_twin_over_windows():
    rng = np.random.default_rng(5)
    net = _Net(rng)
    dt = 0.1
    q = ArrivalQueue(net, lambda t: grid_time(t, dt), capacity=4)   # forces growth
    pending = []
    for w in range(40):
        t0, t1 = w * 1.0, (w + 1) * 1.0
        got = q.pop(t1)
        want, pending = _twin_pop(pending, t1, dt)
        assert got["time"].tolist() == [a[0] for a in want]
        assert got["cell"].tolist() == [a[1] for a in want]
        assert got["syn"].tolist() == [a[5] for a in want]
        assert got["source"].tolist() == [a[4] for a in want]
        np.testing.assert_array_equal(got["eff"], grid_time(got["time"], dt))
        assert len(q) == len(pending)
        cells = np.sort(rng.choice(30, size=rng.integers(0, 8), replace=False)).astype(np.int64)
        times = rng.uniform(t0, t1, cells.size)
        q.push(cells, times)
        syn, owner = expand_csr(cells, net.syn_ptr)          # the twin expands with numpy
        for s, o in zip(syn, owner):
            pending.append((times[o] + net.syn_delay_ms[s], net.syn_target[s], net.syn_receptor[s],
                            net.syn_weight[s], cells[o], s))
        assert len(q) == len(pending)


_BURSTY = """
[scenario]
name = "bursty"
duration_ms = 30.0
seed = 4

[[group]]
name = "a"
size = 6
model = "lif-current"
[group.parameters]
t_ref_ms = 0.0
i_bias_pa = {{ distribution = "uniform", low = {lo}, high = {hi} }}
[group.initial]
v_mv = {{ distribution = "uniform", low = -65.0, high = -50.0 }}

[[pathway]]
source = "a"
target = "a"
connect = "sources-per-target"
sources_per_target = 2
receptor = "inhibitory"
weight_pa = 50.0
delay_ms = 2.0
"""


def test_spike_buffer_widening_changes_nothing():
    # Strongly driven cells without refractoriness fire several times per 2 ms window,
    # so a one-slot buffer overflows and the kernel reruns the overflowing cells.
    net = build_network(parse_scenario(_BURSTY.format(lo=3000.0, hi=6000.0), source="bursty"))
    runs = []
    for cap in (1, 64):
        for crossing in ("step", "hermite"):
            k = FixedStepKernel(net, 0.05, "rk2", crossing, "exact")
            runs.append((cap, crossing, run_windows(net, k, 30.0, spike_capacity=cap)))
    by = {(c, x): r for c, x, r in runs}
    for crossing in ("step", "hermite"):
        a, b = by[(1, crossing)], by[(64, crossing)]
        assert a.cell.size > 6 * 15 * 2         # more than one spike per cell and window
        np.testing.assert_array_equal(a.cell, b.cell)
        np.testing.assert_array_equal(a.time_ms, b.time_ms)
        assert a.counters == b.counters
