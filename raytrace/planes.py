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

Memory and parallelism. Particles stream through in chunks, so a slicing job holds the
float64 mass accumulator, the float32 outputs and one chunk, whatever the snapshot
size. Under MPI (:mod:`raytrace.parallel`) each rank deposits its contiguous share of
the particles into its own accumulator; each plane is then summed onto the rank that
computes its potential (planes are dealt out round-robin), and rank 0 gathers the
float32 results and writes the file. Sums run in float64, so MPI and serial planes
agree to float32 rounding.

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
from .parallel import SerialComm, collective
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
    #: transverse mass assignment (its window is sinc^p per axis, raytrace.deposit.WINDOW_ORDER)
    assignment: str = "cic"

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
    fmt: str | None = None,
    chunk_particles: int = 1 << 21,
    log: Callable[[str], None] = lambda s: None,
    comm: SerialComm | None = None,
) -> tuple[np.ndarray, float]:
    """Projected mass per cell, (3, n_slabs, grid, grid), and the deposited total mass.

    With an MPI ``comm`` each rank deposits its share of the particles; plane i of the
    flattened (3 * n_slabs) planes is then summed over the ranks onto rank
    ``i % comm.size`` only (the rank that computes its potential), and the total mass
    is summed onto every rank.
    """
    comm = comm or SerialComm()
    if assignment not in DEPOSIT_PLANES:
        raise RaytraceError(f"planes.assignment: unknown assignment {assignment!r} (known: {', '.join(DEPOSIT_PLANES)})")
    box = header.box_mpc_h
    n_slabs = int(round(box / thickness_mpc_h))
    if n_slabs < 1 or abs(n_slabs * thickness_mpc_h - box) > 1e-6 * box:
        raise RaytraceError(f"planes.thickness_mpc_h: {thickness_mpc_h} does not divide the box side {box} of {header.files[0]}")
    kernel = DEPOSIT_PLANES[assignment]
    mass_grid = np.zeros((3, n_slabs, grid, grid), dtype=np.float64)
    totals = [0.0, 0]

    def deposit() -> None:
        t0 = last = time.perf_counter()
        for chunk in iter_chunks(header, species, fmt=fmt, chunk_size=chunk_particles, rank=comm.rank, size=comm.size):
            kernel(chunk.positions, chunk.masses, box, grid, n_slabs, mass_grid)
            totals[0] += float(chunk.masses.sum())
            totals[1] += len(chunk.masses)
            del chunk  # peak memory: the grids and one chunk, not two
            now = time.perf_counter()
            if now - last > 5.0:  # progress every few seconds, not every chunk
                log(f"deposited {totals[1]} particles{_of_rank(comm)} ({now - t0:.1f} s)")
                last = now
        log(f"deposited {totals[1]} particles{_of_rank(comm)} in {time.perf_counter() - t0:.1f} s")

    # a reading error on any rank (bad file, NaN position ...) stops every rank
    collective(comm, deposit)
    total_mass = comm.sum_scalar(totals[0])
    flat = mass_grid.reshape(3 * n_slabs, grid, grid)
    for i in range(flat.shape[0]):
        comm.sum_to(flat[i], root=i % comm.size)
    return mass_grid, total_mass


def _of_rank(comm: SerialComm) -> str:
    return f" on rank 0 of {comm.size}" if comm.size > 1 else ""


def contrast_from_mass(
    mass_grid: np.ndarray, total_mass: float, box_mpc_h: float, omega_m: float, n_slabs: int | None = None
) -> tuple[np.ndarray, float]:
    """Slab-averaged total-matter contrast from the deposited mass per cell (see module notes).

    ``mass_grid`` is (..., grid, grid) with slabs of thickness box / ``n_slabs``
    (default: its axis 1, as in (3, n_slabs, grid, grid)).
    """
    n_slabs = mass_grid.shape[1] if n_slabs is None else n_slabs
    grid = mass_grid.shape[-1]
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
    fmt: str | None = None,
    chunk_particles: int = 1 << 21,
    workers: int = 1,
    omega_m: float | None = None,
    log: Callable[[str], None] = lambda s: None,
    comm: SerialComm | None = None,
) -> PlaneSet | None:
    """Deposit a snapshot and compute every plane's contrast and potential derivatives.

    ``omega_m`` (default: the header's ``Omega0``) sets the mean matter density the
    contrast is relative to. Under MPI every rank must call this; rank 0 gets the
    :class:`PlaneSet` and the other ranks ``None``.
    """
    mass_grid, total = deposit_snapshot(
        header, grid=grid, thickness_mpc_h=thickness_mpc_h, species=species, assignment=assignment,
        fmt=fmt, chunk_particles=chunk_particles, log=log, comm=comm,
    )
    om = header.omega_m if omega_m is None else float(omega_m)
    planes = planes_from_mass(mass_grid, total, header.box_mpc_h, header.redshift, om, workers=workers, comm=comm)
    if planes is not None:
        planes.assignment = assignment
    return planes


def planes_from_mass(
    mass_grid: np.ndarray,
    total_mass: float,
    box_mpc_h: float,
    redshift: float,
    omega_m: float,
    workers: int = 1,
    comm: SerialComm | None = None,
) -> PlaneSet | None:
    """Contrast and potential derivatives of every plane of a (3, n_slabs, grid, grid) mass grid.

    Under MPI plane i (of the flattened 3 * n_slabs) is computed by rank ``i % size``
    from its summed mass (see :func:`deposit_snapshot`) and gathered on rank 0, which
    returns the :class:`PlaneSet`; the other ranks return ``None``.
    """
    comm = comm or SerialComm()
    if not omega_m > 0:
        raise RaytraceError(f"omega_m: the matter density must be positive to define a contrast, got {omega_m}")
    n_slabs, grid = mass_grid.shape[1], mass_grid.shape[-1]
    t = box_mpc_h / n_slabs
    flat = mass_grid.reshape(3 * n_slabs, grid, grid)
    n_planes = flat.shape[0]
    owner = lambda i: i % comm.size  # noqa: E731
    mine: dict[str, dict[int, np.ndarray]] = {name: {} for name in ("delta", *DERIVATIVES)}
    for i in range(n_planes):
        if owner(i) != comm.rank:
            continue
        delta, _ = contrast_from_mass(flat[i], total_mass, box_mpc_h, omega_m, n_slabs=n_slabs)
        mine["delta"][i] = delta.astype(np.float32)
        d = potential_derivatives(delta * t, box_mpc_h, workers=workers)
        for name in DERIVATIVES:
            mine[name][i] = d[name].astype(np.float32)
    fraction = total_mass / box_mpc_h**3 / (omega_m * RHO_CRIT_1E10_MSUN_H_PER_MPC_H3)
    out = {}
    for name, arrays in mine.items():
        full = np.empty((n_planes, grid, grid), dtype=np.float32) if comm.rank == 0 else None
        comm.gather_arrays(arrays, full, n_planes, owner)
        out[name] = full.reshape(3, n_slabs, grid, grid) if full is not None else None
    if comm.rank != 0:
        return None
    derivs = {name: out[name] for name in DERIVATIVES}
    return PlaneSet(out["delta"], derivs, box_mpc_h, t, redshift, omega_m, fraction)


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
    f.attrs["assignment"] = planes.assignment
    f.attrs["plane_axes"] = np.array(PLANE_AXES)
    f.attrs["layout"] = "arrays [axis, slab, iy, ix]; plane x, y = box axes plane_axes[axis]; potential: lap(phi) = delta * thickness"
