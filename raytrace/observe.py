r"""The observing stage: shape noise, mask and smoothing on ray-traced maps.

Input: a map file of the trace stage (single source redshifts and, if configured,
tomographic bins). Output: one observed-map file with, for every map (source redshift or
bin), the noisy shear and convergence (masked pixels set to zero), the convergence
smoothed at every configured scale, the mask, and the per-pixel noise rms before and after
smoothing. Optionally a mock shear catalog (HDF5 and FITS) and FITS convergence images.

Noise convention: ``survey.noise.sigma_e`` is the ellipticity dispersion *per component*;
the per-pixel rms of each shear component and of the convergence is
``sigma_e / sqrt(n_gal * A_pix)``, with ``n_gal`` the galaxy density of that map (the whole
sample for a single source redshift, the bin's share of it for a tomographic bin). Noise is
seeded by (noise seed, realisation, map index), never by model, so every model of a
realisation gets the same noise (paired); the noise seed (``survey.noise.seed``, by default
the master seed) also draws the catalog galaxies. The mask is a property of the survey, drawn
from the master seed: the same in every realisation and model, whatever the noise seed.

Layout of the observed file (arrays [map, iy, ix]; ``map_labels`` names each map):
``kappa``, ``gamma1``, ``gamma2`` (noisy, masked), ``kappa_smoothed`` [scale, map, iy, ix],
``mask`` (1 = valid), ``noise_sigma`` [map], ``noise_sigma_smoothed`` [scale, map]; root
attributes ``field_deg``, ``pixel_arcmin``, ``smoothing_arcmin``, ``smoothing_kernel``,
``valid_fraction``, ``map_labels``, ``galaxies_per_arcmin2``.

The optional FITS file holds every noisy convergence map as an image extension named by its
label (``Z0.50``, ``BIN0`` ...), with a gnomonic WCS.

Systematics (``survey.systematics``, see :mod:`raytrace.systematics`): before noise, the maps
of each tomographic bin become :math:`(1+m)(\gamma + A_{\rm IA}\gamma^I) + c` and
:math:`(1+m)(\kappa + A_{\rm IA}\kappa^I)`, with the lensing and alignment maps of the
traced n(z) variant that ``photoz.offset`` / ``stretch_offset`` select
(:func:`apply_systematics`); with ``convergence_from_shear`` every observed convergence map is
the Kaiser-Squires inversion of the observed (noisy, masked) shear instead. The single
source-redshift maps are left as traced. With every nuisance value zero the observed maps are
bit for bit those without a ``systematics`` section. The values used are stored as the root
attribute ``nuisance`` (JSON). Noise and mask do not depend on the nuisance values, so
variants of one realisation are paired.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

import numpy as np

from . import survey
from .errors import RaytraceError
from .hdf5 import atomic_h5, open_input
from .measuring import write_observed
from .systematics import KEY as SYSTEMATICS, Nuisance, kaiser_squires


@dataclass
class BinMaps:
    """Convergence and shear of every tomographic bin, each (n_bins, P, P) float64."""

    kappa: np.ndarray
    gamma1: np.ndarray
    gamma2: np.ndarray


@dataclass
class TracedVariant:
    """The bins traced with an n(z) variant: every bin's shift or stretch changed by an offset."""

    name: str
    offset: float
    stretch_offset: float
    lensing: BinMaps
    alignment: BinMaps | None
    nz: np.ndarray  # (n_bins, n_z) on the bins' grid


@dataclass
class TracedMaps:
    """The maps of one trace output, sources first, then tomographic bins.

    ``alignment`` holds the unit-amplitude intrinsic-alignment maps of the bins and
    ``variants`` the photo-z variants, when the trace stage wrote them.
    """

    kappa: np.ndarray
    gamma1: np.ndarray
    gamma2: np.ndarray
    labels: list[str]
    density_fraction: np.ndarray  # share of the galaxy sample each map stands for
    field_deg: float
    source_redshifts: np.ndarray
    bin_nz: list[tuple[np.ndarray, np.ndarray]]  # (z, n(z)) of each bin
    alignment: BinMaps | None = None
    variants: list[TracedVariant] = field(default_factory=list)

    @property
    def n_sources(self) -> int:
        return len(self.source_redshifts)

    @property
    def n_bins(self) -> int:
        return len(self.bin_nz)


