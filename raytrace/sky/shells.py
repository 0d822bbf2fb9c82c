r"""Concentric density shells around the observer, as HEALPix maps.

A shell :math:`k` covers comoving distances :math:`[\chi_{{\rm lo},k}, \chi_{{\rm hi},k})`.
Its map holds, per pixel, the total-matter density contrast averaged over the shell's
radial extent with weight :math:`d\chi` (not volume),

.. math::
    \bar\delta_k(\hat n) = \frac{1}{\Delta\chi_k}\int_{\chi_{\rm lo}}^{\chi_{\rm hi}}
    \delta(\chi\hat n)\,d\chi
    = \frac{1}{\bar\rho_m}\Big[\frac{1}{\Omega_{\rm pix}\Delta\chi_k}
      \sum_{p\in{\rm pix}} \frac{m_p}{\chi_p^2} - \bar\rho_{\rm dep}\Big],

because the volume element is :math:`\chi^2 d\chi\, d\Omega`: every particle is binned
into the pixel of its direction with weight :math:`m_p/\chi_p^2`. This is the quantity
the lensing integrals need (:mod:`raytrace.sky.tracing`), the spherical analogue of the
slab-averaged contrast of :mod:`raytrace.planes`. :math:`\bar\rho_m = \Omega_m\rho_{\rm crit}`
is the mean total-matter density and :math:`\bar\rho_{\rm dep}` that of the deposited
particles: species that are not deposited (neutrinos in the demo suite) are a uniform
background, as in the planes.

Three ways to build shells (``shells.kind``):

``tile``
    The periodic snapshot box is repeated around the observer out to the highest redshift
    needed ("onion shells" from a tiled box; Fosalba et al. 2008, Teyssier et al. 2009).
    For every shell and realisation a seeded generator draws a uniform rotation
    (Shoemake 1992) and a periodic shift of the box, and the shell takes the snapshot
    nearest in redshift to its centre. Shell k of realisation r holds the particle images
    :math:`\mathbf y = R_k(\mathbf x + \mathbf s_k + \mathbf m L)` (all integer vectors
    :math:`\mathbf m`) with :math:`|\mathbf y|` inside the shell. With
    ``maps.randomize_planes: false`` the rotation is the identity and the shift zero.
``lightcone``
    User light-cone particle files: positions relative to the observer at their own epoch.
``healpix``
    User HEALPix density shells, in the layout of the files this stage writes.

Fast binning: the particles of a snapshot are sorted once into ``blocks_per_side``\ :sup:`3`
cubic blocks. For a shell, only the (block, replica) pairs whose bounding box meets the
shell (and, for a patch, the cone around the patch) are visited, and each particle of a
visited block is tested, rotated and binned in one compiled pass (:func:`vec2pix_ring`),
so no temporary array of images is ever made.

References
----------
Fosalba, P., Gaztañaga, E., Castander, F. J. & Manera, M. 2008, MNRAS 391, 435.
Teyssier, R., Pires, S., Prunet, S. et al. 2009, A&A 497, 335.
Shoemake, K. 1992, in *Graphics Gems III*, Academic Press, p. 124.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator, Sequence

import numpy as np
from numba import njit

from ..config import PlaneSchedule, plane_schedule
from ..cosmology import Cosmology
from ..errors import RaytraceError
from ..snapshots import RHO_CRIT_1E10_MSUN_H_PER_MPC_H3
from .pixels import nside_from_npix, npix, pixel_area_sr, random_rotation, vec2pix_ring, vec2pix_ring_r

#: first element of the per-realisation seed of the shell choices (planes use 1, phases 0)
SHELL_STREAM = 2

KINDS = ("tile", "lightcone", "healpix")


# ------------------------------------------------------------------------------------
# schedule and per-realisation choices
def shell_schedule(cosmo: Cosmology, thickness_mpc_h: float, chi_max: float, snapshot_z: Sequence[float],
                   *, whole: bool = False) -> PlaneSchedule:
    """Shells of equal thickness from the observer; the last one reaches at least ``chi_max``.

    With ``whole=True`` only shells that end at or before ``chi_max`` are kept (a light
    cone that ends there). Each shell takes the snapshot nearest its centre in redshift.
    """
    if whole:
        n = int(math.floor(chi_max / thickness_mpc_h + 1e-9))
        if n < 1:
            raise RaytraceError(f"shells.thickness_mpc_h: {thickness_mpc_h} exceeds the light cone's depth ({chi_max:g} Mpc/h)")
        chi_max = n * thickness_mpc_h
    z_max = float(cosmo.redshift_at(chi_max))
    sched = plane_schedule(cosmo, thickness_mpc_h, z_max, list(snapshot_z) or [0.0])
    if whole:
        keep = sched.chi_hi <= chi_max * (1 + 1e-9)
        sched = PlaneSchedule(*(getattr(sched, f)[keep] for f in ("chi_lo", "chi_hi", "chi", "z", "snapshot")))
    return sched


@dataclass(frozen=True)
class ShellChoice:
    """How one realisation tiles the box for each shell."""

    snapshot: np.ndarray  # (n,)
    rotation: np.ndarray  # (n, 3, 3): box frame -> sky frame
    shift: np.ndarray  # (n, 3) Mpc/h


def realization_seed(seed: int, realization: int) -> np.random.SeedSequence:
    """Seed stream of one realisation's shell rotations and shifts (the same in every model)."""
    return np.random.SeedSequence([int(seed), SHELL_STREAM, int(realization)])


