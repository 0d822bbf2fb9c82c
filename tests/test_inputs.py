"""Simulation inputs: the HDF5 layout, neutrino particles, format round trips, MPI slicing,
and bad snapshot files at the command line."""

from __future__ import annotations

import json
import os
import shutil
import struct
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from raytrace.cosmology import Cosmology
from raytrace.demo import generate_model
from raytrace.errors import RaytraceError
from raytrace.parallel import launched_by_mpi
from raytrace.planes import slice_snapshot
from raytrace.snapshots import chunk_plan, iter_chunks, read_header
from raytrace.snapshots import legacy_binary as lb
from raytrace.snapshots.hdf5 import write_snapshot
from raytrace.spectra import power_spectrum_3d

from conftest import FIDUCIAL, as_legacy

ROOT = Path(__file__).resolve().parents[1]
PLANE_KEYS = ("delta", "dphi_dx", "dphi_dy", "d2phi_dxx", "d2phi_dyy", "d2phi_dxy")


def run(*args, env=None, launcher=()):
    e = dict(os.environ)
    e.pop("RAYTRACE_MPI", None)
    e.update(env or {})
    return subprocess.run([*launcher, sys.executable, "-m", "raytrace", *args], capture_output=True, text=True,
                          env=e, cwd=ROOT)


def one_error_line(proc) -> str:
    """The one error line (progress lines, "[slice  0.1 s] ...", may come before it)."""
    lines = [line for line in proc.stderr.splitlines() if line.strip() and not line.startswith("[")]
    assert proc.returncode == 2, proc.stderr
    assert len(lines) == 1, proc.stderr
    return lines[0]


def assert_nothing_written(out: Path):
    assert not out.exists()
    assert not out.with_name(out.name + ".tmp").exists()


def settings(**kw):
    s = {"grid": 32, "thickness_mpc_h": 16.0, "species": [1], "assignment": "cic", "chunk_particles": 1000}
    s.update(kw)
    return json.dumps(s)


# --------------------------------------------------------------------------- the HDF5 layout

#: 1 kpc in cm as most N-body codes write it (common practice; the IAU value is 3.0857e21)
KPC_CM_AS_WRITTEN = 3.085678e21


def hand_built_hdf5(path: Path, *, unit_cm=None, unit_g=None, n1=40, n2=25, box_kpc=50_000.0, seed=0):
    """A one-file snapshot written attribute by attribute with h5py, independently of our writer,
    after the HDF5 snapshot layout's published description (Header attributes, PartType<t>
    groups, MassTable with per-particle Masses where the table entry is 0)."""
    rng = np.random.default_rng(seed)
    p1 = rng.uniform(0, box_kpc, (n1, 3)).astype(np.float32)
    p2 = rng.uniform(0, box_kpc, (n2, 3))  # float64 positions
    m2 = rng.uniform(0.01, 0.02, n2).astype(np.float32)
    with h5py.File(path, "w") as f:
        h = f.create_group("Header")
        h.attrs["NumPart_ThisFile"] = np.array([0, n1, n2, 0, 0, 0], dtype=np.uint32)
        h.attrs["NumPart_Total"] = np.array([0, n1, n2, 0, 0, 0], dtype=np.uint32)
        h.attrs["NumPart_Total_HighWord"] = np.zeros(6, dtype=np.uint32)
        h.attrs["MassTable"] = np.array([0.0, 0.5, 0.0, 0.0, 0.0, 0.0])
        h.attrs["Time"] = 0.5
        h.attrs["Redshift"] = 1.0
        h.attrs["BoxSize"] = box_kpc
        h.attrs["NumFilesPerSnapshot"] = np.int32(1)
        h.attrs["Omega0"] = 0.3
        h.attrs["OmegaLambda"] = 0.7
        h.attrs["HubbleParam"] = 0.7
        if unit_cm is not None:
            f.create_group("Units").attrs["UnitLength_in_cm"] = unit_cm
        if unit_g is not None:
            f["Units" if "Units" in f else f.create_group("Units").name].attrs["UnitMass_in_g"] = unit_g
        f.create_dataset("PartType1/Coordinates", data=p1)
        f.create_dataset("PartType2/Coordinates", data=p2)
        f.create_dataset("PartType2/Masses", data=m2)
    return p1, p2, m2