def _bin_maps(g) -> BinMaps:
    return BinMaps(*(g[k][...].astype(np.float64) for k in ("kappa", "gamma1", "gamma2")))


def read_traced(path: str | Path) -> TracedMaps:
    """Read a trace-stage map file (see :mod:`raytrace.cli`, ``trace``)."""
    with open_input(path) as f:
        for key in ("kappa", "gamma1", "gamma2"):
            if key not in f:
                raise RaytraceError(f"{path}: no {key} dataset (not a map file of the trace stage)")
        zs = np.asarray(f.attrs["source_redshifts"], dtype=float)
        parts = {k: [f[k][...].astype(np.float64)] for k in ("kappa", "gamma1", "gamma2")}
        labels = [f"z{z:.2f}" for z in zs]
        fractions = [np.ones(len(zs))]
        bin_nz = []
        if "bins" in f:
            g = f["bins"]
            for k in parts:
                parts[k].append(g[k][...].astype(np.float64))
            n_bins = g["kappa"].shape[0]
            labels += [f"bin{i}" for i in range(n_bins)]
            fractions.append(np.asarray(g["fraction"][...], dtype=float))
            z = g["z"][...]
            bin_nz = [(z, g["nz"][i]) for i in range(n_bins)]
        alignment = _bin_maps(f["bins/intrinsic_alignment"]) if "bins/intrinsic_alignment" in f else None
        variants = []
        for name, v in (f["bins/photoz_variants"].items() if "bins/photoz_variants" in f else []):
            variants.append(TracedVariant(name, float(v.attrs["offset"]), float(v.attrs["stretch_offset"]), _bin_maps(v),
                                          _bin_maps(v["intrinsic_alignment"]) if "intrinsic_alignment" in v else None,
                                          v["nz"][...]))
        return TracedMaps(
            *(np.concatenate(parts[k]) for k in ("kappa", "gamma1", "gamma2")),
            labels=labels,
            density_fraction=np.concatenate(fractions),
            field_deg=float(f.attrs["field_deg"]),
            source_redshifts=zs,
            bin_nz=bin_nz,
            alignment=alignment,
            variants=variants,
        )


def _variant(maps: TracedMaps, b: int, offset: float, stretch_offset: float, path) -> tuple:
    """Lensing maps, alignment maps (or None) and n(z) of bin ``b`` for the given photo-z offsets."""
    n_src = maps.n_sources
    if offset == 0.0 and stretch_offset == 0.0:
        lens = (maps.kappa[n_src + b], maps.gamma1[n_src + b], maps.gamma2[n_src + b])
        ia = maps.alignment
        return lens, None if ia is None else (ia.kappa[b], ia.gamma1[b], ia.gamma2[b]), maps.bin_nz[b][1]
    for v in maps.variants:
        if np.isclose(v.offset, offset, rtol=1e-6, atol=0.0) and np.isclose(v.stretch_offset, stretch_offset,
                                                                           rtol=1e-6, atol=0.0):
            ia = v.alignment
            return ((v.lensing.kappa[b], v.lensing.gamma1[b], v.lensing.gamma2[b]),
                    None if ia is None else (ia.kappa[b], ia.gamma1[b], ia.gamma2[b]), v.nz[b])
    traced = ", ".join(f"offset {v.offset:+g} / stretch_offset {v.stretch_offset:+g}" for v in maps.variants) or "none"
    key = "offset" if offset != 0.0 else "stretch_offset"
    raise RaytraceError(f"{path}: no bins traced for {SYSTEMATICS}.photoz.{key} = {offset if offset else stretch_offset:g} "
                        f"(bin {b}; traced variants: {traced}); set photoz.derivative_step and re-trace")


