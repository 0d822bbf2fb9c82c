r"""Lens planes: slabs of a snapshot projected along each box axis.

For projection axis :math:`a`, the box is cut into slabs of thickness :math:`t` along
:math:`a`; each slab's particles are deposited onto a periodic ``grid``\ :sup:`2` mesh
over the two other axes (``PLANE_AXES[a]`` gives which box axes are the plane's x and
y). The stored ``delta`` is the slab-averaged density contrast of *total* matter,

.. math::
    \bar\delta = \frac{\Sigma - \bar\rho_{\rm dep}\,t}{\bar\rho_m\,t},

where :math:`\Sigma` is the deposited surface density, :math:`\bar\rho_{\rm dep}` the
mean density of the deposited species and :math:`\bar\rho_m = \Omega_m\rho_{\rm crit}`
(``Omega0`` of the header). Species not deposited (e.g. neutrinos in a cold-matter-only
run) are thereby a uniform background; depositing several species sums them with
their true masses, so the plane is their mass-weighted sum.

The plane's potential solves :math:`\nabla_\perp^2\phi = \bar\delta\,t` on the periodic
slab by FFT (the zero mode is removed: the mean density does not lens). Its first and
second derivatives come from the same transform, :math:`\partial_i \to i k_i`, and are
stored in float32 (``dphi_dx``, ``dphi_dy``, ``d2phi_dxx``, ``d2phi_dyy``,
``d2phi_dxy``). Tracing multiplies them by :math:`3\Omega_m (H_0/c)^2 (1+z)` to get the
lensing potential of the plane (Schneider, Ehlers & Falco 1992, ch. 9).

References
----------
Schneider, P., Ehlers, J. & Falco, E. E. 1992, *Gravitational Lenses*, Springer.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
import scipy.fft

from .deposit import DEPOSIT_PLANES, PLANE_AXES
from .errors import RaytraceError
from .snapshots import RHO_CRIT_1E10_MSUN_H_PER_MPC_H3, SnapshotHeader, iter_chunks

DERIVATIVES = ("dphi_dx", "dphi_dy", "d2phi_dxx", "d2phi_dyy", "d2phi_dxy")


@dataclass
class PlaneSet:
    """All planes of one snapshot: arrays are (3 axes, n_slabs, grid, grid), [.., iy, ix]."""

    delta: np.ndarray
    derivatives: dict[str, np.ndarray]
    box_mpc_h: float
    thickness_mpc_h: float
    redshift: float
    omega_m: float
    deposited_fraction: float

    @property
    def grid(self) -> int:
        return self.delta.shape[-1]

    @property
    def n_slabs(self) -> int:
        return self.delta.shape[1]


def deposit_snapshot(
    header: SnapshotHeader,
    *,
    grid: int,
    thickness_mpc_h: float,
    species: Sequence[int] = (1,),
    assignment: str = "cic",
    fmt: str = "hdf5",
    chunk_particles: int = 1 << 21,
    log: Callable[[str], None] = lambda s: None,
) -> tuple[np.ndarray, float]:
    """Projected mass per cell, (3, n_slabs, grid, grid), and the deposited total mass."""
    if assignment not in DEPOSIT_PLANES:
        raise RaytraceError(f"planes.assignment: unknown assignment {assignment!r}")
    box = header.box_mpc_h
    n_slabs = int(round(box / thickness_mpc_h))
    if n_slabs < 1 or abs(n_slabs * thickness_mpc_h - box) > 1e-6 * box:
        raise RaytraceError(f"planes.thickness_mpc_h: {thickness_mpc_h} does not divide the box side {box} of {header.files[0]}")
    kernel = DEPOSIT_PLANES[assignment]
    mass_grid = np.zeros((3, n_slabs, grid, grid), dtype=np.float64)
    total_mass, n_done, t0 = 0.0, 0, time.perf_counter()
    n_all = sum(header.n_total.get(t, 0) for t in species)
    for chunk in iter_chunks(header, species, fmt=fmt, chunk_size=chunk_particles):
        kernel(chunk.positions, chunk.masses, box, grid, n_slabs, mass_grid)
        total_mass += float(chunk.masses.sum())
        n_done += len(chunk.masses)
        log(f"deposited {n_done}/{n_all} particles ({time.perf_counter() - t0:.1f} s)")
    return mass_grid, total_mass


def contrast_from_mass(
    mass_grid: np.ndarray, total_mass: float, box_mpc_h: float, omega_m: float
) -> tuple[np.ndarray, float]:
    """Slab-averaged total-matter contrast from the deposited mass per cell (see module notes)."""
    n_slabs, grid = mass_grid.shape[1], mass_grid.shape[-1]
    t = box_mpc_h / n_slabs
    cell_area = (box_mpc_h / grid) ** 2
    rho_dep = total_mass / box_mpc_h**3
    rho_m = omega_m * RHO_CRIT_1E10_MSUN_H_PER_MPC_H3
    delta = (mass_grid / cell_area - rho_dep * t) / (rho_m * t)
    return delta, rho_dep / rho_m


def potential_derivatives(delta_proj: np.ndarray, box_mpc_h: float, workers: int = 1) -> dict[str, np.ndarray]:
    r"""First and second derivatives of :math:`\phi` with :math:`\nabla^2\phi = \Sigma` on a periodic square.

    Parameters
    ----------
    delta_proj : (grid, grid) source :math:`\Sigma` indexed [iy, ix] (here
        :math:`\bar\delta\,t` in Mpc/h).
    box_mpc_h : side of the square.

    Returns
    -------
    dict of (grid, grid) float64 arrays named as in :data:`DERIVATIVES`.
    Odd derivatives have their Nyquist modes set to zero so they stay real.
    """
    n = delta_proj.shape[-1]
    ky = 2.0 * np.pi * scipy.fft.fftfreq(n, d=box_mpc_h / n)[:, None]
    kx = 2.0 * np.pi * scipy.fft.rfftfreq(n, d=box_mpc_h / n)[None, :]
    ksq = kx**2 + ky**2
    inv = np.zeros_like(ksq)
    inv[ksq > 0] = -1.0 / ksq[ksq > 0]
    phi_k = scipy.fft.rfft2(delta_proj, workers=workers) * inv
    kx_odd, ky_odd = kx.copy(), ky.copy()
    if n % 2 == 0:
        kx_odd[:, -1] = 0.0
        ky_odd[n // 2, :] = 0.0
    inverse = lambda a: scipy.fft.irfft2(a, s=(n, n), workers=workers)  # noqa: E731
    return {
        "dphi_dx": inverse(1j * kx_odd * phi_k),
        "dphi_dy": inverse(1j * ky_odd * phi_k),
        "d2phi_dxx": inverse(-kx * kx * phi_k),
        "d2phi_dyy": inverse(-ky * ky * phi_k),
        "d2phi_dxy": inverse(-kx_odd * ky_odd * phi_k),
    }


def slice_snapshot(
    header: SnapshotHeader,
    *,
    grid: int,
    thickness_mpc_h: float,
    species: Sequence[int] = (1,),
    assignment: str = "cic",
    fmt: str = "hdf5",
    chunk_particles: int = 1 << 21,
    workers: int = 1,
    log: Callable[[str], None] = lambda s: None,
) -> PlaneSet:
    """Deposit a snapshot and compute every plane's contrast and potential derivatives."""
    mass_grid, total = deposit_snapshot(
        header, grid=grid, thickness_mpc_h=thickness_mpc_h, species=species, assignment=assignment,
        fmt=fmt, chunk_particles=chunk_particles, log=log,
    )
    return planes_from_mass(mass_grid, total, header.box_mpc_h, header.redshift, header.omega_m, workers=workers)


