"""Cost of observing one 2048^2 convergence map relative to one real FFT of it.

Observing = shape noise (kappa component) + random-hole and border mask (built and
applied) + Gaussian smoothing at three scales (one forward FFT, three inverse).
The reference is one ``scipy.fft.rfft2`` of the same map with ``workers=1``; the
observation also runs its FFTs with ``workers=1`` so the ratio compares like with
like. Run as ``python benchmarks/bench_observe.py``.
"""

from __future__ import annotations

import os

import numba
import numpy as np
import scipy.fft

from raytrace import survey
from timing import median_time

N_PIX = 2048
FIELD_DEG = 5.0
REPEATS = 5
SETTINGS = {
    "noise": {"enabled": True, "sigma_e": 0.26, "galaxies_per_arcmin2": 30.0},
    "smoothing": {"kernel": "gaussian", "scales_arcmin": [1.0, 2.0, 4.0], "mask_aware": False},
}
MASK_SETTINGS = {"border_arcmin": 2.0, "holes": {"per_deg2": 20.0, "r_min_arcmin": 0.5, "r_max_arcmin": 5.0, "slope": 3.0}}


def main() -> None:
    kappa = np.random.default_rng(0).standard_normal((N_PIX, N_PIX)) * 0.02

    def observe(realisation=[0]):
        mask, _ = survey.build_mask(MASK_SETTINGS, N_PIX, FIELD_DEG, seed=1)
        survey.observe_map(kappa, FIELD_DEG, SETTINGS, mask=mask, seed=1, realisation=realisation[0], workers=1)
        realisation[0] += 1

    observe()  # compile the numba hole painter and warm the FFT plans
    scipy.fft.rfft2(kappa, workers=1)
    t_fft = median_time(lambda: scipy.fft.rfft2(kappa, workers=1), REPEATS, warmup=False)
    t_obs = median_time(observe, REPEATS, warmup=False)
    threads = os.environ.get("OMP_NUM_THREADS", "unset")
    print(f"map {N_PIX}^2, {REPEATS} repeats; threads: scipy.fft workers=1 (both timings), "
          f"numba {numba.get_num_threads()} (hole painter is serial), OMP_NUM_THREADS={threads}, cpus={os.cpu_count()}")
    print(f"rfft2 median        : {1e3 * t_fft:8.1f} ms")
    print(f"observe_map median  : {1e3 * t_obs:8.1f} ms  (noise + mask + 3 Gaussian scales)")
    print(f"ratio observe/rfft2 : {t_obs / t_fft:8.2f}  (target <= 10)")

    aware = {**SETTINGS, "smoothing": {**SETTINGS["smoothing"], "mask_aware": True}}
    mask, _ = survey.build_mask(MASK_SETTINGS, N_PIX, FIELD_DEG, seed=1)
    t_aware = median_time(lambda: survey.observe_map(kappa, FIELD_DEG, aware, mask=mask, seed=1, workers=1), REPEATS, warmup=False)
    print(f"mask-aware smoothing: {1e3 * t_aware:8.1f} ms  ratio {t_aware / t_fft:.2f} (two FFT chains; information only)")


if __name__ == "__main__":
    main()