def choose_shells(schedule: PlaneSchedule, box_mpc_h: float, seed: int, realization: int,
                  randomize: bool = True) -> ShellChoice:
    """A uniform rotation and a periodic shift per shell from the realisation's generator."""
    n = schedule.n_planes
    rng = np.random.default_rng(realization_seed(seed, realization))
    rotation = np.array([random_rotation(rng) for _ in range(n)]).reshape(n, 3, 3)
    shift = rng.uniform(0.0, box_mpc_h, size=(n, 3))
    if not randomize:
        rotation = np.broadcast_to(np.eye(3), (n, 3, 3)).copy()
        shift = np.zeros((n, 3))
    return ShellChoice(schedule.snapshot.copy(), rotation, shift)


# ------------------------------------------------------------------------------------
# compiled kernels
@njit(cache=True, nogil=True)
def _block_sort(pos, mass, box, nb, out_pos, out_mass):
    """Counting sort of particles into nb^3 blocks; returns the block offsets (nb^3 + 1,)."""
    n = pos.shape[0]
    scale = nb / box
    ids = np.empty(n, dtype=np.int64)
    counts = np.zeros(nb * nb * nb + 1, dtype=np.int64)
    for p in range(n):
        b = 0
        for a in range(3):
            i = int(pos[p, a] * scale)
            if i >= nb:
                i = nb - 1
            elif i < 0:
                i = 0
            b = b * nb + i
        ids[p] = b
        counts[b + 1] += 1
    offsets = np.cumsum(counts)
    fill = offsets[:-1].copy()
    per_particle = mass.shape[0] == n
    for p in range(n):
        j = fill[ids[p]]
        fill[ids[p]] += 1
        out_pos[j, 0] = pos[p, 0]
        out_pos[j, 1] = pos[p, 1]
        out_pos[j, 2] = pos[p, 2]
        if per_particle:
            out_mass[j] = mass[p]
    return offsets


@njit(cache=True, nogil=True, inline="always")
def _range_sq(a, b):
    """Smallest and largest x^2 over x in [a, b]."""
    if a <= 0.0 <= b:
        lo = 0.0
    else:
        lo = min(a * a, b * b)
    return lo, max(a * a, b * b)


