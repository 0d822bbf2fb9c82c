"""Cost of the summary-statistics suite relative to one FFT of the map.

Runs every registered statistic with default settings (through the registry) on one
2048^2 convergence-like map: the smoothed statistics at three smoothing scales, the
unsmoothed ones (power spectrum, bispectrum) once, and compares the median wall time of a
few repeats with the median time of one ``scipy.fft.rfft2`` of the map on one thread.

Usage: ``python benchmarks/bench_statistics.py [--n-pix 2048] [--repeats 5] [--threads 1]``

The suite's transforms follow ``scipy.fft.set_workers``; ``--threads`` sets it. On a
machine whose cores are busy with other work, more threads can be slower.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
import scipy.fft

from raytrace.statistics import MapSet, available, build
from timing import median_time

SMOOTHING_ARCMIN = (1.0, 2.0, 4.0)
PIXEL_ARCMIN = 0.2


def make_map(n_pix: int, seed: int = 0) -> np.ndarray:
    """Gaussian field with a red power law, P ~ ell^-2 (a stand-in for a convergence map)."""
    rng = np.random.default_rng(seed)
    ky = scipy.fft.fftfreq(n_pix)
    kx = scipy.fft.rfftfreq(n_pix)
    k = np.hypot(ky[:, None], kx[None, :])
    k[0, 0] = np.inf
    spec = scipy.fft.rfft2(rng.standard_normal((n_pix, n_pix))) * k**-1.0
    field = scipy.fft.irfft2(spec, s=(n_pix, n_pix))
    return 0.02 * field / field.std()


def smooth(field: np.ndarray, sigma_arcmin: float) -> np.ndarray:
    n_pix = field.shape[0]
    ky = 2 * np.pi * scipy.fft.fftfreq(n_pix)
    kx = 2 * np.pi * scipy.fft.rfftfreq(n_pix)
    s = sigma_arcmin / PIXEL_ARCMIN
    window = np.exp(-0.5 * (ky[:, None] ** 2 + kx[None, :] ** 2) * s**2)
    return scipy.fft.irfft2(scipy.fft.rfft2(field) * window, s=field.shape)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n-pix", type=int, default=2048)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument(
        "--threads", type=int, default=1, help="scipy.fft threads for the suite (default 1, like the reference)"
    )
    args, _ = parser.parse_known_args()  # tolerate options meant for other benchmarks
    available_threads = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    threads = max(1, args.threads)

    raw = make_map(args.n_pix)
    mask = np.ones(raw.shape, dtype=bool)
    smoothed = {s: smooth(raw, s) for s in SMOOTHING_ARCMIN}
    stats = {name: build(name, {}) for name in available()}
    per_stat: dict[str, list[float]] = {name: [] for name in stats}

    def run_all() -> None:
        # a fresh MapSet per scale, as the measuring stage builds them
        unsmoothed = MapSet(raw[None], mask, PIXEL_ARCMIN, 0.0, None, ("bin0",))
        for name, stat in stats.items():
            if not stat.smoothed:
                t0 = time.perf_counter()
                stat.measure(unsmoothed)
                per_stat[name].append(time.perf_counter() - t0)
        for s in SMOOTHING_ARCMIN:
            mapset = MapSet(smoothed[s][None], mask, PIXEL_ARCMIN, s, None, ("bin0",))
            for name, stat in stats.items():
                if stat.smoothed:
                    t0 = time.perf_counter()
                    stat.measure(mapset)
                    per_stat[name].append(time.perf_counter() - t0)

    with scipy.fft.set_workers(threads):
        t0 = time.perf_counter()
        run_all()  # first call: loads compiled kernels, fills the geometry caches
        cold = time.perf_counter() - t0
        for name in per_stat:
            per_stat[name].clear()
        total = median_time(run_all, args.repeats, warmup=False)
    fft = median_time(lambda: scipy.fft.rfft2(raw, workers=1), max(args.repeats, 5), warmup=False)

    print(f"map {args.n_pix}^2, smoothing scales {SMOOTHING_ARCMIN} arcmin, {args.repeats} repeats")
    print(
        f"threads: {threads} for scipy.fft in the suite (of {available_threads} available); "
        f"numba kernels single-threaded; reference rfft2 on 1 thread; load average {os.getloadavg()[0]:.2f}"
    )
    print(f"rfft2 (workers=1): {fft * 1e3:.1f} ms")
    for name, times in per_stat.items():
        calls = 1 if not stats[name].smoothed else len(SMOOTHING_ARCMIN)
        med = float(np.median(np.reshape(times, (-1, calls)).sum(axis=1)))
        print(f"  {name:15s} {med * 1e3:8.1f} ms  ({calls} call{'s' if calls > 1 else ''})")
    print(f"first run (cold caches): {cold * 1e3:.1f} ms = {cold / fft:.1f} x rfft2")
    print(f"total (median): {total * 1e3:.1f} ms")
    print(f"ratio total / rfft2: {total / fft:.1f}  (target <= 25)")


if __name__ == "__main__":
    main()
