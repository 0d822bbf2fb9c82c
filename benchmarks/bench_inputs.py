"""Slicing real-size snapshots: throughput, MPI speed-up and bounded memory.

Prints medians of repeated runs and the ratios the performance targets of the inputs
issue refer to:
- slicing throughput (read + check + deposit, per core) beside numpy.bincount doing
  nearest-grid-point binning of the same particles onto the same 3 x n_slabs planes;
- MPI speed-up of ``raytrace slice`` on 2 ranks against 1, on a 256^3-particle snapshot
  (target >= 1.6), timed inside the job (the job's own wall-time line) and end to end;
- peak RSS of a slicing job when the particle count doubles (target: the part of the
  peak beyond the plane grids grows by < 10%).
Every slicing run is a fresh ``python -m raytrace slice`` process. Threads: numba kernels
serial, scipy FFTs workers=1, one core per MPI rank.

Run: python benchmarks/bench_inputs.py [--quick] [--only throughput,mpi,memory] [--keep DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
BOX = 256.0


def env() -> dict:
    e = dict(os.environ)
    e["PYTHONPATH"] = os.pathsep.join([str(ROOT), e.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    e.pop("RAYTRACE_MPI", None)
    e["RAYTRACE_THREADS"] = "1"
    return e


def mpiexec() -> str | None:
    return shutil.which("mpiexec", path=os.path.dirname(sys.executable)) or shutil.which("mpiexec")


def za_positions(n_side: int, seed: int = 1) -> np.ndarray:
    """Zel'dovich particles of the demo cosmology at z = 0, in lattice (Lagrangian) order, float32."""
    from raytrace import demo
    from raytrace.cosmology import Cosmology

    cosmo = Cosmology(Omega_m=0.3, Omega_b=0.049, h=0.68, n_s=0.965, A_s=2.1e-9, m_nu_eV=0.1)
    power = cosmo.linear_power([0.0])
    psi = demo.lpt_displacement(demo.white_noise_modes(n_side, seed), BOX, lambda k: power.cb(0.0, k), 1)
    return demo.particle_positions(psi, BOX)


def write_hdf5(paths: list[Path], parts: list[np.ndarray], mass: float) -> None:
    """One HDF5 snapshot whose file i holds the particles ``parts[i]`` (written as they come)."""
    from raytrace.snapshots.hdf5 import write_snapshot

    total = sum(len(p) for p in parts)
    for path, p in zip(paths, parts):
        write_snapshot([path], {1: p}, {1: mass}, box_mpc_h=BOX, redshift=0.0, omega_m=0.3, omega_lambda=0.7, h=0.68)
        with h5py.File(path, "a") as f:  # a multi-file snapshot: totals over all files
            f["Header"].attrs["NumPart_Total"] = np.array([0, total, 0, 0, 0, 0], dtype=np.uint32)
            f["Header"].attrs["NumFilesPerSnapshot"] = len(paths)


def slice_job(files, out: Path, grid: int, thickness: float, ranks: int = 1, assignment="cic", fmt="hdf5"):
    """Run one slicing job; returns (end-to-end s, the job's own wall s, peak MiB of rank 0, slicing-phase s,
    slicing-phase cpu s of the busiest rank)."""
    s = json.dumps({"grid": grid, "thickness_mpc_h": thickness, "species": [1], "assignment": assignment,
                    "chunk_particles": 1 << 21, "format": fmt, "length_unit": "Mpc/h"})
    cmd = [sys.executable, "-m", "raytrace", "slice", "--settings", s, "--snapshot", *map(str, files),
           "--output", str(out)]
    if ranks > 1:
        cmd = [mpiexec() or "mpiexec", "-n", str(ranks), *cmd]
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env())
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"slice failed: {proc.stderr[-2000:]}")
    m = re.search(r"done: wall time ([\d.]+) s, peak memory ([\d.]+) MiB", proc.stderr)
    phase = re.search(r"slicing took ([\d.]+) s.*cpu time per rank: ([\d., ]+) s", proc.stderr)
    cpu = max(float(c) for c in phase.group(2).split(","))
    return wall, float(m.group(1)), float(m.group(2)), float(phase.group(1)), cpu