def apply_systematics(maps: TracedMaps, nuisance: Nuisance, *, path: str | Path = "the map file") -> TracedMaps:
    r"""The traced maps with the nuisance values applied to every tomographic bin.

    Bin :math:`i` becomes :math:`\gamma = (1+m_i)(\gamma^G + A\gamma^I) + c_i` and
    :math:`\kappa = (1+m_i)(\kappa^G + A\kappa^I)` (module notes of
    :mod:`raytrace.systematics`), with the lensing and alignment maps and n(z) of the
    traced variant that ``nuisance.offset`` / ``stretch_offset`` select. Single
    source-redshift maps are untouched, and so is every bin whose values are all zero:
    each operation is skipped rather than applied with a zero, so a null nuisance returns
    maps identical bit for bit. ``convergence_from_shear`` is applied by :func:`observe`,
    after noise.
    """
    if nuisance.replace(convergence_from_shear=False).is_null():
        return maps
    n_src, n_bins = maps.n_sources, maps.n_bins
    if n_bins == 0:
        raise RaytraceError(f"{path}: {SYSTEMATICS} act on tomographic bins, and the file holds none "
                            f"(configure survey.sources and re-trace)")
    if nuisance.n_bins != n_bins:
        raise RaytraceError(f"{SYSTEMATICS}: nuisance values for {nuisance.n_bins} bin(s), {path} holds {n_bins}")
    out = {k: getattr(maps, k).copy() for k in ("kappa", "gamma1", "gamma2")}
    bin_nz = list(maps.bin_nz)
    a = nuisance.amplitude
    for b in range(n_bins):
        lens, ia, nz = _variant(maps, b, float(nuisance.offset[b]), float(nuisance.stretch_offset[b]), path)
        k, g1, g2 = lens
        if a != 0.0:
            if ia is None:
                raise RaytraceError(f"{SYSTEMATICS}.intrinsic_alignment.amplitude: {path} holds no alignment maps "
                                    f"(add an intrinsic_alignment section and re-trace)")
            k, g1, g2 = k + a * ia[0], g1 + a * ia[1], g2 + a * ia[2]
        m = float(nuisance.m[b])
        if m != 0.0:
            k, g1, g2 = (1.0 + m) * k, (1.0 + m) * g1, (1.0 + m) * g2
        if nuisance.c1[b] != 0.0:
            g1 = g1 + float(nuisance.c1[b])
        if nuisance.c2[b] != 0.0:
            g2 = g2 + float(nuisance.c2[b])
        out["kappa"][n_src + b], out["gamma1"][n_src + b], out["gamma2"][n_src + b] = k, g1, g2
        bin_nz[b] = (bin_nz[b][0], nz)
    return TracedMaps(out["kappa"], out["gamma1"], out["gamma2"], list(maps.labels), maps.density_fraction,
                      maps.field_deg, maps.source_redshifts, bin_nz, maps.alignment, maps.variants)


def nuisance_json(nuisance: Nuisance) -> str:
    """The nuisance values as the JSON stored in an observed file's ``nuisance`` attribute."""
    return json.dumps({"m": list(map(float, nuisance.m)), "c1": list(map(float, nuisance.c1)),
                       "c2": list(map(float, nuisance.c2)), "offset": list(map(float, nuisance.offset)),
                       "stretch_offset": list(map(float, nuisance.stretch_offset)),
                       "amplitude": float(nuisance.amplitude),
                       "convergence_from_shear": bool(nuisance.convergence_from_shear)})


