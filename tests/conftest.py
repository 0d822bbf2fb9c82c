"""Shared fixtures: a mid-size demo suite, and the tiny workflow run, each made once per session."""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from raytrace.config import plane_schedule
from raytrace.cosmology import Cosmology
from raytrace.demo import generate_model
from raytrace.hdf5 import atomic_h5
from raytrace.planes import slice_snapshot, write_planes
from raytrace.snapshots import read_header
from raytrace.tracing import PlaneFiles, choose_planes, trace

FIDUCIAL = dict(Omega_m=0.3, Omega_b=0.049, h=0.68, n_s=0.965, A_s=2.1e-9, m_nu_eV=0.1)


@dataclass
class Suite:
    cosmo: Cosmology
    box: float
    n_particles: int
    snapshot_z: list[float]
    snapshots: list[list[Path]]
    plane_files: list[Path]
    thickness: float
    grid: int

    def schedule(self, z_max: float):
        return plane_schedule(self.cosmo, self.thickness, z_max, self.snapshot_z)

    def trace(self, realization: int, *, method: str, sources=(), field_deg: float, pixels: int, randomize=True,
              seed=7, chi_min: float = 0.0, bins=(), z_max: float | None = None, alignment_bins=()):
        """Trace one realisation; planes nearer than ``chi_min`` are left empty if asked."""
        sched = self.schedule(z_max if z_max is not None else max(sources))
        with PlaneFiles(self.plane_files) as planes:
            choice = choose_planes(sched, planes.n_slabs, self.box, seed, realization, randomize)
            blank = sched.chi < chi_min
            choice.snapshot[blank] = -1

            def load(snapshot, axis, slab, names):
                if snapshot < 0:
                    return [np.zeros((self.grid, self.grid), dtype=np.float32) for _ in names]
                return planes(snapshot, axis, slab, names)

            return trace(self.cosmo, sched, choice, load, box_mpc_h=self.box, field_deg=field_deg,
                         pixels=pixels, source_redshifts=list(sources), method=method, source_bins=list(bins),
                         alignment_bins=list(alignment_bins))


def as_legacy(files, directory: Path) -> list[Path]:
    """The snapshot ``files`` rewritten in the legacy binary layout (float32, little-endian, plain
    block order) with the same particles in the same files (both writers split evenly)."""
    from raytrace.snapshots import iter_chunks
    from raytrace.snapshots.legacy_binary import write_snapshot_legacy

    h = read_header(files)
    pos = {t: np.concatenate([c.positions for c in iter_chunks(h, [t])]).astype(np.float32) for t in h.n_total}
    paths = [Path(directory) / Path(f).name.removesuffix(".hdf5") for f in h.files]
    Path(directory).mkdir(parents=True, exist_ok=True)
    write_snapshot_legacy(paths, pos, {t: h.mass_table[t] for t in pos}, box=h.box_mpc_h, redshift=h.redshift,
                          omega_m=h.omega_m, omega_lambda=h.omega_lambda, h=h.h)
    return paths


@pytest.fixture(scope="session")
def suite(tmp_path_factory) -> Suite:
    """A 256 Mpc/h box with 128^3 particles at five redshifts, sliced into 64 Mpc/h planes."""
    root = tmp_path_factory.mktemp("suite")
    cosmo = Cosmology(**FIDUCIAL)
    zs = [0.0, 0.25, 0.5, 0.75, 1.0]
    box, n, thickness, grid = 256.0, 128, 64.0, 512
    snaps = generate_model(cosmo, box_mpc_h=box, particles_per_side=n, snapshot_redshifts=zs, seed=11,
                           directory=root / "snapshots")
    planes = []
    for i, files in enumerate(snaps):
        p = slice_snapshot(read_header(files), grid=grid, thickness_mpc_h=thickness)
        out = root / f"planes_{i:03d}.h5"
        with atomic_h5(out, stage="slice") as f:
            write_planes(f, p)
        planes.append(out)
    return Suite(cosmo, box, n, zs, snaps, planes, thickness, grid)


class FinishedRun(tuple):
    """(workdir, config) of a finished workflow run, and its wall time in seconds."""

    def __new__(cls, work: Path, cfg: dict, wall_s: float):
        run = super().__new__(cls, (work, cfg))
        run.wall_s = wall_s
        return run


@pytest.fixture(scope="session")
def finished_run(tmp_path_factory) -> FinishedRun:
    """The tiny configuration run once with the laptop profile: the reference that reruns,
    the SLURM run and the killed-and-resumed run are checked against."""
    from workflow_helpers import snakemake, tiny_config

    work = tmp_path_factory.mktemp("workflow")
    cfg = tiny_config()
    t0 = time.perf_counter()
    proc = snakemake(work, cfg)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return FinishedRun(work, cfg, time.perf_counter() - t0)


# ------------------------------------------------------------------------------------
# full-sky branch
@dataclass
class SkySuite:
    """A coarse demo suite for full-sky checks, with the shells of each realisation cached."""

    cosmo: Cosmology
    box: float
    n_particles: int
    snapshot_z: list[float]
    snapshots: list[list[Path]]

    def __post_init__(self):
        self._shells = {}

    def shells(self, realization: int, *, nside: int, z_max: float, thickness: float = 128.0, cone=None):
        """(schedule, [contrast map per shell]) of one realisation, tiled from the snapshots."""
        from raytrace.sky.shells import build_tiled, choose_shells, shell_schedule

        key = (realization, nside, z_max, thickness, None if cone is None else (tuple(cone[0]), cone[1]))
        if key not in self._shells:
            sched = shell_schedule(self.cosmo, thickness, float(self.cosmo.comoving_distance(z_max)), self.snapshot_z)
            choice = choose_shells(sched, self.box, 5, realization)
            maps = [s.delta for s in build_tiled(sched, choice, self.snapshots, nside, cone=cone)]
            self._shells[key] = (sched, maps)
        return self._shells[key]


@pytest.fixture(scope="session")
def sky_suite(tmp_path_factory) -> SkySuite:
    """A 512 Mpc/h box with 64^3 particles at z = 0, 0.5, 1: full-sky shells in seconds."""
    root = tmp_path_factory.mktemp("sky_suite")
    cosmo = Cosmology(**FIDUCIAL)
    zs = [0.0, 0.5, 1.0]
    snaps = generate_model(cosmo, box_mpc_h=512.0, particles_per_side=64, snapshot_redshifts=zs, seed=21,
                           directory=root / "snapshots")
    return SkySuite(cosmo, 512.0, 64, zs, snaps)