# ------------------------------------------------------------------------------------ throughput
def bench_throughput(pos: np.ndarray, label: str, grid: int, thickness: float, repeats: int, workdir: Path) -> None:
    from raytrace.deposit import deposit_planes_cic, deposit_planes_tsc
    from raytrace.planes import deposit_snapshot
    from raytrace.snapshots import read_header

    n = len(pos)
    n_slabs = int(round(BOX / thickness))
    mass = np.ones(n)
    files = [workdir / f"tp_{label}.{i}.hdf5" for i in range(2)]
    write_hdf5(files, np.array_split(pos, 2), 1.0)
    header = read_header(files)
    pos64 = pos.astype(np.float64)
    chunk = 1 << 21

    def slicing():  # what the slicing job does per particle: read, check, deposit
        deposit_snapshot(header, grid=grid, thickness_mpc_h=thickness, species=[1], chunk_particles=chunk)

    def kernel(fn):
        def run():
            out = np.zeros((3, n_slabs, grid, grid))
            for a in range(0, n, chunk):
                fn(pos64[a : a + chunk], mass[a : a + chunk], BOX, grid, n_slabs, out)
        return run

    def bincount():  # NGP onto the same 3 x n_slabs planes with numpy, chunk by chunk
        out = np.zeros(3 * n_slabs * grid * grid)
        for a in range(0, n, chunk):
            p = pos64[a : a + chunk]
            cells = np.minimum((p * (grid / BOX)).astype(np.int64), grid - 1)
            slab = np.minimum((p * (n_slabs / BOX)).astype(np.int64), n_slabs - 1)
            for ax, (i, j) in enumerate(((1, 2), (2, 0), (0, 1))):
                idx = ((ax * n_slabs + slab[:, ax]) * grid + cells[:, j]) * grid + cells[:, i]
                out += np.bincount(idx, weights=mass[a : a + chunk], minlength=out.size)
        return out

    def median(fn, r=repeats):
        fn()  # warm-up: numba compilation, page cache
        ts = []
        for _ in range(r):
            t0 = time.perf_counter()
            fn()
            ts.append(time.perf_counter() - t0)
        return statistics.median(ts)

    t_slice = median(slicing)
    t_cic = median(kernel(deposit_planes_cic))
    t_tsc = median(kernel(deposit_planes_tsc))
    t_bin = median(bincount)
    rate = lambda t: n / t / 1e6  # noqa: E731
    print(f"slicing throughput, {label}: {n} particles onto 3 x {n_slabs} planes of {grid}^2, 1 core, "
          f"medians of {repeats}")
    print(f"  slicing from HDF5 (read + check + CIC)   {t_slice:7.2f} s  {rate(t_slice):7.1f} Mparticles/s/core")
    print(f"  CIC kernel alone (in memory)             {t_cic:7.2f} s  {rate(t_cic):7.1f} Mparticles/s/core")
    print(f"  TSC kernel alone (in memory)             {t_tsc:7.2f} s  {rate(t_tsc):7.1f} Mparticles/s/core")
    print(f"  numpy.bincount NGP, same planes          {t_bin:7.2f} s  {rate(t_bin):7.1f} Mparticles/s/core")
    print(f"  ratio slicing / bincount throughput = {t_bin / t_slice:5.2f}")
    print(f"  ratio CIC kernel / bincount throughput = {t_bin / t_cic:5.2f}")


# ------------------------------------------------------------------------------------ MPI
def bench_mpi(pos: np.ndarray, grid: int, thickness: float, repeats: int, workdir: Path, n_files: int) -> None:
    if mpiexec() is None:
        print("MPI speed-up: skipped, no mpiexec found (pip install '.[mpi]')")
        return
    n = len(pos)
    files = [workdir / f"mpi.{i}.hdf5" for i in range(n_files)]
    write_hdf5(files, np.array_split(pos, n_files), 1.0)
    out = workdir / "mpi_planes.h5"
    slice_job(files, out, grid, thickness, 1)  # warm-up: page cache, numba cache
    slice_job(files, out, grid, thickness, 2)
    serial, parallel = [], []
    for _ in range(repeats):  # interleaved, so that a change of load hits both
        serial.append(slice_job(files, out, grid, thickness, 1))
        parallel.append(slice_job(files, out, grid, thickness, 2))
    med = lambda runs, i: statistics.median(r[i] for r in runs)  # noqa: E731
    print(f"MPI slicing: {n} particles ({round(n ** (1 / 3))}^3) in {n_files} HDF5 files onto 3 x "
          f"{int(BOX / thickness)} planes of {grid}^2, CIC; medians of {repeats}, interleaved")
    for label, runs in (("1 rank ", serial), ("2 ranks", parallel)):
        print(f"  {label}: slicing {med(runs, 3):6.2f} s, job {med(runs, 1):6.2f} s, end to end {med(runs, 0):6.2f} s, "
              f"peak {med(runs, 2):5.0f} MiB (rank 0)")
    print(f"  speed-up on 2 ranks, slicing phase = {med(serial, 3) / med(parallel, 3):5.2f}  (target >= 1.6; "
          "headers, deposit, reduction, potentials, writing)")
    print(f"  speed-up on 2 ranks, job wall time = {med(serial, 1) / med(parallel, 1):5.2f}  "
          "(adds start-up: imports of numba, scipy, h5py, mpi4py; MPI init; loading compiled kernels)")
    print(f"  speed-up on 2 ranks, end to end    = {med(serial, 0) / med(parallel, 0):5.2f}  "
          f"(adds interpreter and MPI launcher start-up)")
    print(f"  cpu-time ratio, serial / busiest rank, slicing phase = {med(serial, 4) / med(parallel, 4):5.2f}  "
          "(the speed-up 2 idle cores allow; busy-waiting in MPI counts as cpu)")
    print(f"  per-run slicing times, 1 rank: {', '.join(f'{r[3]:.2f}' for r in serial)}; "
          f"2 ranks: {', '.join(f'{r[3]:.2f}' for r in parallel)}")
    load = os.getloadavg()
    print(f"  load average during the runs (1, 5 min): {load[0]:.2f}, {load[1]:.2f} on {os.cpu_count()} cores")


