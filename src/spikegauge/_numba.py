"""Numba compilation flags, set in one place.

Every kernel is cached on disk (``cache=True``) so a sweep compiles once per
machine, not once per process. ``fastmath`` stays off: NaN and infinity guards
decide whether a run diverged, and contraction choices must not depend on flags
scattered across modules.
"""
import numba

jit = numba.njit(cache=True, nogil=True)
"""Serial kernel decorator."""

pjit = numba.njit(cache=True, nogil=True, parallel=True)
"""Parallel (prange) kernel decorator."""