def all_particles(header, species):
    chunks = list(iter_chunks(header, species, chunk_size=7))
    out = {}
    for t in species:
        got = [c for c in chunks if c.species == t]
        out[t] = (np.concatenate([c.positions for c in got]), np.concatenate([c.masses for c in got]))
    return out


def test_hdf5_kpc_units_from_the_file(tmp_path):
    # UnitLength_in_cm = 3.085678e21 (kpc, as codes write it) makes lengths kpc/h: positions
    # and box come out divided by 1000; the table mass of type 1 and the per-particle
    # masses of type 2 are both used.
    path = tmp_path / "snap_kpc.hdf5"
    p1, p2, m2 = hand_built_hdf5(path, unit_cm=KPC_CM_AS_WRITTEN)
    header = read_header([path])
    assert header.length_to_mpc_h == 1e-3  # taken as exactly kpc/h (within 0.1%)
    assert header.box_mpc_h == pytest.approx(50.0, rel=1e-15)
    assert header.redshift == 1.0 and header.n_total == {1: 40, 2: 25}
    got = all_particles(header, [1, 2])
    np.testing.assert_allclose(got[1][0], p1.astype(np.float64) / 1000, rtol=1e-15)
    np.testing.assert_allclose(got[2][0], p2 / 1000, rtol=1e-15)
    np.testing.assert_array_equal(got[1][1], np.full(40, 0.5))
    np.testing.assert_array_equal(got[2][1], m2.astype(np.float64))


def test_hdf5_length_unit_from_config_and_contradiction(tmp_path):
    path = tmp_path / "snap.hdf5"
    p1, _, _ = hand_built_hdf5(path)  # no unit in the file: the configured one applies
    h = read_header([path], length_unit="kpc/h")
    np.testing.assert_allclose(all_particles(h, [1])[1][0], p1 / 1000, rtol=1e-7)
    assert read_header([path]).box_mpc_h == 50_000.0  # default Mpc/h: a 50 Gpc/h box
    with_unit = tmp_path / "snap_u.hdf5"
    hand_built_hdf5(with_unit, unit_cm=KPC_CM_AS_WRITTEN)
    with pytest.raises(RaytraceError, match="length_unit Mpc/h contradicts the file's UnitLength_in_cm"):
        read_header([with_unit], length_unit="Mpc/h")
    assert read_header([with_unit], length_unit="kpc/h").length_to_mpc_h == 1e-3


def test_hdf5_mass_unit_from_the_file(tmp_path):
    # UnitMass_in_g = 1.989e43 g is 1e10 Msun (within 0.1% of the IAU 2015 nominal value,
    # 1.98841e33 g per Msun: taken as exactly that); 1.989e40 g (1e7 Msun) scales masses by 1e-3.
    a, b = tmp_path / "a.hdf5", tmp_path / "b.hdf5"
    _, _, m2 = hand_built_hdf5(a, unit_cm=KPC_CM_AS_WRITTEN, unit_g=1.989e43)
    hand_built_hdf5(b, unit_cm=KPC_CM_AS_WRITTEN, unit_g=1.989e40)
    ha, hb = read_header([a]), read_header([b])
    assert ha.mass_to_1e10_msun_h == 1.0
    assert hb.mass_to_1e10_msun_h == pytest.approx(1.989e40 / 1.98841e43, rel=1e-12)
    np.testing.assert_allclose(all_particles(hb, [2])[2][1], m2 * hb.mass_to_1e10_msun_h, rtol=1e-7)
    assert hb.mass_table[1] == pytest.approx(0.5 * hb.mass_to_1e10_msun_h)


