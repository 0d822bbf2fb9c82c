"""Full-sky shell building against a plain healpy.vec2pix + numpy.bincount pass (the floor).

The workload: one realisation's shells of a demo snapshot's particles (stored order, box
tiled around the observer with a random rotation and shift per shell), binned into
HEALPix pixels with weight mass / chi^2. Ours: the compiled tiling kernel (block culling,
test, rotation, pixel index and accumulation in one pass). The floor: the same particle
images, already in memory as unit vectors in the order the kernel visits them, binned with
``healpy.vec2pix`` and ``numpy.bincount(weights=...)`` (chunks of 4M; only these two calls
are timed). Prints images per second per core of each, and the ratio (target >= 0.7).
One thread: the kernel is serial, and healpy's vec2pix runs on one thread.
Run: python benchmarks/bench_sky.py [--quick]
"""

from __future__ import annotations

import argparse
import os

import numpy as np
from timing import median_time, snapshot_particles

os.environ.setdefault("OMP_NUM_THREADS", "1")


def images(snap, lo, hi, rot, shift):
    """The particle images of one shell as (unit vectors, weights), in the kernel's visiting order."""
    pos = snap.positions.astype(np.float64)
    box = snap.box_mpc_h
    m = [range(int(np.floor((-hi - shift[a]) / box)), int(np.floor((hi - shift[a]) / box)) + 1) for a in range(3)]
    vecs, weights = [], []
    for mx in m[0]:
        for my in m[1]:
            for mz in m[2]:
                y = pos + shift + np.array([mx, my, mz]) * box
                r2 = np.einsum("ij,ij->i", y, y)
                sel = (r2 >= lo * lo) & (r2 < hi * hi)
                if sel.any():
                    d = y[sel] @ rot.T
                    vecs.append(d / np.sqrt(r2[sel])[:, None])
                    weights.append(snap.masses[0] / r2[sel])
    return np.concatenate(vecs), np.concatenate(weights)


def main() -> None:
    import healpy as hp

    from raytrace.sky.pixels import random_rotation
    from raytrace.sky.shells import TiledSnapshot

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="a smaller snapshot and fewer repeats")
    args = p.parse_args()
    n_side, box, nside = (64, 256.0, 256) if args.quick else (128, 256.0, 1024)
    repeats = 3 if args.quick else 5
    print(f"threads: 1 (numba kernel serial; healpy vec2pix single-threaded; OMP_NUM_THREADS="
          f"{os.environ.get('OMP_NUM_THREADS')}), cores={os.cpu_count()}")
    pos = snapshot_particles(n_side, box)
    snap = TiledSnapshot.from_arrays(pos, np.ones(1), box, omega_m=0.3)
    rng = np.random.default_rng(3)
    # shells of 128 Mpc/h at 512 - 1024 Mpc/h (z ~ 0.18 - 0.38): the typical shell of a run
    shells = [(lo, lo + 128.0, random_rotation(rng), rng.uniform(0, box, 3)) for lo in (512.0, 640.0, 768.0, 896.0)]
    out = np.zeros(hp.nside2npix(nside))

    def ours():
        total = 0
        for lo, hi, rot, shift in shells:
            out[:] = 0.0
            total += snap.deposit(lo, hi, rot, shift, nside, out=out)[1]
        return total

    n_images = ours()
    t_ours = median_time(ours, repeats)
    floor_times = []
    for lo, hi, rot, shift in shells:
        vec, w = images(snap, lo, hi, rot, shift)
        chunk = 1 << 22

        def floor(vec=vec, w=w):
            acc = np.zeros(hp.nside2npix(nside))
            for i in range(0, len(w), chunk):
                pix = hp.vec2pix(nside, vec[i : i + chunk, 0], vec[i : i + chunk, 1], vec[i : i + chunk, 2])
                acc += np.bincount(pix, weights=w[i : i + chunk], minlength=acc.size)
            return acc

        floor_times.append(median_time(floor, repeats))
    t_floor = sum(floor_times)
    rate = lambda t: n_images / t / 1e6  # noqa: E731
    print(f"shell building: {n_side}^3 particles in a {box:g} Mpc/h box, 4 shells of 128 Mpc/h at 512-1024 Mpc/h, "
          f"nside {nside}: {n_images} particle images, medians of {repeats}")
    print(f"  tiling kernel (cull, rotate, vec2pix, accumulate)   {t_ours:7.2f} s  {rate(t_ours):7.1f} Mimages/s/core")
    print(f"  floor: healpy.vec2pix + numpy.bincount             {t_floor:7.2f} s  {rate(t_floor):7.1f} Mimages/s/core")
    print(f"  ratio kernel / floor throughput = {t_floor / t_ours:5.2f}  (target >= 0.7)")


if __name__ == "__main__":
    main()