@njit(cache=True, nogil=True)
def deposit_tiled_shell(rpos, mass, offsets, nb, box, lo, hi, rot, shift, nside, out, cone, cone_cos):
    """Add the images of the tiled box inside the shell [lo, hi) to ``out`` (npix,).

    ``rpos`` (n, 3) block-sorted positions in [0, box) already rotated to the sky frame
    (``positions @ rot.T``), ``mass`` (n,) or (1,) for equal masses, ``offsets`` from
    :func:`_block_sort`. Each image y = pos + shift + m box with lo <= |y| < hi adds
    mass / |y|^2 to the RING pixel of rot @ y = rpos + rot @ (shift + m box). With
    ``cone_cos > -1`` only images within the cone of axis ``cone`` (sky frame) and cosine
    ``cone_cos`` are kept. Returns the number of images deposited.
    """
    cell = box / nb
    lo2 = lo * lo
    hi2 = hi * hi
    equal = mass.shape[0] == 1
    m0 = mass[0]
    use_cone = cone_cos > -1.0
    # the cone axis in box coordinates (rot is orthogonal: its transpose is its inverse)
    ax = rot[0, 0] * cone[0] + rot[1, 0] * cone[1] + rot[2, 0] * cone[2]
    ay = rot[0, 1] * cone[0] + rot[1, 1] * cone[1] + rot[2, 1] * cone[2]
    az = rot[0, 2] * cone[0] + rot[1, 2] * cone[1] + rot[2, 2] * cone[2]
    cone_angle = math.acos(max(-1.0, min(1.0, cone_cos)))
    block_radius = 0.5 * math.sqrt(3.0) * cell
    mmin = np.empty(3, dtype=np.int64)
    mmax = np.empty(3, dtype=np.int64)
    for a in range(3):
        mmin[a] = int(math.floor((-hi - shift[a]) / box))
        mmax[a] = int(math.floor((hi - shift[a]) / box))
    bx_lo = np.empty(nb)
    bx_hi = np.empty(nb)
    by_lo = np.empty(nb)
    by_hi = np.empty(nb)
    bz_lo = np.empty(nb)
    bz_hi = np.empty(nb)
    n_hit = 0
    for mx in range(mmin[0], mmax[0] + 1):
        ox = shift[0] + mx * box
        rx_lo, rx_hi = _range_sq(ox, ox + box)
        if rx_lo >= hi2:
            continue
        for i in range(nb):
            bx_lo[i], bx_hi[i] = _range_sq(ox + i * cell, ox + (i + 1) * cell)
        for my in range(mmin[1], mmax[1] + 1):
            oy = shift[1] + my * box
            ry_lo, ry_hi = _range_sq(oy, oy + box)
            if rx_lo + ry_lo >= hi2:
                continue
            for i in range(nb):
                by_lo[i], by_hi[i] = _range_sq(oy + i * cell, oy + (i + 1) * cell)
            for mz in range(mmin[2], mmax[2] + 1):
                oz = shift[2] + mz * box
                rz_lo, rz_hi = _range_sq(oz, oz + box)
                if rx_lo + ry_lo + rz_lo >= hi2 or rx_hi + ry_hi + rz_hi < lo2:
                    continue
                for i in range(nb):
                    bz_lo[i], bz_hi[i] = _range_sq(oz + i * cell, oz + (i + 1) * cell)
                # the replica's offset in the sky frame
                sx = rot[0, 0] * ox + rot[0, 1] * oy + rot[0, 2] * oz
                sy = rot[1, 0] * ox + rot[1, 1] * oy + rot[1, 2] * oz
                sz = rot[2, 0] * ox + rot[2, 1] * oy + rot[2, 2] * oz
                for i in range(nb):
                    for j in range(nb):
                        sxy_lo = bx_lo[i] + by_lo[j]
                        if sxy_lo >= hi2:
                            continue
                        sxy_hi = bx_hi[i] + by_hi[j]
                        for k in range(nb):
                            if sxy_lo + bz_lo[k] >= hi2 or sxy_hi + bz_hi[k] < lo2:
                                continue
                            if use_cone:
                                cx = ox + (i + 0.5) * cell
                                cy = oy + (j + 0.5) * cell
                                cz = oz + (k + 0.5) * cell
                                dist = math.sqrt(cx * cx + cy * cy + cz * cz)
                                if dist > block_radius:
                                    c = (cx * ax + cy * ay + cz * az) / dist
                                    ang = math.acos(max(-1.0, min(1.0, c)))
                                    if ang - math.asin(block_radius / dist) > cone_angle:
                                        continue
                            b = (i * nb + j) * nb + k
                            for p in range(offsets[b], offsets[b + 1]):
                                dx = rpos[p, 0] + sx
                                dy = rpos[p, 1] + sy
                                dz = rpos[p, 2] + sz
                                r2 = dx * dx + dy * dy + dz * dz
                                if r2 < lo2 or r2 >= hi2:
                                    continue
                                r = math.sqrt(r2)
                                if use_cone and dx * cone[0] + dy * cone[1] + dz * cone[2] < cone_cos * r:
                                    continue
                                w = (m0 if equal else mass[p]) / r2
                                out[vec2pix_ring_r(nside, dx, dy, dz, r)] += w
                                n_hit += 1
    return n_hit


