"""The observing stage: shape noise, mask and smoothing on ray-traced maps.

Input: a map file of the trace stage (single source redshifts and, if configured,
tomographic bins). Output: one observed-map file with, for every map (source redshift or
bin), the noisy shear and convergence (masked pixels set to zero), the convergence
smoothed at every configured scale, the mask, and the per-pixel noise rms before and after
smoothing. Optionally a mock shear catalog (HDF5 and FITS) and FITS convergence images.

Noise convention: ``survey.noise.sigma_e`` is the ellipticity dispersion *per component*;
the per-pixel rms of each shear component and of the convergence is
``sigma_e / sqrt(n_gal * A_pix)``, with ``n_gal`` the galaxy density of that map (the whole
sample for a single source redshift, the bin's share of it for a tomographic bin). Noise is
seeded by (seed, realisation, map index), never by model, so every model of a realisation
gets the same noise (paired). The mask is a property of the survey: the same in every
realisation and model.

Layout of the observed file (arrays [map, iy, ix]; ``map_labels`` names each map):
``kappa``, ``gamma1``, ``gamma2`` (noisy, masked), ``kappa_smoothed`` [scale, map, iy, ix],
``mask`` (1 = valid), ``noise_sigma`` [map], ``noise_sigma_smoothed`` [scale, map]; root
attributes ``field_deg``, ``pixel_arcmin``, ``smoothing_arcmin``, ``smoothing_kernel``,
``valid_fraction``, ``map_labels``, ``galaxies_per_arcmin2``.

The optional FITS file holds every noisy convergence map as an image extension named by its
label (``Z0.50``, ``BIN0`` ...), with a gnomonic WCS.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping

import numpy as np

from . import survey
from .errors import RaytraceError
from .hdf5 import atomic_h5, open_input, write_dataset


@dataclass
class TracedMaps:
    """The maps of one trace output, sources first, then tomographic bins."""

    kappa: np.ndarray
    gamma1: np.ndarray
    gamma2: np.ndarray
    labels: list[str]
    density_fraction: np.ndarray  # share of the galaxy sample each map stands for
    field_deg: float
    source_redshifts: np.ndarray
    bin_nz: list[tuple[np.ndarray, np.ndarray]]  # (z, n(z)) of each bin


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
        return TracedMaps(
            *(np.concatenate(parts[k]) for k in ("kappa", "gamma1", "gamma2")),
            labels=labels,
            density_fraction=np.concatenate(fractions),
            field_deg=float(f.attrs["field_deg"]),
            source_redshifts=zs,
            bin_nz=bin_nz,
        )


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
    log: Callable[[str], None] = lambda s: None,
) -> None:
    """Observe one map file: see the module notes for what is written.

    ``settings`` is the ``survey`` section without ``sources`` (which the trace stage used).
    """
    maps = read_traced(maps_path)
    n_maps, n_pix, _ = maps.kappa.shape
    field_deg = maps.field_deg
    survey.check_flat_sky(field_deg)
    mask, parts = survey.build_mask(settings.get("mask"), n_pix, field_deg, seed=seed, base_dir=base_dir)
    noise = dict(settings.get("noise") or {})
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
        observed = survey.observe_map(maps.kappa[b], field_deg, settings, mask=mask, seed=seed,
                                      realisation=realization, bin_index=b, galaxies_per_arcmin2=densities[b])
        noisy["kappa"][b] = observed.noisy
        smoothed[:, b] = observed.smoothed
        sigma[b] = observed.noise_sigma_pix
        sigma_s[:, b] = observed.noise_sigma_smoothed
        for comp in ("gamma1", "gamma2"):
            value = getattr(maps, comp)[b].copy()
            if noise.get("enabled", True):
                value += survey.shape_noise_maps(
                    n_pix, field_deg, float(noise.get("sigma_e", 0.26)), densities[b], seed=seed,
                    realisation=realization, bin_index=b, components=(comp,))[comp]
            noisy[comp][b] = value * mask
        log(f"{maps.labels[b]}: noise rms {sigma[b]:.4g} per pixel, {len(scales)} smoothing scales")
    with atomic_h5(output, stage="observe", settings=settings, inputs=[maps_path], seed=seed) as f:
        for key, value in noisy.items():
            write_dataset(f, key, value.astype(np.float32), "1", axes="[map, iy, ix]")
        write_dataset(f, "kappa_smoothed", smoothed.astype(np.float32), "1", axes="[scale, map, iy, ix]")
        write_dataset(f, "mask", mask.astype(np.uint8), "1", description="1 where the pixel is observed")
        write_dataset(f, "noise_sigma", sigma, "1", axes="[map]")
        write_dataset(f, "noise_sigma_smoothed", sigma_s, "1", axes="[scale, map]")
        f.attrs["field_deg"] = field_deg
        f.attrs["pixel_arcmin"] = survey.pixel_arcmin(n_pix, field_deg)
        f.attrs["smoothing_arcmin"] = np.asarray(scales, dtype=float)
        f.attrs["smoothing_kernel"] = kernel
        f.attrs["valid_fraction"] = float(mask.mean())
        f.attrs["mask_parts"] = json.dumps(parts)
        f.attrs["map_labels"] = json.dumps(maps.labels)
        f.attrs["galaxies_per_arcmin2"] = densities
        f.attrs["realization"] = int(realization)
    log(f"valid fraction {mask.mean():.4f}; written {output}")
    if fits_path is not None:
        fits = dict(settings.get("fits") or {})
        z_per_map = [float(z) for z in maps.source_redshifts] + [None] * (n_maps - len(maps.source_redshifts))
        survey.write_convergence_fits(fits_path, noisy["kappa"], field_deg, ra_deg=float(fits.get("ra_deg", 0.0)),
                                      dec_deg=float(fits.get("dec_deg", 0.0)), z_source=z_per_map,
                                      labels=[label.upper() for label in maps.labels])
    if catalog_paths is not None:
        write_catalogs(maps, settings, mask, seed, realization, catalog_paths, log)


def write_catalogs(maps: TracedMaps, settings, mask, seed, realization, paths, log) -> None:
    """Mock shear catalog of every tomographic bin (or of one n(z) over the source planes)."""
    cat_cfg = dict(settings.get("catalog") or {})
    noise = dict(settings.get("noise") or {})
    n_src = len(maps.source_redshifts)
    if n_src < 1:
        raise RaytraceError("survey.catalog: a catalog needs maps.source_redshifts to interpolate between")
    density = float(cat_cfg.get("galaxies_per_arcmin2", noise.get("galaxies_per_arcmin2", 30.0)))
    columns: dict[str, list[np.ndarray]] = {}
    nzs = maps.bin_nz or [(np.asarray(maps.source_redshifts), np.ones(n_src))]
    fractions = maps.density_fraction[n_src:] if maps.bin_nz else np.ones(1)
    for b, ((z, nz), frac) in enumerate(zip(nzs, fractions)):
        cat = survey.mock_catalog(
            maps.kappa[:n_src], maps.gamma1[:n_src], maps.gamma2[:n_src], list(maps.source_redshifts),
            maps.field_deg, z, nz, galaxies_per_arcmin2=density * frac, sigma_e=float(noise.get("sigma_e", 0.26)),
            mask=mask, seed=seed, realisation=realization, bin_index=b,
        )
        cat["bin"] = np.full(len(next(iter(cat.values()))), b, dtype=np.int16)
        for key, value in cat.items():
            columns.setdefault(key, []).append(np.asarray(value))
    table = {k: np.concatenate(v) for k, v in columns.items()}
    survey.write_catalog_hdf5(paths[0], table, settings=cat_cfg, seed=seed)
    survey.write_catalog_fits(paths[1], table)
    log(f"catalog: {len(table['bin'])} galaxies written to {paths[0]} and {paths[1]}")