# ------------------------------------------------------------------------------------ memory
def bench_memory(pos: np.ndarray, grid: int, thickness: float, repeats: int, workdir: Path) -> None:
    n = len(pos)
    n_slabs = int(round(BOX / thickness))
    small = [workdir / f"mem_n.{i}.hdf5" for i in range(2)]
    big = [workdir / f"mem_2n.{i}.hdf5" for i in range(2)]
    write_hdf5(small, np.array_split(pos, 2), 2.0)
    # twice the particles: the same ones and a copy shifted by a quarter of the lattice cell
    shifted = np.mod(pos + np.float32(0.25 * BOX / round(n ** (1 / 3))), np.float32(BOX)).astype(np.float32)
    shifted[shifted >= BOX] = 0.0
    write_hdf5(big, [pos, shifted], 1.0)
    out = workdir / "mem_planes.h5"
    peaks = {"N": [], "2N": []}
    for _ in range(repeats):
        peaks["N"].append(slice_job(small, out, grid, thickness)[2])
        peaks["2N"].append(slice_job(big, out, grid, thickness)[2])
    p1, p2 = statistics.median(peaks["N"]), statistics.median(peaks["2N"])
    grids = (3 * n_slabs * grid**2 * (8 + 6 * 4)) / 2**20  # float64 accumulator + six float32 outputs
    file_mb = sum(f.stat().st_size for f in big) / 2**20
    print(f"peak memory of a slicing job (its own VmHWM, as the job logs it), {grid}^2 planes x 3 x {n_slabs}, chunks of 2^21, "
          f"medians of {repeats}")
    print(f"  N  = {n:>10} particles: {p1:8.0f} MiB")
    print(f"  2N = {2 * n:>10} particles: {p2:8.0f} MiB   (snapshot files {file_mb:.0f} MiB)")
    print(f"  plane grids: {grids:.0f} MiB")
    print(f"  ratio of peaks 2N / N = {p2 / p1:5.3f}")
    print(f"  growth of the peak beyond the grids, (P(2N) - grids) / (P(N) - grids) - 1 = "
          f"{(p2 - grids) / (p1 - grids) - 1:+6.3f}  (target < 0.10)")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="smaller snapshots, fewer repeats")
    p.add_argument("--only", default="throughput,mpi,memory", help="comma-separated subset")
    p.add_argument("--keep", help="write the snapshots here and keep them (default: a temporary folder)")
    args = p.parse_args()
    only = set(args.only.split(","))
    n_side, repeats = (96, 3) if args.quick else (256, 5)
    grid, thickness = (256, 64.0) if args.quick else (512, 64.0)
    print(f"threads: numba kernels serial, RAYTRACE_THREADS=1, one core per MPI rank; cores={os.cpu_count()}")
    workdir = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="raytrace_bench_"))
    workdir.mkdir(parents=True, exist_ok=True)
    try:
        t0 = time.perf_counter()
        pos = za_positions(n_side)
        print(f"({n_side}^3 Zel'dovich particles made in {time.perf_counter() - t0:.1f} s)")
        if "throughput" in only:
            bench_throughput(pos, "snapshot (Lagrangian) order", grid, thickness, repeats, workdir)
            rng = np.random.default_rng(0)
            bench_throughput(pos[rng.permutation(len(pos))], "random order (stress case)", grid, thickness,
                             max(1, repeats // 2), workdir)
        if "mpi" in only:
            bench_mpi(pos, grid, thickness, repeats, workdir, n_files=4)
        if "memory" in only:
            bench_memory(pos, grid, thickness, max(1, repeats // 2), workdir)
    finally:
        if not args.keep:
            shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    main()