@njit(cache=True, nogil=True)
def _rotate(pos, rot, out):
    """out = pos @ rot.T in float64."""
    for p in range(pos.shape[0]):
        x, y, z = float(pos[p, 0]), float(pos[p, 1]), float(pos[p, 2])
        for a in range(3):
            out[p, a] = rot[a, 0] * x + rot[a, 1] * y + rot[a, 2] * z


@njit(cache=True, nogil=True)
def deposit_lightcone(pos, mass, edges, first, nside, out):
    """Add light-cone particles (positions relative to the observer) to shells ``first`` ...

    ``edges`` (n_shells + 1,) shell boundaries; ``out`` (n_group, npix) receives the
    shells first .. first + n_group - 1, each particle adding mass / chi^2 to the pixel of
    its direction. Returns the number of particles deposited.
    """
    equal = mass.shape[0] == 1
    n_group = out.shape[0]
    lo2 = edges[first] ** 2
    hi2 = edges[first + n_group] ** 2
    n_hit = 0
    for p in range(pos.shape[0]):
        x = pos[p, 0]
        y = pos[p, 1]
        z = pos[p, 2]
        r2 = x * x + y * y + z * z
        if r2 < lo2 or r2 >= hi2:
            continue
        k = np.searchsorted(edges, math.sqrt(r2), side="right") - 1 - first
        if k < 0:
            k = 0
        elif k >= n_group:
            k = n_group - 1
        out[k, vec2pix_ring(nside, x, y, z)] += (mass[0] if equal else mass[p]) / r2
        n_hit += 1
    return n_hit


# ------------------------------------------------------------------------------------
def contrast_from_sums(sums: np.ndarray, lo: float, hi: float, rho_dep: float, rho_m: float) -> np.ndarray:
    r"""Shell-averaged total-matter contrast from the per-pixel sums of :math:`m/\chi^2`."""
    nside = nside_from_npix(sums.shape[-1], "shell map")
    return (sums / (pixel_area_sr(nside) * (hi - lo)) - rho_dep) / rho_m


