"""Compiled position check for :func:`raytrace.snapshots.check_chunk` (imported on first use)."""

from __future__ import annotations

from numba import njit


@njit(cache=True, nogil=True)
def position_range(a):
    """(no NaN or infinity, min, max) of a C-contiguous array, in one pass."""
    flat = a.reshape(-1)
    lo = hi = flat[0] if flat.size else 0.0
    nan_or_inf = 0.0  # v * 0 is NaN exactly for NaN and infinite v; branch-free, so the loop vectorises
    for i in range(flat.size):
        v = flat[i]
        lo = min(lo, v)
        hi = max(hi, v)
        nan_or_inf += v * 0.0
    return nan_or_inf == 0.0, lo, hi
