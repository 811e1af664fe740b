"""How many threads a run uses when the caller does not say: never more than help.

Two things limit what a second thread buys. A parallel region (one per window
of the window loop, a window being no longer than the smallest delay) costs
a thread wake-up and a join, which a small network's window of work does not
repay; and a core that another program keeps busy is no core for us (a
region waits for its slowest thread, so a thread that shares a core with a
busy program makes the whole run wait). So the default is the smallest of:
the numba threads allowed (``numba.get_num_threads()``, which
``NUMBA_NUM_THREADS`` or ``numba.set_num_threads`` set), one thread per
:data:`CELLS_PER_THREAD` cells, and the cores not busy with other programs.

Results are bit-identical for any thread count (DESIGN.md), so the choice
changes how long a run takes, never what it computes.
"""
from __future__ import annotations

import os

import numba

CELLS_PER_THREAD = 100
"""Cells per thread: the default uses a second thread from 200 cells on. Measured on
demo-lif-sized networks (scenarios/demo-lif.toml with its group sizes scaled,
its connection probability scaled inversely) on a 2-core machine shared with other work,
best of 3 runs of 200 ms, 1 against 2 threads: fixed rk4 with exact delivery
0.34 against 0.34 s at 50 cells, 0.41 against 0.38 s at 100, 0.56 against
0.33 s at 200; local-adaptive dp54 0.095 against 0.079 s at 100, 0.275 against
0.213 s at 200. Below 200 cells the second thread buys little and costs a
thread wake-up per window, which a loaded machine can stretch (the limit of
``2 * CELLS_PER_THREAD`` cells for two threads)."""


def usable_cores() -> int:
    """Cores this process may run on that no other program keeps busy (at least one).

    The cores are those of the process's affinity mask where the system has
    one (``os.sched_getaffinity``), else ``os.cpu_count()``. Busy ones are the
    other runnable threads counted by the kernel right now (``/proc/loadavg``'s
    running count, less this thread); without ``/proc`` the one-minute load
    average stands in, less one for this process.
    """
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cores = os.cpu_count() or 1
    return max(1, cores - _busy_elsewhere())


def _busy_elsewhere() -> int:
    try:
        with open("/proc/loadavg") as fh:
            running = int(fh.read().split()[3].split("/")[0])
        return max(0, running - 1)
    except (OSError, IndexError, ValueError):
        pass
    try:
        return max(0, int(round(os.getloadavg()[0])) - 1)
    except (AttributeError, OSError):
        return 0


def default_threads(n_cells: int) -> int:
    """Threads for a run of ``n_cells`` cells when none are asked for.

    Parameters
    ----------
    n_cells : int
        Cells in the network.

    Returns
    -------
    int
        ``min(numba.get_num_threads(), n_cells // CELLS_PER_THREAD, usable_cores())``,
        at least 1.
    """
    by_size = int(n_cells) // CELLS_PER_THREAD
    if by_size <= 1:
        return 1  # no need to look at the machine
    return max(1, min(numba.get_num_threads(), by_size, usable_cores()))