def test_undeposited_species_are_a_uniform_background(tmp_path):
    # planes.py: delta = (Sigma - rho_dep t) / (rho_m t). Depositing only species 1 of a snapshot
    # whose species 2 is spread uniformly gives delta_1 = f_1 delta_cb, and adding species 2 back
    # gives the same planes when it is truly uniform (a lattice), up to float32 rounding.
    rng = np.random.default_rng(2)
    box, n = 32.0, 16
    q = (np.arange(n) + 0.5) * box / n
    lattice = np.stack([a.ravel() for a in np.meshgrid(q, q, q, indexing="ij")], axis=1)
    clustered = rng.uniform(0, box, (4000, 3))
    files = [tmp_path / "s.0.hdf5", tmp_path / "s.1.hdf5"]
    write_snapshot(files, {1: clustered, 2: lattice}, {1: 1.0, 2: 0.05}, box_mpc_h=box, redshift=0.0,
                   omega_m=0.3, omega_lambda=0.7, h=0.7)
    h = read_header(files)
    one = slice_snapshot(h, grid=16, thickness_mpc_h=8.0, species=[1])
    both = slice_snapshot(h, grid=16, thickness_mpc_h=8.0, species=[1, 2])
    np.testing.assert_allclose(both.delta, one.delta, atol=2e-6 * np.abs(one.delta).max())
    rho_m = 0.3 * 27.7536627
    assert one.deposited_fraction == pytest.approx(4000 * 1.0 / box**3 / rho_m, rel=1e-12)
    assert both.deposited_fraction == pytest.approx((4000 * 1.0 + n**3 * 0.05) / box**3 / rho_m, rel=1e-12)


# --------------------------------------------------------------------------- neutrino particles


@pytest.fixture(scope="module")
def neutrino_suite(tmp_path_factory):
    """A 1 Gpc/h box with 64^3 cold and 64^3 neutrino particles (m_nu = 0.1 eV) at z = 0.5,
    written once in each format with the same phases."""
    root = tmp_path_factory.mktemp("nu")
    cosmo = Cosmology(**FIDUCIAL)
    kw = dict(box_mpc_h=1024.0, particles_per_side=64, snapshot_redshifts=[0.5], seed=21, neutrino_particles=True)
    h5 = generate_model(cosmo, directory=root / "h5", **kw)[0]
    return cosmo, h5, as_legacy(h5, root / "lb")


def test_neutrino_particles_layout(neutrino_suite):
    cosmo, files, _ = neutrino_suite
    with h5py.File(files[0]) as f:
        assert "PartType2/Coordinates" in f
    h = read_header(files)
    assert h.n_total == {1: 64**3, 2: 64**3}
    # particle masses: Omega_x rho_crit L^3 / N (rho_crit = 2.775e11 h^2 Msun/Mpc^3, PDG);
    # together they make up all of Omega_m
    v = 1024.0**3 * 27.7536627
    assert h.mass_table[1] == pytest.approx(cosmo.Omega_cb * v / 64**3, rel=1e-12)
    assert h.mass_table[2] == pytest.approx(cosmo.Omega_nu * v / 64**3, rel=1e-12)
    assert (h.mass_table[1] + h.mass_table[2]) * 64**3 / v == pytest.approx(FIDUCIAL["Omega_m"], rel=1e-12)


def test_neutrino_density_follows_camb_transfer(neutrino_suite):
    # The neutrino particles' power relative to the cold particles' on the same phases is
    # camb's (T_nu / T_cb)^2 at the snapshot redshift (linear theory, Lesgourgues & Pastor 2006);
    # checked on scales k < 0.035 h/Mpc where it is above 0.02 and the first-order displacement
    # is linear. Beyond, mode coupling of the large-scale neutrino flows dominates the tiny
    # linear signal (measured: 15-20% above camb at k = 0.08, common practice for Zel'dovich).
    cosmo, files, _ = neutrino_suite
    h = read_header(files)
    edges = np.geomspace(0.007, 0.035, 5)
    power = {}
    for t in (1, 2):
        pos = np.concatenate([c.positions for c in iter_chunks(h, [t])])
        k, power[t], _ = power_spectrum_3d(pos, np.ones(len(pos)), 1024.0, 128, edges, subtract_shot_noise=False)
    expected = cosmo.linear_power([0.5]).nu_over_cb(0.5, k) ** 2
    assert np.all(expected > 0.02) and expected[0] / expected[-1] > 3  # the suppression is resolved
    np.testing.assert_allclose(power[2] / power[1], expected, rtol=0.10)