@dataclass
class TiledSnapshot:
    """The particles of one snapshot sorted into blocks, ready for tiling."""

    positions: np.ndarray  # (n, 3) float32, block-sorted
    masses: np.ndarray  # (n,) or (1,) float64
    offsets: np.ndarray  # (nb^3 + 1,)
    blocks_per_side: int
    box_mpc_h: float
    redshift: float
    omega_m: float
    total_mass: float

    @property
    def rho_dep(self) -> float:
        return self.total_mass / self.box_mpc_h**3

    @property
    def rho_m(self) -> float:
        return self.omega_m * RHO_CRIT_1E10_MSUN_H_PER_MPC_H3

    @property
    def deposited_fraction(self) -> float:
        return self.rho_dep / self.rho_m

    @classmethod
    def from_arrays(cls, positions: np.ndarray, masses: np.ndarray, box_mpc_h: float, *, redshift: float = 0.0,
                    omega_m: float, blocks_per_side: int = 8) -> "TiledSnapshot":
        pos = np.ascontiguousarray(positions, dtype=np.float32)
        mass = np.atleast_1d(np.asarray(masses, dtype=np.float64))
        if mass.size not in (1, len(pos)):
            raise ValueError("masses must have one value or one per particle")
        total = float(mass[0]) * len(pos) if mass.size == 1 else float(mass.sum())
        if mass.size > 1 and np.all(mass == mass[0]):
            mass = mass[:1].copy()
        out_pos = np.empty_like(pos)
        out_mass = np.empty(len(pos)) if mass.size > 1 else mass
        offsets = _block_sort(pos, mass, float(box_mpc_h), int(blocks_per_side), out_pos, out_mass)
        return cls(out_pos, out_mass, offsets, int(blocks_per_side), float(box_mpc_h), float(redshift),
                   float(omega_m), total)

    @classmethod
    def read(cls, files: Sequence[str | Path], *, species: Sequence[int] = (1,), fmt: str = "hdf5",
             chunk_particles: int = 1 << 21, blocks_per_side: int = 8) -> "TiledSnapshot":
        """Read every particle of the chosen species of one snapshot (float32 positions)."""
        from ..snapshots import iter_chunks, read_header

        header = read_header(files, fmt)
        n = sum(header.n_total.get(t, 0) for t in species)
        if n == 0:
            raise RaytraceError(f"{header.files[0]}: no particles of species {list(species)}")
        pos = np.empty((n, 3), dtype=np.float32)
        mass = np.empty(n)
        i = 0
        for chunk in iter_chunks(header, species, fmt=fmt, chunk_size=chunk_particles):
            k = len(chunk.masses)
            pos[i : i + k] = chunk.positions
            mass[i : i + k] = chunk.masses
            i += k
        return cls.from_arrays(pos[:i], mass[:i], header.box_mpc_h, redshift=header.redshift,
                               omega_m=header.omega_m, blocks_per_side=blocks_per_side)

    def deposit(self, lo: float, hi: float, rotation: np.ndarray, shift: np.ndarray, nside: int,
                out: np.ndarray | None = None, cone: tuple[np.ndarray, float] | None = None) -> tuple[np.ndarray, int]:
        r"""Per-pixel sums of :math:`m/\chi^2` of the shell [lo, hi) (float64, npix), and the image count.

        ``cone = (axis, radius_rad)`` restricts the deposit to a disc of the sky (a patch).
        """
        if out is None:
            out = np.zeros(npix(nside))
        axis, cos_r = (np.zeros(3), -2.0) if cone is None else (np.asarray(cone[0], float), math.cos(cone[1]))
        rot = np.ascontiguousarray(rotation, dtype=np.float64)
        rpos = np.empty((len(self.positions), 3))  # one pass per shell, 24 bytes per particle
        _rotate(self.positions, rot, rpos)
        n = deposit_tiled_shell(rpos, self.masses, self.offsets, self.blocks_per_side, self.box_mpc_h,
                                float(lo), float(hi), rot, np.asarray(shift, dtype=np.float64), int(nside), out,
                                axis, cos_r)
        return out, n


# ------------------------------------------------------------------------------------
@dataclass
class Shell:
    """One built shell: contrast map and where it came from."""

    index: int
    delta: np.ndarray  # (npix,) float64
    images: int  # particles (or particle images) deposited


class _SnapshotCache:
    """Block-sorted snapshots kept between the realisations of one job, within a memory budget.

    A job traces a batch of realisations from the same snapshots; small suites are then read
    and sorted once per job. Only the most recent snapshot is kept when the budget is exceeded.
    """

    def __init__(self, budget_bytes: int = 512 * 2**20):
        self.budget = budget_bytes
        self._items: dict = {}

    def get(self, key):
        return self._items.get(key)

    def put(self, key, snap: TiledSnapshot) -> None:
        size = lambda t: t.positions.nbytes + t.masses.nbytes + t.offsets.nbytes  # noqa: E731
        while self._items and sum(size(t) for t in self._items.values()) + size(snap) > self.budget:
            self._items.pop(next(iter(self._items)))
        self._items[key] = snap


