"""The built network as flat arrays: what every driver consumes.

All times in ms. Cells are numbered 0..n_cells-1, group by group in scenario
order. Every array is owned by the :class:`Network` and never modified by a
driver (drivers copy ``y0`` and ``params`` before integrating).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class PoissonDrive:
    """Independent Poisson trains, one per target cell.

    Attributes
    ----------
    drive_id : int
        Index of the drive in the scenario; keys its random streams.
    cells : ndarray of int64, shape (n,)
        Target cell ids.
    rate_hz : ndarray of float64, shape (n,)
        Rate of each cell's train (Hz).
    weight : float
        Increment of the receptor's synaptic state per event (target model's unit).
    receptor : int
        RECEPTOR_EXC or RECEPTOR_INH.
    start_ms, stop_ms : float
        The train is active on [start_ms, stop_ms).
    """

    drive_id: int
    cells: np.ndarray
    rate_hz: np.ndarray
    weight: float
    receptor: int
    start_ms: float
    stop_ms: float


@dataclass(frozen=True)
class EventList:
    """Explicit external events known in advance (current steps, spike files).

    Each event: at ``time_ms`` add ``weight`` to the receptor's state of ``cell``
    (for RECEPTOR_CURRENT: add ``weight`` to the cell's external current).
    ``source`` is ``-(1 + drive index)`` of the drive each event comes from, so
    same-time events into one cell are applied in a fixed order. Sorted by
    (time, cell, source).
    """

    time_ms: np.ndarray   # float64 (n,)
    cell: np.ndarray      # int64 (n,)
    receptor: np.ndarray  # int64 (n,)
    weight: np.ndarray    # float64 (n,)
    source: np.ndarray    # int64 (n,)


@dataclass(frozen=True)
class Network:
    """Flat-array network.

    Attributes
    ----------
    n_cells : int
    group_names : tuple of str
    group_first : ndarray of int64, shape (n_groups + 1,)
        First cell id of each group; last entry is n_cells.
    group_model : tuple of str
        Model name of each group.
    cell_model : ndarray of int64, shape (n_cells,)
        Model code of each cell.
    params : ndarray of float64, shape (n_cells, max_params)
        Per-cell parameters (NaN-padded past the model's n_params).
    y0 : ndarray of float64, shape (n_cells, max_states)
        Initial state (NaN-padded past the model's n_states).
    n_states : ndarray of int64, shape (n_cells,)
        Number of states of each cell's model.
    syn_ptr : ndarray of int64, shape (n_cells + 1,)
        CSR row pointer by source: synapses of source s are syn_ptr[s]:syn_ptr[s+1],
        sorted by target, then by scenario order.
    syn_target : ndarray of int64, shape (n_syn,)
    syn_delay_ms : ndarray of float64, shape (n_syn,)
    syn_weight : ndarray of float64, shape (n_syn,)
    syn_receptor : ndarray of int64, shape (n_syn,)
    d_min_ms : float
        Smallest delay (inf when there are no synapses).
    poisson : tuple of PoissonDrive
    events : EventList
        Current steps and file-given spikes, merged and sorted.
    seed : int
    t_stop_ms : float
        Scenario duration; runs start at 0.
    """

    n_cells: int
    group_names: tuple
    group_first: np.ndarray
    group_model: tuple
    cell_model: np.ndarray
    params: np.ndarray
    y0: np.ndarray
    n_states: np.ndarray
    syn_ptr: np.ndarray
    syn_target: np.ndarray
    syn_delay_ms: np.ndarray
    syn_weight: np.ndarray
    syn_receptor: np.ndarray
    d_min_ms: float
    poisson: tuple
    events: EventList
    seed: int
    t_stop_ms: float

    @property
    def n_synapses(self) -> int:
        return int(self.syn_target.size)
