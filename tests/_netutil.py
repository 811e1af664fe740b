"""Small lif-current networks built straight as flat arrays, for the integrator tests.

Building the :class:`~spikegauge.network.arrays.Network` by hand (rather than
from a scenario file) lets a test state every parameter, initial state,
synapse and drive event it checks against, with nothing drawn at random
except what the test draws itself.
"""
from __future__ import annotations

import numpy as np

from spikegauge.models import lif_current, max_params, max_states
from spikegauge.models.base import P_IEXT, RECEPTOR_CURRENT, RECEPTOR_EXC, RECEPTOR_INH
from spikegauge.network import EventList, Network, PoissonDrive

__all__ = ["lif_network", "poisson_drive", "RECEPTOR_CURRENT", "RECEPTOR_EXC", "RECEPTOR_INH",
           "lif_params", "P_IEXT"]


def lif_params(n_cells: int, **overrides) -> np.ndarray:
    """lif-current parameters, shape (n_cells, n_params): model defaults with overrides.

    ``overrides`` maps a parameter key (``tau_m_ms``, ``i_bias_pa``...) to a
    scalar or a per-cell array.
    """
    spec = lif_current.SPEC
    p = np.tile(spec.default_params(), (n_cells, 1))
    slots = {info.key: info.slot for info in spec.params}
    for key, value in overrides.items():
        p[:, slots[key]] = value
    return p


def poisson_drive(drive_id, cells, rate_hz, weight, receptor=RECEPTOR_EXC, start_ms=0.0,
                  stop_ms=np.inf) -> PoissonDrive:
    cells = np.asarray(cells, dtype=np.int64)
    return PoissonDrive(drive_id=drive_id, cells=cells,
                        rate_hz=np.broadcast_to(np.asarray(rate_hz, dtype=np.float64), cells.shape).copy(),
                        weight=float(weight), receptor=int(receptor), start_ms=float(start_ms),
                        stop_ms=float(stop_ms))


def lif_network(params, y0, t_stop_ms, synapses=(), events=(), poisson=(), seed=1,
                group_names=("cells",), group_model=("lif-current",)) -> Network:
    """A one-group lif-current network.

    Parameters
    ----------
    params : ndarray, shape (n_cells, lif n_params)
    y0 : ndarray, shape (n_cells, 3)
        Initial V (mV), I_exc, I_inh (pA).
    t_stop_ms : float
    synapses : sequence of (source, target, delay_ms, weight, receptor)
    events : sequence of (time_ms, cell, receptor, weight)
        Explicit drive events (RECEPTOR_CURRENT adds ``weight`` to the cell's current).
    poisson : sequence of PoissonDrive
    """
    params = np.asarray(params, dtype=np.float64)
    y0 = np.asarray(y0, dtype=np.float64)
    n = params.shape[0]
    p = np.full((n, max_params()), np.nan)
    p[:, :params.shape[1]] = params
    y = np.full((n, max_states()), np.nan)
    y[:, :3] = y0
    syn = np.array(sorted(synapses, key=lambda s: (s[0], s[1])), dtype=np.float64).reshape(-1, 5)
    src = syn[:, 0].astype(np.int64)
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(src, minlength=n), out=ptr[1:])
    ev = np.array(sorted(events, key=lambda e: (e[0], e[1])), dtype=np.float64).reshape(-1, 4)
    drive_events = EventList(
        time_ms=ev[:, 0].copy(), cell=ev[:, 1].astype(np.int64), receptor=ev[:, 2].astype(np.int64),
        weight=ev[:, 3].copy(), source=np.full(ev.shape[0], -(1 + len(poisson)), dtype=np.int64))
    return Network(
        n_cells=n,
        group_names=tuple(group_names),
        group_first=np.array([0, n], dtype=np.int64),
        group_model=tuple(group_model),
        cell_model=np.full(n, lif_current.CODE, dtype=np.int64),
        params=p,
        y0=y,
        n_states=np.full(n, 3, dtype=np.int64),
        syn_ptr=ptr,
        syn_target=syn[:, 1].astype(np.int64),
        syn_delay_ms=syn[:, 2].copy(),
        syn_weight=syn[:, 3].copy(),
        syn_receptor=syn[:, 4].astype(np.int64),
        d_min_ms=float(syn[:, 2].min()) if syn.shape[0] else float("inf"),
        poisson=tuple(poisson),
        events=drive_events,
        seed=seed,
        t_stop_ms=float(t_stop_ms),
    )


def assert_block_loop_identical(kernel, net, t_stop_ms: float, layouts, **options) -> None:
    """Run the block loop once per (threads, cells per block) layout and check that spikes and
    counters are bit-identical (determinism, DESIGN.md); ``options`` go to ``run_grid``."""
    import numba

    from spikegauge.integrate.engine import CellState
    from spikegauge.integrate.fixed_block import run_grid

    before = numba.get_num_threads()
    runs = []
    try:
        for threads, tile in layouts:
            numba.set_num_threads(threads)
            runs.append(run_grid(kernel, net, t_stop_ms, CellState.initial(net), tile=tile, **options))
    finally:
        numba.set_num_threads(before)
    assert runs[0].cell.size > 100
    for other in runs[1:]:
        np.testing.assert_array_equal(other.cell, runs[0].cell)
        np.testing.assert_array_equal(other.time_ms.view(np.int64), runs[0].time_ms.view(np.int64))
        assert other.counters == runs[0].counters