_SNAPSHOTS = _SnapshotCache()


def build_tiled(schedule: PlaneSchedule, choice: ShellChoice, snapshots: Sequence[Sequence[str | Path]], nside: int,
                *, species: Sequence[int] = (1,), fmt: str = "hdf5", chunk_particles: int = 1 << 21,
                blocks_per_side: int = 8, cone: tuple[np.ndarray, float] | None = None,
                log: Callable[[str], None] = lambda s: None) -> Iterator[Shell]:
    """Shells of one realisation from the tiled snapshots, in order (one snapshot in memory)."""
    t0 = time.perf_counter()
    for k in range(schedule.n_planes):
        s = int(choice.snapshot[k])
        key = (tuple(str(f) for f in snapshots[s]), tuple(species), fmt, int(blocks_per_side))
        snap = _SNAPSHOTS.get(key)
        if snap is None:
            snap = TiledSnapshot.read(snapshots[s], species=species, fmt=fmt, chunk_particles=chunk_particles,
                                      blocks_per_side=blocks_per_side)
            _SNAPSHOTS.put(key, snap)
            log(f"snapshot {s} (z = {snap.redshift:g}): {len(snap.positions)} particles sorted into blocks")
        lo, hi = float(schedule.chi_lo[k]), float(schedule.chi_hi[k])
        sums, n = snap.deposit(lo, hi, choice.rotation[k], choice.shift[k], nside, cone=cone)
        delta = contrast_from_sums(sums, lo, hi, snap.rho_dep, snap.rho_m)
        log(f"shell {k + 1}/{schedule.n_planes} [{lo:.0f}, {hi:.0f}) Mpc/h: {n} images "
            f"({time.perf_counter() - t0:.1f} s)")
        yield Shell(k, delta, n)


# ------------------------------------------------------------------------------------
# light-cone particle files
LIGHTCONE_LAYOUT = (
    "light-cone file: datasets Coordinates (n, 3) comoving Mpc/h with the observer at the origin and "
    "Masses (n,) in 1e10 Msun/h (or attribute particle_mass); attributes Omega0 (total matter today), "
    "chi_max_mpc_h (the cone is complete to this distance), optional deposited_fraction (mean density of "
    "the particles over Omega0 rho_crit; default 1)"
)


@dataclass(frozen=True)
class LightconeHeader:
    path: Path
    n: int
    omega_m: float
    chi_max: float
    deposited_fraction: float
    particle_mass: float | None


def read_lightcone_header(path: str | Path) -> LightconeHeader:
    from ..hdf5 import open_input

    p = Path(path)
    with open_input(p) as f:
        if "Coordinates" not in f:
            raise RaytraceError(f"{p}: no Coordinates dataset ({LIGHTCONE_LAYOUT})")
        coords = f["Coordinates"]
        if coords.ndim != 2 or coords.shape[1] != 3:
            raise RaytraceError(f"{p}: Coordinates has shape {coords.shape}, expected (n, 3)")
        for key in ("Omega0", "chi_max_mpc_h"):
            if key not in f.attrs:
                raise RaytraceError(f"{p}: attribute {key} missing ({LIGHTCONE_LAYOUT})")
        mass = None
        if "Masses" in f:
            if f["Masses"].shape != (coords.shape[0],):
                raise RaytraceError(f"{p}: Masses has shape {f['Masses'].shape}, Coordinates holds {coords.shape[0]} particles")
        elif "particle_mass" in f.attrs:
            mass = float(f.attrs["particle_mass"])
        else:
            raise RaytraceError(f"{p}: neither a Masses dataset nor a particle_mass attribute ({LIGHTCONE_LAYOUT})")
        header = LightconeHeader(p, int(coords.shape[0]), float(f.attrs["Omega0"]), float(f.attrs["chi_max_mpc_h"]),
                                 float(f.attrs.get("deposited_fraction", 1.0)), mass)
    if not (header.chi_max > 0 and 0 < header.omega_m <= 1 and 0 < header.deposited_fraction <= 1):
        raise RaytraceError(f"{p}: Omega0, chi_max_mpc_h or deposited_fraction out of range")
    return header


