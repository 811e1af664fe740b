"""Small networks of any one model, built straight as flat arrays, for the adaptive tests.

Building the :class:`~spikegauge.network.arrays.Network` by hand lets a test
state every parameter, initial state, synapse and drive event it checks
against (and lets the same right-hand side be handed to scipy and SUNDIALS).
"""
from __future__ import annotations

import numpy as np

from spikegauge.models import MODELS, max_params, max_states
from spikegauge.models.kernels import rhs
from spikegauge.network import EventList, Network

__all__ = ["model_params", "model_network", "hh_rest", "cell_rhs"]


def model_params(model: str, n_cells: int, **overrides) -> np.ndarray:
    """Parameters (n_cells, n_params): the model's defaults with per-key overrides."""
    spec = MODELS[model]
    p = np.tile(spec.default_params(), (n_cells, 1))
    slots = {info.key: info.slot for info in spec.params}
    for key, value in overrides.items():
        p[:, slots[key]] = value
    return p


def hh_rest(v_mv: float = -65.0) -> np.ndarray:
    """hh-squid state with V = v_mv, gates at their steady values there, no conductance (SPEC.md)."""
    from spikegauge.models.hh_squid import _rates
    am, bm, ah, bh, an, bn = _rates(v_mv, False)
    return np.array([v_mv, am / (am + bm), ah / (ah + bh), an / (an + bn), 0.0, 0.0])


def model_network(model: str, params, y0, t_stop_ms, synapses=(), events=(), d_min_ms=None,
                  seed=1) -> Network:
    """A one-group network of ``model`` cells.

    Parameters
    ----------
    params : ndarray, shape (n_cells, n_params)
    y0 : ndarray, shape (n_cells, n_states)
    t_stop_ms : float
    synapses : sequence of (source, target, delay_ms, weight, receptor)
    events : sequence of (time_ms, cell, receptor, weight)
        Explicit drive events.
    d_min_ms : float, optional
        Smallest delay when there are no synapses (default: none, inf).
    """
    spec = MODELS[model]
    params = np.asarray(params, dtype=np.float64)
    y0 = np.asarray(y0, dtype=np.float64)
    n = params.shape[0]
    p = np.full((n, max_params()), np.nan)
    p[:, :params.shape[1]] = params
    y = np.full((n, max_states()), np.nan)
    y[:, :spec.n_states] = y0
    syn = np.array(sorted(synapses, key=lambda s: (s[0], s[1])), dtype=np.float64).reshape(-1, 5)
    src = syn[:, 0].astype(np.int64)
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(src, minlength=n), out=ptr[1:])
    ev = np.array(sorted(events, key=lambda e: (e[0], e[1])), dtype=np.float64).reshape(-1, 4)
    drive_events = EventList(
        time_ms=ev[:, 0].copy(), cell=ev[:, 1].astype(np.int64), receptor=ev[:, 2].astype(np.int64),
        weight=ev[:, 3].copy(), source=np.full(ev.shape[0], -1, dtype=np.int64))
    if syn.shape[0]:
        d_min = float(syn[:, 2].min())
    else:
        d_min = float("inf") if d_min_ms is None else float(d_min_ms)
    return Network(
        n_cells=n, group_names=("cells",), group_first=np.array([0, n], dtype=np.int64),
        group_model=(model,), cell_model=np.full(n, spec.code, dtype=np.int64), params=p, y0=y,
        n_states=np.full(n, spec.n_states, dtype=np.int64), syn_ptr=ptr,
        syn_target=syn[:, 1].astype(np.int64), syn_delay_ms=syn[:, 2].copy(),
        syn_weight=syn[:, 3].copy(), syn_receptor=syn[:, 4].astype(np.int64), d_min_ms=d_min,
        poisson=(), events=drive_events, seed=seed, t_stop_ms=float(t_stop_ms))


def cell_rhs(model: str, p_row):
    """f(t, y) of one cell through the package's compiled right-hand side (for scipy/SUNDIALS)."""
    code = MODELS[model].code
    p = np.ascontiguousarray(p_row, dtype=np.float64)

    def f(t, y):
        out = np.empty(y.size)
        rhs(code, np.ascontiguousarray(y, dtype=np.float64), p, False, out)
        return out

    return f
