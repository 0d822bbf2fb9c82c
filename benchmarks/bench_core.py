"""Core kernels against numpy/scipy references, measured side by side in one run.

Prints medians of repeated timings and the ratios the performance targets refer to:
- CIC deposition throughput / numpy.bincount nearest-grid-point binning (target >= 0.7), on a
  demo snapshot's particles in stored order (the workload) and in random order (stress case)
- CIC deposition throughput / numpy.histogram2d (target >= 10)
- one multi-plane step / (one rfft2 + five irfft2 of the plane) (target <= 2)
All on one thread. Run: python benchmarks/bench_core.py [--quick]
"""

from __future__ import annotations

import argparse
import os

import numpy as np
import scipy.fft

from raytrace.deposit import cic_2d
from raytrace.tracing import N_STATE, multiplane_step, ray_grid
from timing import median_time, snapshot_particles


def bench_deposit(label: str, x: np.ndarray, y: np.ndarray, box: float, grid: int, repeats: int) -> None:
    n_particles = len(x)
    w = np.ones(n_particles)
    out = np.zeros((grid, grid))

    def cic():
        out[:] = 0.0
        cic_2d(x, y, w, box, grid, out)

    def ngp_bincount():
        ix = (x * (grid / box)).astype(np.int64)
        iy = (y * (grid / box)).astype(np.int64)
        np.minimum(ix, grid - 1, out=ix)
        np.minimum(iy, grid - 1, out=iy)
        return np.bincount(iy * grid + ix, weights=w, minlength=grid * grid)

    def hist2d():
        return np.histogram2d(y, x, bins=grid, range=[[0, box], [0, box]], weights=w)[0]

    t_cic = median_time(cic, repeats)
    t_ngp = median_time(ngp_bincount, repeats)
    t_h2d = median_time(hist2d, max(1, repeats // 2))
    rate = lambda t: n_particles / t / 1e6  # noqa: E731
    print(f"deposition, {label}: {n_particles} particles onto {grid}^2, 1 thread, medians")
    print(f"  CIC (numba)             {t_cic * 1e3:8.1f} ms  {rate(t_cic):7.1f} Mparticles/s")
    print(f"  NGP numpy.bincount      {t_ngp * 1e3:8.1f} ms  {rate(t_ngp):7.1f} Mparticles/s")
    print(f"  numpy.histogram2d       {t_h2d * 1e3:8.1f} ms  {rate(t_h2d):7.1f} Mparticles/s")
    print(f"  ratio CIC / bincount throughput    = {t_ngp / t_cic:6.2f}  (target >= 0.7)")
    print(f"  ratio CIC / histogram2d throughput = {t_h2d / t_cic:6.2f}  (target >= 10)")


def bench_multiplane(n: int, repeats: int) -> None:
    rng = np.random.default_rng(1)
    box = 256.0
    fields = [rng.standard_normal((n, n)).astype(np.float32) for _ in range(5)]
    tx, ty = ray_grid(3.5, n)
    state = np.zeros((N_STATE, tx.size))
    state[2], state[3] = tx, ty
    state[8] = state[11] = 1.0
    plane = rng.standard_normal((n, n))

    def step():
        multiplane_step(state, 64.0, *fields, box, 10.0, 20.0, 1.0, -1.0, 1e-7)

    def ffts():
        f = scipy.fft.rfft2(plane, workers=1)
        for _ in range(5):
            scipy.fft.irfft2(f, s=(n, n), workers=1)

    t_step = median_time(step, repeats)
    t_fft = median_time(ffts, repeats)
    print(f"multi-plane step: {n}^2 rays through a {n}^2 plane (float32 fields), 1 thread, medians")
    print(f"  step (drift, 5 bilinear reads, distortion update) {t_step * 1e3:8.1f} ms")
    print(f"  rfft2 + 5 irfft2 (scipy, workers=1)               {t_fft * 1e3:8.1f} ms")
    print(f"  ratio step / FFTs = {t_step / t_fft:6.2f}  (target <= 2)")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="smaller sizes, fewer repeats")
    args = p.parse_args()
    print(f"threads: numba kernels are serial; scipy.fft workers=1; "
          f"NUMBA_NUM_THREADS={os.environ.get('NUMBA_NUM_THREADS', 'unset')}, cores={os.cpu_count()}")
    box = 256.0
    # (particles per side, plane grid): the default demo's slicing problem, then a larger one
    cases = [(64, 512)] if args.quick else [(128, 512), (192, 1024)]
    repeats, n_rays = (3, 512) if args.quick else (5, 2048)
    for n_side, grid in cases:
        pos = snapshot_particles(n_side, box).astype(np.float64)
        # the real workload: a snapshot's particles in their stored (Lagrangian) order
        bench_deposit("snapshot order", pos[:, 0].copy(), pos[:, 1].copy(), box, grid, repeats)
        # stress case: as many particles in uniformly random order (every update a cache miss)
        rng = np.random.default_rng(0)
        bench_deposit("uniform random order", rng.uniform(0, box, len(pos)), rng.uniform(0, box, len(pos)), box,
                      grid, repeats)
    bench_multiplane(n_rays, repeats)


if __name__ == "__main__":
    main()
