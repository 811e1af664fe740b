"""Numba compilation flags and the on-disk cache, set in one place.

Every kernel is cached on disk (``cache=True``) so a sweep compiles once per
machine, not once per process. ``fastmath`` stays off: NaN and infinity guards
decide whether a run diverged.

Numba checks a cached kernel only against its own source file, not against
the kernels it calls or inlines from other files (a changed model right-hand
side, or a changed stepper inlined into the fixed-step driver, would leave the
driver's cached code stale; this has hidden real bugs here). So the cache
lives in a folder named after a hash of every source file of the packages that
hold kernels: any edit there starts a fresh cache. ``NUMBA_CACHE_DIR``, when
set, is the parent of that folder.

Threads that wait sleep, not spin. A parallel region (one per window of the
window loop) ends when its slowest thread does. OpenMP's default lets a
waiting thread spin on a core for a while first (GNU: about 300000 turns);
with one of two cores busy with another program, our two spinning threads
and that program then share the cores by time slices, and each region waits
for a descheduled thread: measured here on demo-lif-sized networks (100
cells, 300 ms, best of 3 with ``python3 -c "while True: pass"`` on the other
core), fixed rk4/exact delivery took 4.40 s on two threads against 0.89 s on
one, local-adaptive dp54 2.01 s against 0.32 s, the exact reference 1.15 s
against 0.09 s. With ``OMP_WAIT_POLICY=PASSIVE`` a waiting thread sleeps at
once (the scheduler then favours it when it wakes), and the same runs took
0.43 s against 0.43 s, 0.13 s against 0.15 s. numba's own ``workqueue`` layer
sleeps too, but it hands even a one-thread region to a worker thread (0.51 s
instead of 0.15 s one-thread for local-adaptive under the same load). So the
OpenMP layer comes first (where it exists; tbb, then workqueue, otherwise) and
its wait policy is passive, unless the user set ``NUMBA_THREADING_LAYER``,
``NUMBA_THREADING_LAYER_PRIORITY`` or ``OMP_WAIT_POLICY`` themselves. Both
must be set before numba loads its threading layer (at the first parallel
kernel), which is why they live here, in the module every kernel imports.
"""
import hashlib
import os
from pathlib import Path

import numba


KERNEL_PACKAGES = ("models", "integrate", "analysis")
"""Sub-packages whose modules define numba kernels (keep in step with the code)."""

STRICT_EXP_ENV = "SPIKEGAUGE_STRICT_EXP"
"""Set to 1 to build the models with the C library's exp instead of the vectorisable one
(:mod:`spikegauge.models.fastexp`); part of the cache key."""


def _source_digest() -> str:
    root = Path(__file__).resolve().parent
    h = hashlib.sha256(numba.__version__.encode())
    files = [root / "_numba.py"] + sorted(
        p for sub in KERNEL_PACKAGES for p in (root / sub).rglob("*.py"))
    for path in files:
        h.update(str(path.relative_to(root)).encode())
        h.update(path.read_bytes())
    h.update(os.environ.get(STRICT_EXP_ENV, "").encode())  # a compile-time switch of the models
    return h.hexdigest()[:16]


def _cache_dir() -> str:
    base = os.environ.get("NUMBA_CACHE_DIR") or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache"),
        "spikegauge")
    return os.path.join(base, f"numba-{_source_digest()}")


numba.config.CACHE_DIR = _cache_dir()

WAIT_POLICY = "PASSIVE"
"""OpenMP wait policy set when the user did not choose one (see the module docstring)."""

LAYER_PRIORITY = ["omp", "tbb", "workqueue"]
"""numba threading layers in order of preference (see the module docstring)."""

os.environ.setdefault("OMP_WAIT_POLICY", WAIT_POLICY)  # read by the OpenMP runtime when it loads
if "NUMBA_THREADING_LAYER_PRIORITY" not in os.environ:
    numba.config.THREADING_LAYER_PRIORITY = list(LAYER_PRIORITY)

jit = numba.njit(cache=True, nogil=True, error_model="numpy")
"""Serial kernel decorator."""

pjit = numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy")
"""Parallel (prange) kernel decorator."""

inline_jit = numba.njit(cache=True, nogil=True, inline="always", error_model="numpy")
"""Serial kernel inlined into its callers at numba IR level (small hot helpers)."""
