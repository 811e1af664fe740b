"""Lists of ``neo.SpikeTrain`` (the Neo object model): train ``k`` is cell ``k``, units honoured."""
from __future__ import annotations

import numpy as np

from ..errors import InputError
from .spike_table import SpikeTable, check_times

INSTALL_HINT = "pip install 'spikegauge[formats]'"


def is_train_list(obj) -> bool:
    """True for a non-empty list or tuple whose items are all neo.SpikeTrain (False without neo)."""
    if not isinstance(obj, (list, tuple)) or not obj:
        return False
    try:
        import neo
    except ImportError:
        return False
    return all(isinstance(t, neo.SpikeTrain) for t in obj)


def read_neo_trains(trains, source: str = "<neo.SpikeTrain list>") -> SpikeTable:
    """Turn a list of ``neo.SpikeTrain`` into spikes: train ``k`` is cell ``k``.

    Parameters
    ----------
    trains : sequence of neo.SpikeTrain
        One train per cell, in cell order; each in any time unit (quantities).
    source : str
        Named in messages.

    Returns
    -------
    SpikeTable
        Times in ms; ``n_cells`` is the number of trains; the interval is the
        common part of the trains' ``[t_start, t_stop)``.

    Raises
    ------
    InputError
        neo missing, an item that is not a SpikeTrain, a unit that is not a
        time, NaN or negative times.
    """
    try:
        import neo
        import quantities as pq
    except ImportError:
        raise InputError(f"{source}: reading neo.SpikeTrain lists needs neo; install it with {INSTALL_HINT}") \
            from None
    cells, times, starts, stops = [], [], [], []
    for k, train in enumerate(trains):
        if not isinstance(train, neo.SpikeTrain):
            raise InputError(f"{source}: item {k} is a {type(train).__name__}, not a neo.SpikeTrain")
        try:
            factor = float(pq.Quantity(1.0, train.units).rescale(pq.ms).magnitude)
        except ValueError:
            raise InputError(f"{source}: item {k}: unit {train.units.dimensionality} is not a time") from None
        t = np.asarray(train.magnitude, dtype=np.float64).ravel() * factor
        check_times(t, source, lambda i, k=k: f"item {k} spike {i}")
        cells.append(np.full(t.size, k, dtype=np.int64))
        times.append(t)
        starts.append(float(train.t_start.rescale(pq.ms).magnitude))
        stops.append(float(train.t_stop.rescale(pq.ms).magnitude))
    if not cells:
        raise InputError(f"{source}: no spike trains")
    offsets = np.cumsum([0] + [t.size for t in times])

    def place(i: int) -> str:
        k = int(np.searchsorted(offsets, i, side="right")) - 1
        return f"item {k} spike {i - offsets[k]}"

    return SpikeTable(cell=np.concatenate(cells), time_ms=np.concatenate(times), source=source, place=place,
                      n_cells=len(cells), t_start_ms=max(starts), t_stop_ms=min(stops))
