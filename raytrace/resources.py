"""Memory, run time and threads of every workflow job, computed from the configuration.

The workflow's rules take their ``mem_mb``, ``runtime`` (minutes) and ``threads`` from
:func:`estimate`, so a cluster profile only says what the machine provides. Each estimate is a
fixed start-up cost plus the work the stage does, in the sizes of the configuration:

========== =================================================================================
symbol     meaning (configuration key)
========== =================================================================================
N³         particles per snapshot: ``suite.particles_per_side``³ (twice that with demo neutrino
           particles); a files suite's largest snapshot, from its headers
n_z        snapshots per model (``suite.snapshot_redshifts``, or the files found)
G          plane pixels per side (``planes.grid``)
n_s        slabs per box side (``suite.box_mpc_h / planes.thickness_mpc_h``)
n_p        lens planes to the farthest source, χ(z_max) / thickness
P²         map pixels (``maps.pixels``²; on the sphere 12 ``maps.nside``²)
M_t        maps traced per realisation: sources + bins × n(z) variants (× 2 with alignments)
M_o        maps observed per realisation: sources + bins
S          smoothing scales (``survey.smoothing.scales_arcmin``)
R          realisations per job (``maps.realizations_per_job``)
n_f        statistics files a stack reads (the model's realisations)
n_e        elements of one realisation's data vector (all statistics, every map and scale)
========== =================================================================================

CPU seconds t and memory m (MB) of one job, with the constants below:

- simulate (one model, every snapshot): t = 7 + 1e-6 N³ n_z, m = 200 + 2e-4 N³
- slice (one snapshot, T MPI tasks): t = 2 + 5e-7 N³/T + 5e-8 · 3 n_s G² log2 G,
  m = T (200 + 3 n_s G² · 8 B + min(chunk_particles, N³/T) · 64 B) + 3 n_s G² · 24 B
  (every rank holds its own float64 accumulators and a chunk; rank 0 also the float32 fields)
- trace (R realisations): t = 5 + R n_p (1e-3 + 2e-8 P² M_t + 1.2e-8 G²),
  m = 270 + P² (150 M_t + 300) B + 48 G² B
- shells (full sky, R realisations, n_sh shells to χ_max): t = 5 + 2e-7 N³ n_z + R (I / 1.2e7 +
  2e-8 n_sh P²), with I = N³ (4π/3) χ_max³ / L³ the particle images binned per realisation,
  m = 300 + (90 N³ + 16 P²) B (one snapshot read, sorted and rotated; one float64 map)
- trace_sphere (R realisations): with τ = 1.5e-8 nside³ s one spherical-harmonic transform,
  Born t = 5 + R M_t (2 n_sh P² · 1e-8 + 10 τ); multi-plane adds R n_sh (5 τ + 3e-6 P²);
  m = 300 + P² (32 M_t + 100) B (Born) or 300 + P² (32 M_t + 350) B (multi-plane)
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
    "simulate", "slice", "trace", "shells", "trace_sphere", "observe", "measure", "observe_variant", "measure_variant",
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
    n_side: int  # N (the cube root of the particles of a files suite)
    sphere: bool = False
    nside: int = 0
    shells: int = 0  # n_sh
    images: float = 0.0  # I

    @classmethod
    def from_config(cls, cfg: Mapping[str, Any], files: Any = None) -> "Sizes":
        """Sizes of ``cfg``; ``files`` is the :class:`raytrace.filesuite.FileSuite` of a files suite."""
        suite, planes, maps = cfg["suite"], cfg["planes"], cfg["maps"]
        survey = cfg.get("survey") or {}
        if suite.get("kind", "demo") == "files":
            if files is None:
                from .filesuite import discover

                files = discover(dict(cfg))
            snaps = [s for group in files.models.values() for s in group]
            particles = max(sum(s.n_total.values()) for s in snaps)
            snapshot_z = sorted({float(s.redshift) for s in files.models[next(iter(files.models))]})
            n_snapshots = max(len(group) for group in files.models.values())
            files_per = max(len(s.files) for s in snaps)
            box = float(files.box_mpc_h)
        else:
            particles = int(suite["particles_per_side"]) ** 3 * (2 if suite.get("neutrino_particles") else 1)
            snapshot_z = rtconfig.snapshot_redshifts(cfg)
            n_snapshots = len(snapshot_z)
            files_per = int(suite.get("files_per_snapshot", 1))
            box = float(suite["box_mpc_h"])
        n = max(1, round(particles ** (1 / 3)))
        sources = survey.get("sources")
        n_bins = rtconfig.configured_bin_count(sources)
        n_src = len(maps["source_redshifts"])
        z_max = max([float(z) for z in maps["source_redshifts"]] + ([float(sources.get("z_max", max(snapshot_z)))]
                                                                       if sources else []))
        omega_m = float(suite["fiducial"]["Omega_m"])
        thickness = float(planes["thickness_mpc_h"])
        chi_max = _comoving_distance(omega_m, z_max)
        n_planes = max(1, math.ceil(chi_max / thickness))
        sphere = maps.get("geometry", "flat") == "sphere"
        nside = int(maps.get("nside") or 0)
        n_shells, images = 0, 0.0
        if sphere:
            shells = cfg.get("shells") or {}
            n_shells = max(1, math.ceil(chi_max / float(shells.get("thickness_mpc_h", thickness))))
            images = particles * 4.0 * math.pi / 3.0 * chi_max**3 / box**3
        # n(z) variants and alignment maps the trace stage may add to each bin
        systematics = survey.get("systematics") or {}
        photoz = systematics.get("photoz") or {}
        variants = 1 + 2 * bool(photoz.get("derivative_step")) + 2 * bool(photoz.get("stretch_derivative_step"))
        alignment = 2 if systematics.get("intrinsic_alignment") is not None else 1
        cmb = 1 if maps.get("cmb_lensing") else 0  # the full-sky CMB-lensing map
        traced = n_src + n_bins * variants * alignment + cmb
        observed = n_src + n_bins + cmb
        scales = len((survey.get("smoothing") or {}).get("scales_arcmin") or [])
        catalog = survey.get("catalog") or {}
        galaxies = 0
        if catalog.get("enabled"):
            density = catalog.get("galaxies_per_arcmin2", (survey.get("noise") or {}).get("galaxies_per_arcmin2", 30))
            galaxies = int(float(density) * (60.0 * float(maps["field_deg"])) ** 2)
        forecast = cfg.get("forecast") or {}
        return cls(
            particles=particles, snapshots=n_snapshots, files_per_snapshot=files_per,
            chunk=int(planes.get("chunk_particles", 2**21)), grid=int(planes["grid"]),
            slabs=max(1, round(box / thickness)), planes=n_planes,
            pixels=int(math.isqrt(12 * nside**2)) if sphere else int(maps["pixels"]),
            traced_maps=traced, observed_maps=observed, scales=scales, per_job=rtconfig.realizations_per_job(cfg),
            catalog_galaxies=galaxies, counts=rtconfig.realization_counts(cfg),
            elements=data_vector_length(cfg.get("statistics") or {}, observed, scales),
            models=len(rtconfig.model_names(cfg)), statistics=len(cfg.get("statistics") or {}),
            combinations=len(forecast.get("combinations") or []), n_side=n,
            sphere=sphere, nside=nside, shells=n_shells, images=images,
        )

    @property
    def map_pixels(self) -> float:
        """P²: pixels of one map."""
        return 12.0 * self.nside**2 if self.sphere else float(self.pixels) ** 2


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


def estimate(rule: str, cfg: Mapping[str, Any], *, model: str | None = None, tasks: int = 1,
             files: Any = None) -> Estimate:
    """CPU time, memory and threads of one job of ``rule`` (for ``model`` where it matters).

    ``tasks`` is the number of MPI tasks of a slicing job (1 without MPI); ``files`` the
    discovered files suite (read from the configuration when not given).
    """
    z = Sizes.from_config(cfg, files)
    log2 = lambda x: math.log2(max(2, x))  # noqa: E731
    most = max(z.counts.values())
    n_files = z.counts.get(model, most) if model is not None else most
    if rule in ("stack_variant",):
        n_files = int(cfg["maps"]["realizations"])
    p2 = z.map_pixels
    g2 = float(z.grid) ** 2
    if rule == "simulate":
        threads = min(8, max(2, z.n_side // 128))
        return Estimate(rule, 7 + 1e-6 * z.particles * z.snapshots, 200 + 2e-4 * z.particles, threads)
    if rule == "slice":
        tasks = max(1, int(tasks))
        particles = z.particles / tasks
        t = 2 + 5e-7 * particles + 5e-8 * 3 * z.slabs * g2 * log2(z.grid)
        m = tasks * (200 + (3 * z.slabs * g2 * 8 + min(z.chunk, particles) * 64) / _MB) + 3 * z.slabs * g2 * 24 / _MB
        return Estimate(rule, t, m)
    if rule == "shells":
        t = 5 + 2e-7 * z.particles * z.snapshots + z.per_job * (z.images / 1.2e7 + 2e-8 * z.shells * p2)
        return Estimate(rule, t, 300 + (90 * z.particles + 16 * p2) / _MB)
    if rule == "trace_sphere":
        tau = 1.5e-8 * float(z.nside) ** 3
        t = z.traced_maps * (2e-8 * z.shells * p2 + 10 * tau)
        per_pixel = 100  # Born: the shell and a few float64 maps per source
        if cfg["maps"].get("method") == "multi-plane":
            t += z.shells * (5 * tau + 3e-6 * p2)
            per_pixel = 350  # rays, Jacobians, start bases, interpolation weights, 9 shell fields
        return Estimate(rule, 5 + z.per_job * t, 300 + p2 * (32 * z.traced_maps + per_pixel) / _MB)
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


def rules_of(cfg: Mapping[str, Any]) -> tuple[str, ...]:
    """The rules a configuration's workflow has."""
    sphere = cfg["maps"].get("geometry", "flat") == "sphere"
    skipped = {"slice", "trace"} if sphere else {"shells", "trace_sphere"}
    if cfg["suite"].get("kind", "demo") == "files":
        skipped.add("simulate")
    if not (cfg.get("survey") or {}).get("systematics"):
        skipped |= {"observe_variant", "measure_variant", "stack_variant"}
    if not cfg.get("forecast"):
        skipped.add("forecast")
    return tuple(r for r in RULES if r not in skipped)


def table(cfg: Mapping[str, Any], files: Any = None) -> list[dict[str, Any]]:
    """One row per rule (and per model where the counts differ): what its first attempt asks for."""
    counts = rtconfig.realization_counts(cfg)
    tasks = int(cfg["planes"].get("mpi_tasks", 1))
    rows = []
    for rule in rules_of(cfg):
        models = sorted(set(counts.values())) if rule == "stack" else [None]
        for n in models:
            model = next((m for m, c in counts.items() if c == n), None) if n is not None else None
            e = estimate(rule, cfg, model=model, tasks=tasks if rule == "slice" else 1, files=files)
            rows.append({"rule": rule if n is None else f"{rule} ({n} realisations)", "threads": e.threads,
                         "cpu_s": e.cpu_s, **e.request()})
    return rows