def observe(
    maps_path: str | Path,
    output: str | Path,
    settings: Mapping[str, Any],
    *,
    seed: int,
    realization: int,
    base_dir: str | Path | None = None,
    catalog_paths: tuple[str | Path, str | Path] | None = None,
    fits_path: str | Path | None = None,
    nuisance: Nuisance | None = None,
    log: Callable[[str], None] = lambda s: None,
) -> None:
    """Observe one map file: see the module notes for what is written.

    ``settings`` is the ``survey`` section without ``sources`` (which the trace stage used).
    ``nuisance`` gives the systematics explicitly; by default they come from
    ``settings["systematics"]`` (none when absent). ``seed`` is the master seed: it draws the
    mask, and the noise and catalogs unless ``settings["noise"]["seed"]`` is given.
    """
    traced = read_traced(maps_path)
    if nuisance is None:
        nuisance = Nuisance.from_settings(settings.get("systematics"), traced.n_bins)
    maps = apply_systematics(traced, nuisance, path=maps_path)
    from_shear = nuisance.convergence_from_shear
    n_maps, n_pix, _ = maps.kappa.shape
    field_deg = maps.field_deg
    survey.check_flat_sky(field_deg)
    mask, parts = survey.build_mask(settings.get("mask"), n_pix, field_deg, seed=seed, base_dir=base_dir)
    noise = dict(settings.get("noise") or {})
    noise_seed = int(noise.get("seed", seed))
    n_total = float(noise.get("galaxies_per_arcmin2", 30.0))
    densities = n_total * maps.density_fraction
    smooth = dict(settings.get("smoothing") or {})
    scales = [float(s) for s in smooth.get("scales_arcmin", [])]
    kernel = smooth.get("kernel", "gaussian")
    noisy = {k: np.empty_like(maps.kappa) for k in ("kappa", "gamma1", "gamma2")}
    smoothed = np.empty((len(scales), n_maps, n_pix, n_pix))
    sigma = np.zeros(n_maps)
    sigma_s = np.zeros((len(scales), n_maps))
    for b in range(n_maps):
        if not from_shear:
            observed = survey.observe_map(maps.kappa[b], field_deg, settings, mask=mask, seed=noise_seed,
                                          realisation=realization, bin_index=b, galaxies_per_arcmin2=densities[b])
            noisy["kappa"][b] = observed.noisy
            smoothed[:, b] = observed.smoothed
            sigma[b] = observed.noise_sigma_pix
            sigma_s[:, b] = observed.noise_sigma_smoothed
        for comp in ("gamma1", "gamma2"):
            value = getattr(maps, comp)[b].copy()
            if noise.get("enabled", True):
                value += survey.shape_noise_maps(
                    n_pix, field_deg, float(noise.get("sigma_e", 0.26)), densities[b], seed=noise_seed,
                    realisation=realization, bin_index=b, components=(comp,))[comp]
            noisy[comp][b] = value * mask
        if from_shear:
            # Kaiser-Squires on the observed shear: its noise is the shear's, inverted
            inverted = kaiser_squires(noisy["gamma1"][b], noisy["gamma2"][b])
            observed = survey.observe_map(inverted, field_deg, dict(settings) | {"noise": {"enabled": False}},
                                          mask=mask, seed=seed, realisation=realization, bin_index=b)
            noisy["kappa"][b] = observed.noisy
            smoothed[:, b] = observed.smoothed
            if noise.get("enabled", True):
                sigma[b] = survey.pixel_noise_sigma(float(noise.get("sigma_e", 0.26)), densities[b],
                                                    survey.pixel_arcmin(n_pix, field_deg))
                sigma_s[:, b] = [survey.smoothed_noise_sigma(sigma[b], n_pix, field_deg, sc, kernel) for sc in scales]
        log(f"{maps.labels[b]}: noise rms {sigma[b]:.4g} per pixel, {len(scales)} smoothing scales")
    with atomic_h5(output, stage="observe", settings=settings, inputs=[maps_path], seed=seed) as f:
        write_observed(f, noisy, smoothed, mask, sigma, sigma_s, pixel_axes="iy, ix", labels=maps.labels,
                       scales=scales, kernel=kernel, mask_parts=parts)
        f.attrs["field_deg"] = field_deg
        f.attrs["pixel_arcmin"] = survey.pixel_arcmin(n_pix, field_deg)
        f.attrs["galaxies_per_arcmin2"] = densities
        f.attrs["realization"] = int(realization)
        f.attrs["noise_seed"] = noise_seed
        f.attrs["nuisance"] = nuisance_json(nuisance)
    log(f"valid fraction {mask.mean():.4f}; written {output}")
    if fits_path is not None:
        fits = dict(settings.get("fits") or {})
        z_per_map = [float(z) for z in maps.source_redshifts] + [None] * (n_maps - len(maps.source_redshifts))
        survey.write_convergence_fits(fits_path, noisy["kappa"], field_deg, ra_deg=float(fits.get("ra_deg", 0.0)),
                                      dec_deg=float(fits.get("dec_deg", 0.0)), z_source=z_per_map,
                                      labels=[label.upper() for label in maps.labels])
    if catalog_paths is not None:
        write_catalogs(traced, settings, mask, noise_seed, realization, catalog_paths, log, nuisance=nuisance,
                       path=maps_path)


