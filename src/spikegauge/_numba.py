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

jit = numba.njit(cache=True, nogil=True, error_model="numpy")
"""Serial kernel decorator."""

pjit = numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy")
"""Parallel (prange) kernel decorator."""

inline_jit = numba.njit(cache=True, nogil=True, inline="always", error_model="numpy")
"""Serial kernel inlined into its callers at numba IR level (small hot helpers)."""