def planes_from_mass(
    mass_grid: np.ndarray, total_mass: float, box_mpc_h: float, redshift: float, omega_m: float, workers: int = 1
) -> PlaneSet:
    delta, fraction = contrast_from_mass(mass_grid, total_mass, box_mpc_h, omega_m)
    n_slabs = delta.shape[1]
    t = box_mpc_h / n_slabs
    derivs = {name: np.empty(delta.shape, dtype=np.float32) for name in DERIVATIVES}
    for a in range(3):
        for s in range(n_slabs):
            d = potential_derivatives(delta[a, s] * t, box_mpc_h, workers=workers)
            for name in DERIVATIVES:
                derivs[name][a, s] = d[name]
    return PlaneSet(delta.astype(np.float32), derivs, box_mpc_h, t, redshift, omega_m, fraction)


DERIVATIVE_UNITS = {"dphi_dx": "(Mpc/h)^2", "dphi_dy": "(Mpc/h)^2", "d2phi_dxx": "Mpc/h", "d2phi_dyy": "Mpc/h", "d2phi_dxy": "Mpc/h"}


def write_planes(f, planes: PlaneSet) -> None:
    """Store a :class:`PlaneSet` in an open HDF5 file (see :func:`raytrace.hdf5.atomic_h5`)."""
    g = planes.grid
    chunks = (1, 1, g, g)
    ds = f.create_dataset("delta", data=planes.delta, chunks=chunks)
    ds.attrs["unit"] = "1"
    ds.attrs["description"] = "slab-averaged total-matter density contrast"
    for name in DERIVATIVES:
        ds = f.create_dataset(name, data=planes.derivatives[name], chunks=chunks)
        ds.attrs["unit"] = DERIVATIVE_UNITS[name]
    f.attrs["box_mpc_h"] = planes.box_mpc_h
    f.attrs["thickness_mpc_h"] = planes.thickness_mpc_h
    f.attrs["grid"] = g
    f.attrs["n_slabs"] = planes.n_slabs
    f.attrs["redshift"] = planes.redshift
    f.attrs["omega_m"] = planes.omega_m
    f.attrs["deposited_fraction"] = planes.deposited_fraction
    f.attrs["plane_axes"] = np.array(PLANE_AXES)
    f.attrs["layout"] = "arrays [axis, slab, iy, ix]; plane x, y = box axes plane_axes[axis]; potential: lap(phi) = delta * thickness"