def write_catalogs(maps: TracedMaps, settings, mask, seed, realization, paths, log, *,
                   nuisance: Nuisance | None = None, path: str | Path = "the map file") -> None:
    r"""Mock shear catalog of every tomographic bin (or of one n(z) over the source planes).

    With ``nuisance`` each bin's galaxies are drawn from the selected n(z) variant, their
    shear signal becomes :math:`(1+m)(g + A\gamma^I) + c` (:func:`raytrace.survey.mock_catalog`),
    with the bin's alignment map read at each galaxy's position.
    """
    cat_cfg = dict(settings.get("catalog") or {})
    noise = dict(settings.get("noise") or {})
    n_src = len(maps.source_redshifts)
    if n_src < 1:
        raise RaytraceError("survey.catalog: a catalog needs maps.source_redshifts to interpolate between")
    density = float(cat_cfg.get("galaxies_per_arcmin2", noise.get("galaxies_per_arcmin2", 30.0)))
    columns: dict[str, list[np.ndarray]] = {}
    nzs = maps.bin_nz or [(np.asarray(maps.source_redshifts), np.ones(n_src))]
    fractions = maps.density_fraction[n_src:] if maps.bin_nz else np.ones(1)
    active = nuisance is not None and not nuisance.replace(convergence_from_shear=False).is_null()
    if active and not maps.bin_nz:
        raise RaytraceError(f"{path}: {SYSTEMATICS} act on tomographic bins, and the file holds none")
    for b, ((z, nz), frac) in enumerate(zip(nzs, fractions)):
        extra = {}
        if active:
            _, ia, nz = _variant(maps, b, float(nuisance.offset[b]), float(nuisance.stretch_offset[b]), path)
            if nuisance.amplitude != 0.0:
                if ia is None:
                    raise RaytraceError(f"{SYSTEMATICS}.intrinsic_alignment.amplitude: {path} holds no alignment maps "
                                        f"(add an intrinsic_alignment section and re-trace)")
                extra["alignment"] = (nuisance.amplitude * ia[1], nuisance.amplitude * ia[2])
            bias = (float(nuisance.m[b]), float(nuisance.c1[b]), float(nuisance.c2[b]))
            if any(bias):
                extra["shear_bias"] = bias
        cat = survey.mock_catalog(
            maps.kappa[:n_src], maps.gamma1[:n_src], maps.gamma2[:n_src], list(maps.source_redshifts),
            maps.field_deg, z, nz, galaxies_per_arcmin2=density * frac, sigma_e=float(noise.get("sigma_e", 0.26)),
            mask=mask, seed=seed, realisation=realization, bin_index=b, **extra,
        )
        cat["bin"] = np.full(len(next(iter(cat.values()))), b, dtype=np.int16)
        for key, value in cat.items():
            columns.setdefault(key, []).append(np.asarray(value))
    table = {k: np.concatenate(v) for k, v in columns.items()}
    survey.write_catalog_hdf5(paths[0], table, settings=cat_cfg, seed=seed)
    survey.write_catalog_fits(paths[1], table)
    log(f"catalog: {len(table['bin'])} galaxies written to {paths[0]} and {paths[1]}")