def test_total_matter_planes_are_the_mass_weighted_sum(neutrino_suite):
    # Planes hold total matter: depositing cold matter and neutrinos together equals the sum of
    # the two species' planes, each of which is its species' contrast weighted by its mass
    # fraction (definition of the total contrast, delta = sum_i f_i delta_i; planes.py).
    cosmo, files, _ = neutrino_suite
    h = read_header(files)
    kw = dict(grid=64, thickness_mpc_h=256.0)
    both = slice_snapshot(h, species=[1, 2], **kw)
    cold = slice_snapshot(h, species=[1], **kw)
    nu = slice_snapshot(h, species=[2], **kw)
    scale = np.abs(both.delta).max()
    np.testing.assert_allclose(both.delta, cold.delta + nu.delta, rtol=0, atol=4e-7 * scale)
    for name in both.derivatives:
        ref = np.abs(both.derivatives[name]).max()
        np.testing.assert_allclose(both.derivatives[name], cold.derivatives[name] + nu.derivatives[name],
                                   rtol=0, atol=4e-7 * ref)
    f_nu = cosmo.Omega_nu / cosmo.Omega_m
    assert cold.deposited_fraction == pytest.approx(1 - f_nu, rel=1e-9)
    assert nu.deposited_fraction == pytest.approx(f_nu, rel=1e-9)
    assert both.deposited_fraction == pytest.approx(1.0, rel=1e-9)
    # each species' plane is f_i times its own contrast
    own = slice_snapshot(h, species=[2], omega_m=cosmo.Omega_nu, **kw)
    np.testing.assert_allclose(nu.delta, f_nu * own.delta, rtol=0, atol=1e-6 * np.abs(nu.delta).max())


def test_demo_formats_give_identical_planes(neutrino_suite):
    # Round trip: the same demo snapshot written as HDF5 and as legacy binary (float32 both)
    # reads back into bit-identical planes, with auto-detected formats.
    _, h5, lb_files = neutrino_suite
    a, b = read_header(h5, "auto"), read_header(lb_files, "auto", length_unit="Mpc/h")
    assert (a.fmt, b.fmt) == ("hdf5", "legacy-binary")
    for species in ([1, 2], [2]):
        pa = slice_snapshot(a, grid=32, thickness_mpc_h=512.0, species=species, assignment="tsc")
        pb = slice_snapshot(b, grid=32, thickness_mpc_h=512.0, species=species, assignment="tsc")
        np.testing.assert_array_equal(pa.delta, pb.delta)
        for name in pa.derivatives:
            np.testing.assert_array_equal(pa.derivatives[name], pb.derivatives[name])


# --------------------------------------------------------------------------- chunk plans and MPI


def test_chunk_plan_shares_cover_every_particle_once():
    from raytrace.snapshots import SnapshotHeader

    h = SnapshotHeader(files=[Path(f"f{i}") for i in range(3)], box_mpc_h=1.0, redshift=0.0, omega_m=0.3,
                       omega_lambda=0.7, h=0.7, n_total={1: 23, 2: 9}, mass_table={},
                       n_per_file=[{1: 10, 2: 4}, {1: 0, 2: 5}, {1: 13}])
    serial = chunk_plan(h, [1, 2], 4)
    # serial order: file by file, species by species, consecutive chunks of at most 4
    assert [(c.file_index, c.species, c.start, c.stop) for c in serial[:4]] == [
        (0, 1, 0, 4), (0, 1, 4, 8), (0, 1, 8, 10), (0, 2, 0, 4)]
    for size in (1, 2, 3, 5):
        seen = []
        counts = []
        for rank in range(size):
            plan = chunk_plan(h, [1, 2], 4, rank, size)
            assert all(0 < c.count <= 4 for c in plan)
            counts.append(sum(c.count for c in plan))
            seen += [(c.file_index, c.species, i) for c in plan for i in range(c.start, c.stop)]
        assert sorted(seen) == sorted((c.file_index, c.species, i) for c in serial for i in range(c.start, c.stop))
        assert len(seen) == len(set(seen)) == 32
        assert max(counts) - min(counts) <= 1