def build_lightcone(path: str | Path, schedule: PlaneSchedule, nside: int, *, omega_m: float,
                    chunk_particles: int = 1 << 21, memory_mb: float = 1024.0,
                    log: Callable[[str], None] = lambda s: None) -> Iterator[Shell]:
    """Shells from one light-cone particle file (read once per group of shells that fits in memory)."""
    import h5py

    header = read_lightcone_header(path)
    if abs(header.omega_m - omega_m) > 1e-6:
        raise RaytraceError(f"{path}: Omega0 = {header.omega_m} differs from the model's Omega_m = {omega_m}")
    rho_m = omega_m * RHO_CRIT_1E10_MSUN_H_PER_MPC_H3
    rho_dep = header.deposited_fraction * rho_m
    edges = np.concatenate([schedule.chi_lo, schedule.chi_hi[-1:]])
    group = max(1, int(memory_mb * 2**20 // (8 * npix(nside))))
    for first in range(0, schedule.n_planes, group):
        n_group = min(group, schedule.n_planes - first)
        sums = np.zeros((n_group, npix(nside)))
        counts = 0
        with h5py.File(header.path, "r") as f:
            coords, masses = f["Coordinates"], f.get("Masses")
            for i in range(0, header.n, chunk_particles):
                pos = np.asarray(coords[i : i + chunk_particles], dtype=np.float64)
                if not np.all(np.isfinite(pos)):
                    raise RaytraceError(f"{path}: non-finite particle positions")
                m = (np.asarray(masses[i : i + chunk_particles], dtype=np.float64) if masses is not None
                     else np.array([header.particle_mass]))
                counts += deposit_lightcone(pos, m, edges, first, int(nside), sums)
        log(f"light cone {path}: shells {first + 1}-{first + n_group} from {counts} particles")
        for j in range(n_group):
            k = first + j
            yield Shell(k, contrast_from_sums(sums[j], edges[k], edges[k + 1], rho_dep, rho_m), -1)


# ------------------------------------------------------------------------------------
# shell files (written by this stage; also the layout of user HEALPix shells)
SHELL_LAYOUT = (
    "shell file: dataset delta [shell, pixel] (HEALPix RING maps of the shell-averaged total-matter contrast), "
    "chi_lo_mpc_h and chi_hi_mpc_h [shell] (increasing, not overlapping)"
)


class ShellFile:
    """Reads the shells of one realisation from a shell file, one at a time."""

    def __init__(self, path: str | Path):
        from ..hdf5 import open_input

        self.path = Path(path)
        self._f = open_input(self.path)
        f = self._f
        for key in ("delta", "chi_lo_mpc_h", "chi_hi_mpc_h"):
            if key not in f:
                self._f.close()
                raise RaytraceError(f"{self.path}: no {key} dataset ({SHELL_LAYOUT})")
        self.chi_lo = np.asarray(f["chi_lo_mpc_h"][...], dtype=float)
        self.chi_hi = np.asarray(f["chi_hi_mpc_h"][...], dtype=float)
        shape = f["delta"].shape
        if len(shape) != 2 or shape[0] != len(self.chi_lo) or len(self.chi_hi) != len(self.chi_lo):
            self._f.close()
            raise RaytraceError(f"{self.path}: delta of shape {shape} for {len(self.chi_lo)} shells")
        if (np.any(self.chi_hi <= self.chi_lo) or np.any(self.chi_lo[1:] < self.chi_hi[:-1] - 1e-9)
                or self.chi_lo[0] < 0):
            self._f.close()
            raise RaytraceError(f"{self.path}: shells must be increasing, non-empty and not overlapping")
        self.nside = nside_from_npix(shape[1], f"{self.path}: delta")
        ordering = str(f.attrs.get("ordering", "RING")).upper()
        if ordering not in ("RING", "NESTED", "NEST"):
            self._f.close()
            raise RaytraceError(f"{self.path}: ordering {ordering!r} (RING or NESTED)")
        self.nested = ordering != "RING"
        self.attrs = dict(f.attrs)

    @property
    def n_shells(self) -> int:
        return len(self.chi_lo)

    def delta(self, k: int, nside: int | None = None) -> np.ndarray:
        """Contrast map of shell ``k`` (float64, RING), degraded or upgraded to ``nside``."""
        m = np.asarray(self._f["delta"][k], dtype=np.float64)
        if not np.all(np.isfinite(m)):
            raise RaytraceError(f"{self.path}: shell {k} holds non-finite values")
        target = self.nside if nside is None else nside
        if self.nested or target != self.nside:
            import healpy as hp

            m = hp.ud_grade(m, target, order_in="NESTED" if self.nested else "RING", order_out="RING")
        return m

    def close(self) -> None:
        self._f.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def build_from_healpix(path: str | Path, nside: int, log: Callable[[str], None] = lambda s: None) -> tuple[PlaneSchedule, Iterator[Shell]]:
    """Shells of a user HEALPix shell file, at ``nside`` (ud_grade where it differs)."""
    sf = ShellFile(path)
    log(f"{path}: {sf.n_shells} shells at nside {sf.nside}" + (f", regraded to {nside}" if nside != sf.nside else ""))
    chi = 0.5 * (sf.chi_lo + sf.chi_hi)
    sched = PlaneSchedule(sf.chi_lo, sf.chi_hi, chi, np.full(len(chi), np.nan), np.full(len(chi), -1))

    def shells():
        with sf:
            for k in range(sf.n_shells):
                yield Shell(k, sf.delta(k, nside), -1)

    return sched, shells()


def write_shell_file(path: str | Path, schedule: PlaneSchedule, shells: Iterator[Shell], nside: int, *,
                     cosmo: Cosmology, kind: str, settings: dict, inputs: Sequence[str | Path] = (),
                     seed: int | None = None, choice: ShellChoice | None = None, attrs: dict | None = None) -> None:
    """Write the shells of one realisation as they are built (one shell in memory at a time)."""
    from ..hdf5 import atomic_h5, write_dataset

    n = schedule.n_planes
    with atomic_h5(path, stage="shells", settings=settings, inputs=inputs, seed=seed) as f:
        ds = f.create_dataset("delta", shape=(n, npix(nside)), dtype=np.float32, chunks=(1, npix(nside)))
        ds.attrs["unit"] = "1"
        ds.attrs["description"] = "total-matter density contrast averaged over the shell's radial extent (d chi weight)"
        images = np.full(n, -1, dtype=np.int64)
        for shell in shells:
            ds[shell.index] = shell.delta.astype(np.float32)
            images[shell.index] = shell.images
        write_dataset(f, "chi_lo_mpc_h", schedule.chi_lo, "Mpc/h")
        write_dataset(f, "chi_hi_mpc_h", schedule.chi_hi, "Mpc/h")
        write_dataset(f, "chi_mpc_h", schedule.chi, "Mpc/h")
        write_dataset(f, "redshift", cosmo.redshift_at(schedule.chi), "1", description="redshift of the shell centre")
        write_dataset(f, "images", images, "1", description="particles (images) deposited; -1: not from particles")
        if choice is not None:
            write_dataset(f, "snapshot", choice.snapshot, "1")
            write_dataset(f, "rotation", choice.rotation, "1", description="box frame -> sky frame")
            write_dataset(f, "shift_mpc_h", choice.shift, "Mpc/h")
        f.attrs["nside"] = int(nside)
        f.attrs["ordering"] = "RING"
        f.attrs["kind"] = kind
        for key, value in (attrs or {}).items():
            f.attrs[key] = value
