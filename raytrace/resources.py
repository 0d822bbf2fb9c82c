"""Memory, run time and threads of every workflow job, computed from the configuration.

The workflow's rules take their ``mem_mb``, ``runtime`` (minutes) and ``threads`` from
:func:`estimate`, so a cluster profile only says what the machine provides. Each estimate is a
fixed start-up cost plus the work the stage does, in the sizes of the configuration:

========== =================================================================================
symbol     meaning (configuration key)
========== =================================================================================
N          particles per side (``suite.particles_per_side``); N³ particles per snapshot
n_z        snapshots (``suite.snapshot_redshifts``)
G          plane pixels per side (``planes.grid``)
n_s        slabs per box side (``suite.box_mpc_h / planes.thickness_mpc_h``)
n_p        lens planes to the farthest source, χ(z_max) / thickness
P          map pixels per side (``maps.pixels``)
M_t        maps traced per realisation: sources + bins × n(z) variants (× 2 with alignments)
M_o        maps observed per realisation: sources + bins
S          smoothing scales (``survey.smoothing.scales_arcmin``)
R          realisations per job (``maps.realizations_per_job``)
n_f        statistics files a stack reads (the model's realisations)
n_e        elements of one realisation's data vector (all statistics, every map and scale)
========== =================================================================================

CPU seconds t and memory m (MB) of one job, with the constants below:

- simulate (one model, every snapshot): t = 7 + 1e-6 N³ n_z, m = 200 + 2e-4 N³
- slice (one snapshot): t = 2 + 5e-7 N³ + 5e-8 · 3 n_s G² log2 G,
  m = 200 + (3 n_s G² · 32 B + min(chunk_particles, N³) · 64 B)
- trace (R realisations): t = 5 + R n_p (1e-3 + 2e-8 P² M_t + 1.2e-8 G²),
  m = 270 + P² (150 M_t + 300) B + 48 G² B
- observe, observe_variant: t = 3 + R (0.1 + 2e-8 P² log2 P · M_o (S + 1) + 2e-6 n_gal),
  m = 230 + P² M_o (S + 4) · 24 B + 200 n_gal B, with n_gal the catalog galaxies
- measure, measure_variant: t = 3 + R (0.05 + 4e-8 P² log2 P · M_o (S + 1)),
  m = 200 + P² M_o (S + 1) · 32 B
- stack, stack_variant: t = 2 + n_f (0.03 + 2e-6 n_e), m = 150 + (3 n_f n_e + 3 n_e²) · 8 B
- forecast: t = 5 + 1e-6 n_models n_f n_e + 2e-9 n_comb n_e³,
  m = 200 + (2 n_models n_f n_e + 4 n_e²) · 8 B
- plot_maps: t = 5 + 0.5 n_models + 1e-7 n_models M_o P², m = 300 + 16 n_models M_o P² B
- plot_statistics: t = 5 + n_stat + 1e-6 n_models n_f n_e, m = 300 + 8 n_models n_f n_e B
- provenance: t = 3, m = 150

The constants come from the jobs' own records (``logs/benchmarks``) of the test suite's tiny
configuration and of the default demo on 2 cores (slowest job of each rule, CPU time), each
start-up cost and slope rounded up. A job asks for

  mem_mb = attempt × ceil_100(1.2 m),   runtime = attempt × max(10, ceil(4 t / 60)) minutes,

so the memory has a 20 % margin, the time a factor of 4 for slower cores and busy file systems,
and each retry (``--retries``) asks for more. Only ``simulate`` runs threaded code (FFTs):
``threads = clamp(N / 128, 2, 8)``; every other stage is serial. A slicing job with MPI
tasks (``tasks``) divides the particle work and the particle chunk between them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Any, Mapping

from . import config as rtconfig

RULES = (
    "simulate", "slice", "trace", "observe", "measure", "observe_variant", "measure_variant",
    "stack", "stack_variant", "forecast", "plot_maps", "plot_statistics", "provenance",
)
MEMORY_MARGIN = 1.2
TIME_FACTOR = 4.0
MIN_RUNTIME_MIN = 10
THREADED = {"simulate"}


@dataclass(frozen=True)
class Estimate:
    """What one job of a rule needs: CPU seconds, megabytes, threads (before margins)."""

    rule: str
    cpu_s: float
    memory_mb: float
    threads: int = 1

    @property
    def mem_mb(self) -> int:
        """Memory to ask for at the first attempt: the estimate plus 20 %, in 100 MB steps."""
        return int(math.ceil(MEMORY_MARGIN * self.memory_mb / 100.0)) * 100

    @property
    def runtime_min(self) -> int:
        """Wall time to ask for at the first attempt, in minutes."""
        return max(MIN_RUNTIME_MIN, int(math.ceil(TIME_FACTOR * self.cpu_s / 60.0)))

    def request(self, attempt: int = 1) -> dict[str, int]:
        """``mem_mb`` and ``runtime`` of attempt ``attempt`` (1 for the first run)."""
        attempt = max(1, int(attempt))
        return {"mem_mb": attempt * self.mem_mb, "runtime": attempt * self.runtime_min}


_MB = 2.0**20


@lru_cache(maxsize=64)
def _comoving_distance(omega_m: float, z: float) -> float:
    """χ(z) in Mpc/h of a flat ΛCDM background (enough to count lens planes)."""
    n = 2000
    total = 0.0
    for i in range(n):  # midpoint rule
        zi = (i + 0.5) * z / n
        total += 1.0 / math.sqrt(omega_m * (1 + zi) ** 3 + 1 - omega_m)
    return 2997.92458 * total * z / n


def _count(value: Mapping[str, Any], default: int, edges_key: str = "edges") -> int:
    if value.get(edges_key):
        return len(value[edges_key]) - 1
    return int(value.get("bins", default))


@dataclass(frozen=True)
class Sizes:
    """The configuration's sizes the estimates use (see the module notes for the symbols)."""

    particles: int  # N^3
    snapshots: int  # n_z
    files_per_snapshot: int
    chunk: int
    grid: int  # G
    slabs: int  # n_s
    planes: int  # n_p
    pixels: int  # P
    traced_maps: int  # M_t
    observed_maps: int  # M_o
    scales: int  # S
    per_job: int  # R
    catalog_galaxies: int  # n_gal per realisation
    counts: Mapping[str, int]  # realisations per model
    elements: int  # n_e
    models: int
    statistics: int
    combinations: int
    n_side: int  # N

    @classmethod
    def from_config(cls, cfg: Mapping[str, Any]) -> "Sizes":
        suite, planes, maps = cfg["suite"], cfg["planes"], cfg["maps"]
        survey = cfg.get("survey") or {}
        n = int(suite["particles_per_side"])
        snapshot_z = rtconfig.snapshot_redshifts(cfg)
        sources = survey.get("sources")
        n_bins = rtconfig.configured_bin_count(sources)
        n_src = len(maps["source_redshifts"])
        z_max = max([float(z) for z in maps["source_redshifts"]] + ([float(sources.get("z_max", max(snapshot_z)))]
                                                                       if sources else []))
        omega_m = float(suite["fiducial"]["Omega_m"])
        thickness = float(planes["thickness_mpc_h"])
        n_planes = max(1, math.ceil(_comoving_distance(omega_m, z_max) / thickness))
        # n(z) variants and alignment maps the trace stage may add to each bin
        systematics = survey.get("systematics") or {}
        photoz = systematics.get("photoz") or {}
        variants = 1 + 2 * bool(photoz.get("derivative_step")) + 2 * bool(photoz.get("stretch_derivative_step"))
        alignment = 2 if systematics.get("intrinsic_alignment") is not None else 1
        traced = n_src + n_bins * variants * alignment
        observed = n_src + n_bins
        scales = len((survey.get("smoothing") or {}).get("scales_arcmin") or [])
        catalog = survey.get("catalog") or {}
        galaxies = 0
        if catalog.get("enabled"):
            density = catalog.get("galaxies_per_arcmin2", (survey.get("noise") or {}).get("galaxies_per_arcmin2", 30))
            galaxies = int(float(density) * (60.0 * float(maps["field_deg"])) ** 2)
        forecast = cfg.get("forecast") or {}
        return cls(
            particles=n**3, snapshots=len(snapshot_z), files_per_snapshot=int(suite.get("files_per_snapshot", 1)),
            chunk=int(planes.get("chunk_particles", 2**21)), grid=int(planes["grid"]),
            slabs=max(1, round(float(suite["box_mpc_h"]) / thickness)), planes=n_planes, pixels=int(maps["pixels"]),
            traced_maps=traced, observed_maps=observed, scales=scales, per_job=rtconfig.realizations_per_job(cfg),
            catalog_galaxies=galaxies, counts=rtconfig.realization_counts(cfg),
            elements=data_vector_length(cfg.get("statistics") or {}, observed, scales),
            models=len(rtconfig.model_names(cfg)), statistics=len(cfg.get("statistics") or {}),
            combinations=len(forecast.get("combinations") or []), n_side=n,
        )