def find_mpiexec() -> str | None:
    here = shutil.which("mpiexec", path=os.path.dirname(sys.executable))
    return here or shutil.which("mpiexec")


def mpi_available() -> bool:
    try:
        import mpi4py  # noqa: F401
    except ImportError:
        return False
    return find_mpiexec() is not None


needs_mpi = pytest.mark.skipif(
    not mpi_available() and os.environ.get("CI") != "true",
    reason="mpi4py or mpiexec missing (pip install '.[mpi]'); in CI this test runs and must pass",
)


def mpi_run(*args, ranks=2):
    return run(*args, launcher=(find_mpiexec() or "mpiexec", "-n", str(ranks)))


@pytest.fixture(scope="module")
def mixed_snapshot(tmp_path_factory):
    """Three files, two species (per-particle masses for one), both formats."""
    root = tmp_path_factory.mktemp("mpi")
    rng = np.random.default_rng(7)
    pos = {1: rng.uniform(0, 64, (30000, 3)).astype(np.float32), 2: rng.uniform(0, 64, (7001, 3)).astype(np.float32)}
    masses = {2: rng.uniform(0.01, 0.02, 7001).astype(np.float32)}
    kw = dict(redshift=0.3, omega_m=0.3, omega_lambda=0.7, h=0.7, masses=masses)
    h5 = [root / f"snap.{i}.hdf5" for i in range(3)]
    write_snapshot(h5, pos, {1: 0.2}, box_mpc_h=64.0, **kw)
    lbf = [root / f"snap.{i}" for i in range(3)]
    lb.write_snapshot_legacy(lbf, pos, {1: 0.2}, box=64.0, byteorder=">", labelled=True, **kw)
    return root, h5, lbf


@needs_mpi
@pytest.mark.parametrize("fmt, assignment", [("hdf5", "cic"), ("legacy-binary", "tsc")])
def test_mpi_two_ranks_equal_serial(mixed_snapshot, fmt, assignment):
    # MPI slicing (2 ranks: particles shared, planes reduced, rank 0 writes) gives the serial
    # planes to float32 rounding (sums are float64 in both; only their order differs).
    root, h5, lbf = mixed_snapshot
    files = [str(f) for f in (h5 if fmt == "hdf5" else lbf)]
    s = settings(species=[1, 2], assignment=assignment, format="auto", length_unit="Mpc/h", chunk_particles=4096)
    serial, par = root / f"serial_{fmt}_{assignment}.h5", root / f"mpi_{fmt}_{assignment}.h5"
    p1 = run("slice", "--settings", s, "--snapshot", *files, "--output", str(serial))
    assert p1.returncode == 0, p1.stderr
    p2 = mpi_run("slice", "--settings", s, "--snapshot", *files, "--output", str(par))
    assert p2.returncode == 0, p2.stderr
    assert "2 MPI ranks" in p2.stderr and "2 MPI ranks" not in p1.stderr
    assert p2.stderr.count("done: wall time") == 1  # one log, rank 0's
    with h5py.File(serial) as a, h5py.File(par) as b:
        for key in PLANE_KEYS:
            x, y = a[key][...], b[key][...]
            np.testing.assert_allclose(y, x, rtol=0, atol=2 * np.finfo(np.float32).eps * np.abs(x).max())
        assert b.attrs["deposited_fraction"] == pytest.approx(a.attrs["deposited_fraction"], rel=1e-12)


