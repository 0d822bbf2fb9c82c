"""Mass-assignment kernels (compiled with numba, cached on disk).

Grid convention: cell ``i`` covers ``[i*d, (i+1)*d)`` and represents the point
``(i + 0.5)*d``; grids are periodic. Cloud-in-cell (CIC) spreads a particle over the
2 (per axis) nearest cell centres with linear weights (Hockney & Eastwood 1988,
*Computer Simulation Using Particles*, ch. 5); nearest grid point (NGP) puts it in its
cell. For lens planes the line-of-sight coordinate is always NGP: a particle belongs
to exactly one slab.
"""

from __future__ import annotations

import numpy as np
from numba import njit

#: transverse axes (x, y) of the plane projected along each box axis; cyclic order keeps
#: every projection right-handed with the line of sight as the third axis
PLANE_AXES = ((1, 2), (2, 0), (0, 1))


@njit(cache=True, nogil=True, inline="always")
def _wrap(i: int, n: int) -> int:
    i = i % n
    return i + n if i < 0 else i


@njit(cache=True, nogil=True, inline="always")
def _cic_cells(u: float, n: int):
    """Lower cell, upper cell and upper weight for u = x / cell - 1/2, periodic on n cells.

    Positions lie in [0, box), so u lies in [-1/2, n - 1/2): int(u + 1) - 1 is the
    floor, and only the lower index -1 (or n, for positions rounded up to the box side)
    needs wrapping.
    """
    i0 = int(u + 1.0) - 1
    f = u - i0
    if i0 < 0:
        i0 += n
    elif i0 >= n:
        i0 -= n
    i1 = i0 + 1
    if i1 >= n:
        i1 -= n
    return i0, i1, f


# fastmath: positions are checked finite before deposition; reassociation only
@njit(cache=True, nogil=True, fastmath=True)
def deposit_planes_cic(pos, mass, box, grid, n_slabs, out):
    """Deposit particles onto the slabs of all three projections at once (CIC transverse).

    Parameters
    ----------
    pos : (n, 3) float64 positions in [0, box).
    mass : (n,) float64 masses.
    box : box side.
    grid : plane cells per side.
    n_slabs : slabs per projection axis.
    out : (3, n_slabs, grid, grid) float64 accumulator, indexed [axis, slab, iy, ix].
    """
    cell = box / grid
    inv_cell = 1.0 / cell
    inv_t = n_slabs / box
    for p in range(pos.shape[0]):
        m = mass[p]
        for a in range(3):
            ax = (a + 1) % 3
            ay = (a + 2) % 3
            s = int(pos[p, a] * inv_t)
            if s >= n_slabs:
                s = n_slabs - 1
            elif s < 0:
                s = 0
            ix0, ix1, fx = _cic_cells(pos[p, ax] * inv_cell - 0.5, grid)
            iy0, iy1, fy = _cic_cells(pos[p, ay] * inv_cell - 0.5, grid)
            my1 = m * fy
            my0 = m - my1
            out[a, s, iy0, ix0] += my0 - my0 * fx
            out[a, s, iy0, ix1] += my0 * fx
            out[a, s, iy1, ix0] += my1 - my1 * fx
            out[a, s, iy1, ix1] += my1 * fx


@njit(cache=True, nogil=True)
def deposit_planes_ngp(pos, mass, box, grid, n_slabs, out):
    """As :func:`deposit_planes_cic` with nearest-grid-point assignment."""
    inv_cell = grid / box
    inv_t = n_slabs / box
    for p in range(pos.shape[0]):
        m = mass[p]
        for a in range(3):
            s = min(max(int(pos[p, a] * inv_t), 0), n_slabs - 1)
            ix = _wrap(int(pos[p, (a + 1) % 3] * inv_cell), grid)
            iy = _wrap(int(pos[p, (a + 2) % 3] * inv_cell), grid)
            out[a, s, iy, ix] += m


@njit(cache=True, nogil=True, fastmath=True)
def cic_2d(x, y, w, box, grid, out):
    """CIC of points (x, y) with weights w onto a periodic (grid, grid) array [iy, ix]."""
    inv_cell = grid / box
    for p in range(x.shape[0]):
        ix0, ix1, fx = _cic_cells(x[p] * inv_cell - 0.5, grid)
        iy0, iy1, fy = _cic_cells(y[p] * inv_cell - 0.5, grid)
        wy1 = w[p] * fy
        wy0 = w[p] - wy1
        out[iy0, ix0] += wy0 - wy0 * fx
        out[iy0, ix1] += wy0 * fx
        out[iy1, ix0] += wy1 - wy1 * fx
        out[iy1, ix1] += wy1 * fx


@njit(cache=True, nogil=True)
def cic_3d(pos, mass, box, grid, out):
    """CIC onto a periodic (grid, grid, grid) array indexed [i0, i1, i2] by position axes."""
    inv_cell = grid / box
    for p in range(pos.shape[0]):
        u0 = pos[p, 0] * inv_cell - 0.5
        u1 = pos[p, 1] * inv_cell - 0.5
        u2 = pos[p, 2] * inv_cell - 0.5
        i0 = int(np.floor(u0))
        i1 = int(np.floor(u1))
        i2 = int(np.floor(u2))
        f0 = u0 - i0
        f1 = u1 - i1
        f2 = u2 - i2
        a0 = _wrap(i0, grid)
        a1 = _wrap(i1, grid)
        a2 = _wrap(i2, grid)
        b0 = a0 + 1 if a0 + 1 < grid else 0
        b1 = a1 + 1 if a1 + 1 < grid else 0
        b2 = a2 + 1 if a2 + 1 < grid else 0
        m = mass[p]
        out[a0, a1, a2] += m * (1 - f0) * (1 - f1) * (1 - f2)
        out[b0, a1, a2] += m * f0 * (1 - f1) * (1 - f2)
        out[a0, b1, a2] += m * (1 - f0) * f1 * (1 - f2)
        out[a0, a1, b2] += m * (1 - f0) * (1 - f1) * f2
        out[b0, b1, a2] += m * f0 * f1 * (1 - f2)
        out[b0, a1, b2] += m * f0 * (1 - f1) * f2
        out[a0, b1, b2] += m * (1 - f0) * f1 * f2
        out[b0, b1, b2] += m * f0 * f1 * f2


DEPOSIT_PLANES = {"cic": deposit_planes_cic, "ngp": deposit_planes_ngp}
