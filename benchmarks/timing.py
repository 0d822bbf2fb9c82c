"""Helpers the benchmarks share: median wall times and a demo snapshot's particles."""

from __future__ import annotations

import statistics
import time


def median_time(fn, repeats: int, warmup: bool = True) -> float:
    """Median wall time of ``fn()`` over ``repeats`` calls, after one untimed call (numba
    compilation, page faults) unless ``warmup`` is false."""
    if warmup:
        fn()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def snapshot_particles(n_side: int, box: float):
    """Particles of a demo snapshot at z = 0 in the order a snapshot file stores them."""
    from raytrace import demo
    from raytrace.cosmology import Cosmology

    cosmo = Cosmology(Omega_m=0.3, Omega_b=0.049, h=0.68, n_s=0.965, A_s=2.1e-9, m_nu_eV=0.1)
    power = cosmo.linear_power([0.0])
    psi = demo.lpt_displacement(demo.white_noise_modes(n_side, 1), box, lambda k: power.cb(0.0, k), 2)
    return demo.particle_positions(psi, box)