def data_vector_length(statistics: Mapping[str, Any], maps: int, scales: int) -> int:
    """Elements of one realisation's statistics (an upper bound: empty bins are not removed)."""
    total = 0
    per_scale = max(1, scales)
    for name, s in statistics.items():
        s = s or {}
        if name == "power_spectrum":
            entries = maps * (maps + 1) // 2 if s.get("cross", True) else maps
            total += _count(s, 20, "ell_edges") * entries
        elif name == "bispectrum":
            total += _count(s, 8) * maps * (len(s.get("configurations") or []) or 5)
        elif name == "moments":
            total += 12 * maps * per_scale
        elif name == "minkowski":
            total += 3 * _count(s, 20) * maps * per_scale
        else:  # pdf, peaks, minima and binned statistics like them
            total += _count(s, 20) * maps * per_scale
    return max(1, total)


def estimate(rule: str, cfg: Mapping[str, Any], *, model: str | None = None, tasks: int = 1) -> Estimate:
    """CPU time, memory and threads of one job of ``rule`` (for ``model`` where it matters).

    ``tasks`` is the number of MPI tasks of a slicing job (1 without MPI).
    """
    z = Sizes.from_config(cfg)
    log2 = lambda x: math.log2(max(2, x))  # noqa: E731
    most = max(z.counts.values())
    n_files = z.counts.get(model, most) if model is not None else most
    if rule in ("stack_variant",):
        n_files = int(cfg["maps"]["realizations"])
    p2 = float(z.pixels) ** 2
    g2 = float(z.grid) ** 2
    if rule == "simulate":
        threads = min(8, max(2, z.n_side // 128))
        return Estimate(rule, 7 + 1e-6 * z.particles * z.snapshots, 200 + 2e-4 * z.particles, threads)
    if rule == "slice":
        tasks = max(1, int(tasks))
        particles = z.particles / tasks
        t = 2 + 5e-7 * particles + 5e-8 * 3 * z.slabs * g2 * log2(z.grid)
        m = 200 + (3 * z.slabs * g2 * 32 + min(z.chunk, particles) * 64) / _MB
        return Estimate(rule, t, m)
    if rule == "trace":
        t = 5 + z.per_job * z.planes * (1e-3 + 2e-8 * p2 * z.traced_maps + 1.2e-8 * g2)
        m = 270 + (p2 * (150 * z.traced_maps + 300) + 48 * g2) / _MB
        return Estimate(rule, t, m)
    if rule in ("observe", "observe_variant"):
        galaxies = z.catalog_galaxies if rule == "observe" else 0
        t = 3 + z.per_job * (0.1 + 2e-8 * p2 * log2(z.pixels) * z.observed_maps * (z.scales + 1) + 2e-6 * galaxies)
        m = 230 + (p2 * z.observed_maps * (z.scales + 4) * 24 + 200 * galaxies) / _MB
        return Estimate(rule, t, m)
    if rule in ("measure", "measure_variant"):
        t = 3 + z.per_job * (0.05 + 4e-8 * p2 * log2(z.pixels) * z.observed_maps * (z.scales + 1))
        m = 200 + p2 * z.observed_maps * (z.scales + 1) * 32 / _MB
        return Estimate(rule, t, m)
    if rule in ("stack", "stack_variant"):
        e = z.elements
        return Estimate(rule, 2 + n_files * (0.03 + 2e-6 * e), 150 + (3 * n_files * e + 3 * e * e) * 8 / _MB)
    if rule == "forecast":
        e = z.elements
        t = 5 + 1e-6 * z.models * most * e + 2e-9 * max(1, z.combinations) * e**3
        return Estimate(rule, t, 200 + (2 * z.models * most * e + 4 * e * e) * 8 / _MB)
    if rule == "plot_maps":
        return Estimate(rule, 5 + 0.5 * z.models + 1e-7 * z.models * z.observed_maps * p2,
                        300 + 16 * z.models * z.observed_maps * p2 / _MB)
    if rule == "plot_statistics":
        e = z.elements
        return Estimate(rule, 5 + z.statistics + 1e-6 * z.models * most * e, 300 + 8 * z.models * most * e / _MB)
    if rule == "provenance":
        return Estimate(rule, 3, 150)
    raise KeyError(f"no resource estimate for rule {rule!r}")


def table(cfg: Mapping[str, Any]) -> list[dict[str, Any]]:
    """One row per rule (and per model where the counts differ): what its first attempt asks for."""
    counts = rtconfig.realization_counts(cfg)
    rows = []
    for rule in RULES:
        models = sorted(set(counts.values())) if rule == "stack" else [None]
        for n in models:
            model = next((m for m, c in counts.items() if c == n), None) if n is not None else None
            e = estimate(rule, cfg, model=model)
            rows.append({"rule": rule if n is None else f"{rule} ({n} realisations)", "threads": e.threads,
                         "cpu_s": e.cpu_s, **e.request()})
    return rows