@needs_mpi
def test_mpi_error_on_one_rank_stops_all(mixed_snapshot, tmp_path):
    # A NaN in the last file, which only rank 1 reads: one error line naming the file, exit 2,
    # no output, and no rank left waiting (the run finishes).
    _, h5, _ = mixed_snapshot
    files = [tmp_path / f.name for f in h5]
    for a, b in zip(h5, files):
        shutil.copy(a, b)
    with h5py.File(files[2], "a") as f:
        f["PartType1/Coordinates"][5, 1] = np.nan
    out = tmp_path / "planes.h5"
    proc = subprocess.run(
        [find_mpiexec() or "mpiexec", "-n", "2", sys.executable, "-m", "raytrace", "slice", "--settings",
         settings(species=[1, 2]), "--snapshot", *map(str, files), "--output", str(out)],
        capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert proc.returncode != 0
    lines = [line for line in proc.stderr.splitlines() if line.strip() and "error" in line]
    assert len(lines) == 1 and str(files[2]) in lines[0] and "non-finite" in lines[0], proc.stderr
    assert_nothing_written(out)


def test_serial_slicing_without_mpi4py(mixed_snapshot, tmp_path):
    # The serial path never imports mpi4py: with it made unimportable, slicing still works; a
    # process that an MPI launcher started says in one line that mpi4py is missing.
    root, h5, _ = mixed_snapshot
    block = tmp_path / "block"
    (block / "mpi4py").mkdir(parents=True)
    (block / "mpi4py" / "__init__.py").write_text("raise ImportError('mpi4py blocked for this test')\n")
    env = {"PYTHONPATH": os.pathsep.join([str(block), str(ROOT)])}
    out = tmp_path / "planes.h5"
    proc = run("slice", "--settings", settings(species=[1, 2]), "--snapshot", *map(str, h5), "--output", str(out),
               env=env)
    assert proc.returncode == 0, proc.stderr
    assert out.exists()
    out2 = tmp_path / "planes2.h5"
    line = one_error_line(run("slice", "--settings", settings(), "--snapshot", *map(str, h5), "--output", str(out2),
                              env=env | {"PMI_SIZE": "2", "PMI_RANK": "0"}))
    assert "mpi4py cannot be imported" in line
    assert_nothing_written(out2)


def test_launcher_detection():
    assert not launched_by_mpi({})
    assert not launched_by_mpi({"PMI_SIZE": "1"})
    assert launched_by_mpi({"PMI_SIZE": "2", "PMI_RANK": "1"})  # MPICH / Hydra
    assert launched_by_mpi({"OMPI_COMM_WORLD_SIZE": "4"})  # Open MPI
    assert launched_by_mpi({"SLURM_PROCID": "0", "SLURM_NTASKS": "8"})  # srun
    assert not launched_by_mpi({"SLURM_PROCID": "0", "SLURM_NTASKS": "1"})
    assert not launched_by_mpi({"PMI_SIZE": "2", "RAYTRACE_MPI": "0"})
    assert launched_by_mpi({"RAYTRACE_MPI": "1"})


# --------------------------------------------------------------------------- bad files at the CLI


def h5_snapshot(root: Path, n_files=2):
    rng = np.random.default_rng(0)
    files = [root / f"snap.{i}.hdf5" for i in range(n_files)]
    write_snapshot(files, {1: rng.uniform(0, 32, (3000, 3)).astype(np.float32)}, {1: 1.0}, box_mpc_h=32.0,
                   redshift=0.0, omega_m=0.3, omega_lambda=0.7, h=0.7)
    return files


def lb_snapshot(root: Path, n_files=2):
    rng = np.random.default_rng(0)
    files = [root / f"snap.{i}" for i in range(n_files)]
    lb.write_snapshot_legacy(files, {1: rng.uniform(0, 32, (3000, 3)).astype(np.float32)}, {1: 1.0}, box=32.0,
                             redshift=0.0, omega_m=0.3, omega_lambda=0.7, h=0.7)
    return files


def truncate(files):
    data = files[1].read_bytes()
    files[1].write_bytes(data[: len(data) // 2])
    return files[1], "truncated"


def h5_truncate(files):
    data = files[1].read_bytes()
    files[1].write_bytes(data[: len(data) // 2])
    return files[1], "not a readable HDF5 snapshot"


def lb_bad_marker(files):
    data = bytearray(files[1].read_bytes())
    off = 4 + 256 + 4  # the POS record's leading marker
    (n,) = struct.unpack_from("<i", data, off)
    struct.pack_into("<i", data, off + 4 + n, n - 12)  # its closing marker
    files[1].write_bytes(bytes(data))
    return files[1], "does not match"


def lb_count_mismatch(files):
    data = bytearray(files[1].read_bytes())
    (n1,) = struct.unpack_from("<i", data, 4 + 4)  # npart[1] of the header
    struct.pack_into("<i", data, 4 + 4, n1 + 1)
    files[1].write_bytes(bytes(data))
    return files[1], "POS record holds"


def h5_count_mismatch(files):
    with h5py.File(files[1], "a") as f:
        this = f["Header"].attrs["NumPart_ThisFile"]
        this[1] += 1
        f["Header"].attrs["NumPart_ThisFile"] = this
    return files[1], "NumPart_ThisFile[1] says"


def h5_total_mismatch(files):
    with h5py.File(files[1], "a") as f:
        total = f["Header"].attrs["NumPart_Total"]
        total[1] += 5
        f["Header"].attrs["NumPart_Total"] = total
    return files[1], "Header NumPart_Total is"


def h5_nan(files):
    with h5py.File(files[1], "a") as f:
        f["PartType1/Coordinates"][10, 0] = np.nan
    return files[1], "non-finite particle positions"


def h5_out_of_box(files):
    with h5py.File(files[1], "a") as f:
        f["PartType1/Coordinates"][3, 2] = 40.0
    return files[1], "outside the box"


def lb_edit_position(value):
    def edit(files):
        data = bytearray(files[1].read_bytes())
        struct.pack_into("<f", data, 4 + 256 + 4 + 4 + 4 * 7, value)  # POS: 8th float of the block
        files[1].write_bytes(bytes(data))
        return files[1], "non-finite particle positions" if np.isnan(value) else "outside the box"

    return edit


def missing_second_file(files):
    files[1].unlink()
    return files[0], "missing: " + str(files[1])


CASES = {
    "hdf5-truncated": ("hdf5", h5_truncate),
    "hdf5-count-mismatch": ("hdf5", h5_count_mismatch),
    "hdf5-total-mismatch": ("hdf5", h5_total_mismatch),
    "hdf5-nan": ("hdf5", h5_nan),
    "hdf5-out-of-box": ("hdf5", h5_out_of_box),
    "hdf5-missing-file": ("hdf5", missing_second_file),
    "legacy-truncated": ("legacy-binary", truncate),
    "legacy-wrong-marker": ("legacy-binary", lb_bad_marker),
    "legacy-count-mismatch": ("legacy-binary", lb_count_mismatch),
    "legacy-nan": ("legacy-binary", lb_edit_position(float("nan"))),
    "legacy-out-of-box": ("legacy-binary", lb_edit_position(-3.0)),
    "legacy-missing-file": ("legacy-binary", missing_second_file),
}


@pytest.mark.parametrize("case", list(CASES))
def test_bad_snapshot_file_at_the_command_line(tmp_path, case):
    # Each damage gives one error line naming the file at fault, exit status 2, and no plane file.
    fmt, damage = CASES[case]
    files = (h5_snapshot if fmt == "hdf5" else lb_snapshot)(tmp_path)
    named, expected = damage(files)
    out = tmp_path / "planes.h5"
    given = [str(f) for f in files if f.exists()]
    line = one_error_line(run("slice", "--settings", settings(format=fmt, length_unit="Mpc/h"), "--snapshot",
                              *given, "--output", str(out)))
    assert str(named) in line and expected in line, line
    assert_nothing_written(out)
