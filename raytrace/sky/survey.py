r"""The observing stage on the sphere: shape noise, masks and smoothing of HEALPix maps.

Noise follows the flat-sky convention (:mod:`raytrace.observe`): ``survey.noise.sigma_e``
is the ellipticity dispersion per component, and every pixel of area
:math:`\Omega_{\rm pix} = 4\pi/N_{\rm pix}` gets Gaussian noise of rms
:math:`\sigma_e/\sqrt{n_{\rm gal}\Omega_{\rm pix}}` in each shear component and in the
convergence, from the same seeded streams (seed, realisation, map, component), so models
are paired in noise. The CMB-lensing map gets no shape noise.

Masks (``survey.mask``; the same for every realisation and model):

``band``
    a galactic-plane-like band: pixels whose latitude with respect to the pole
    ``(pole_lon_deg, pole_lat_deg)`` is below ``half_width_deg`` in absolute value are
    masked. The default pole is the north galactic pole in equatorial (ICRS) coordinates,
    RA 192.85948°, Dec 27.12825° (Reid & Brunthaler 2004's J2000 values, from memory), so
    the band is the galactic plane of a map in equatorial coordinates. Its valid fraction
    is :math:`1 - \sin b_0`.
``holes``
    star-like circular holes as on the flat sky: a Poisson number of centres with
    ``per_deg2`` per square degree over the whole sphere, placed uniformly, radii from
    :math:`dN/dr \propto r^{-s}` between ``r_min_arcmin`` and ``r_max_arcmin``; a pixel is
    masked when its centre lies in a hole (``healpy.query_disc``).
``file``
    a HEALPix FITS map (``healpy.read_map``, first column) at the maps' nside; nonzero and
    finite = valid.

Smoothing (``survey.smoothing``) multiplies the harmonic coefficients of the masked noisy
map by the kernel's beam and synthesises the map again (one analysis for all scales):
Gaussian of standard deviation :math:`\sigma` (``healpy.gauss_beam`` with FWHM
:math:`2\sqrt{2\ln2}\,\sigma`), or a normalised top-hat of radius R,

.. math:: b_\ell = \frac{P_{\ell-1}(\cos R) - P_{\ell+1}(\cos R)}{(2\ell+1)(1-\cos R)},
   \qquad b_0 = 1,

the Legendre transform :math:`b_\ell = 2\pi\int W(\theta)P_\ell(\cos\theta)\sin\theta\,d\theta`
of a disc of unit integral (from :math:`(2\ell+1)P_\ell = P'_{\ell+1} - P'_{\ell-1}`).
The noise rms after smoothing is
:math:`\sigma_{\rm pix}[\Omega_{\rm pix}\sum_\ell (2\ell+1) b_\ell^2/4\pi]^{1/2}` (white noise
has :math:`N_\ell = \sigma_{\rm pix}^2\Omega_{\rm pix}`).

Observed-file layout (arrays [map, pixel], HEALPix RING): ``kappa``, ``gamma1``, ``gamma2``
(noisy, masked pixels 0), ``kappa_smoothed`` [scale, map, pixel], ``mask`` (1 = valid),
``noise_sigma`` [map], ``noise_sigma_smoothed`` [scale, map]; attributes ``geometry =
sphere``, ``nside``, ``ordering``, ``pixel_arcmin``, ``smoothing_arcmin``,
``smoothing_kernel``, ``valid_fraction``, ``mask_parts``, ``map_labels``,
``galaxies_per_arcmin2``, ``map_area_deg2``. The optional FITS file is a HEALPix table
(``healpy.write_map``) with one column per map, masked pixels ``UNSEEN``.

References
----------
Górski, K. M. et al. 2005, ApJ 622, 759.
Kaiser, N. 1992, ApJ 388, 272 (shape noise).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from .. import survey as flat_survey
from ..errors import RaytraceError
from ..hdf5 import atomic_file, atomic_h5, open_input
from ..measuring import write_observed
from .config import SPHERE_MASK_KEYS
from .pixels import FULL_SKY_DEG2, lonlat_vector, npix, pixel_arcmin, pixel_area_sr, pixel_vectors

#: north galactic pole in ICRS degrees (see the module notes)
GALACTIC_POLE_DEG = (192.85948, 27.12825)



# ------------------------------------------------------------------------------------
# masks
def band_mask(nside: int, half_width_deg: float, pole_lon_deg: float = GALACTIC_POLE_DEG[0],
              pole_lat_deg: float = GALACTIC_POLE_DEG[1]) -> np.ndarray:
    """True where |latitude| about the pole is at least ``half_width_deg``."""
    if not 0 <= half_width_deg < 90:
        raise RaytraceError(f"survey.mask.band.half_width_deg: must be in [0, 90), got {half_width_deg!r}")
    sin_b = pixel_vectors(nside) @ lonlat_vector(pole_lon_deg, pole_lat_deg)
    return np.abs(sin_b) >= math.sin(math.radians(half_width_deg))


def hole_mask(nside: int, *, holes_per_deg2: float, r_min_arcmin: float, r_max_arcmin: float, slope: float = 3.0,
              seed: int = 0) -> np.ndarray:
    """Random circular holes over the sphere (see the module notes); True = valid."""
    import healpy as hp

    key = "survey.mask.holes"
    if not holes_per_deg2 >= 0:
        raise RaytraceError(f"{key}.per_deg2: must be >= 0, got {holes_per_deg2!r}")
    if not 0 < r_min_arcmin <= r_max_arcmin:
        raise RaytraceError(f"{key}: need 0 < r_min_arcmin <= r_max_arcmin, got {r_min_arcmin!r}, {r_max_arcmin!r}")
    # component 1: the flat mask's stream is component 0
    rng = np.random.default_rng(flat_survey.seed_sequence(seed, flat_survey.STREAM_MASK, 0, 0, 1))
    n = rng.poisson(holes_per_deg2 * FULL_SKY_DEG2)
    z = rng.uniform(-1.0, 1.0, n)
    phi = rng.uniform(0.0, 2 * np.pi, n)
    rho = np.sqrt(1.0 - z**2)
    vec = np.stack([rho * np.cos(phi), rho * np.sin(phi), z], axis=1)
    radius = np.deg2rad(flat_survey.power_law_radii(rng, n, r_min_arcmin, r_max_arcmin, slope) / 60.0)
    mask = np.ones(npix(nside), dtype=bool)
    for v, r in zip(vec, radius):
        mask[hp.query_disc(nside, v, r, inclusive=False)] = False
    return mask


def file_mask(path: str | Path, nside: int, key: str = "survey.mask.file") -> np.ndarray:
    import healpy as hp

    p = Path(path)
    if not p.exists():
        raise RaytraceError(f"{key}: {p} does not exist")
    try:
        m = hp.read_map(p, field=0, dtype=np.float64)
    except Exception as exc:  # astropy/healpy raise many types on a broken file
        raise RaytraceError(f"{key}: {p} is not a readable HEALPix map ({exc})") from None
    if m.size != npix(nside):
        raise RaytraceError(f"{key}: {p} has {m.size} pixels, the maps have nside {nside} ({npix(nside)} pixels)")
    return np.isfinite(m) & (m != 0) & (m != hp.UNSEEN)


def build_mask(settings: Mapping[str, Any] | None, nside: int, *, seed: int = 0,
               base_dir: str | Path | None = None) -> tuple[np.ndarray, dict[str, float]]:
    """The combined ``survey.mask`` on the sphere and the valid fraction of each part."""
    s = dict(settings or {})
    for key in s:
        if key not in SPHERE_MASK_KEYS:
            raise RaytraceError(f"survey.mask.{key}: not available with maps.geometry: sphere "
                                f"(sphere masks: {', '.join(SPHERE_MASK_KEYS)})")
    mask = np.ones(npix(nside), dtype=bool)
    parts: dict[str, float] = {}
    if s.get("file"):
        path = Path(s["file"])
        if base_dir is not None and not path.is_absolute():
            path = Path(base_dir) / path
        m = file_mask(path, nside)
        parts["file"] = float(m.mean())
        mask &= m
    if s.get("band"):
        b = dict(s["band"])
        m = band_mask(nside, float(b["half_width_deg"]), float(b.get("pole_lon_deg", GALACTIC_POLE_DEG[0])),
                      float(b.get("pole_lat_deg", GALACTIC_POLE_DEG[1])))
        parts["band"] = float(m.mean())
        mask &= m
    if s.get("holes"):
        h = dict(s["holes"])
        m = hole_mask(nside, holes_per_deg2=float(h["per_deg2"]), r_min_arcmin=float(h["r_min_arcmin"]),
                      r_max_arcmin=float(h["r_max_arcmin"]), slope=float(h.get("slope", 3.0)), seed=seed)
        parts["holes"] = float(m.mean())
        mask &= m
    parts["total"] = float(mask.mean())
    return mask, parts


# ------------------------------------------------------------------------------------
# smoothing and noise
def tophat_beam(radius_rad: float, lmax: int) -> np.ndarray:
    """Legendre coefficients of a normalised disc of radius ``radius_rad`` (module notes)."""
    x0 = math.cos(radius_rad)
    p = np.empty(lmax + 2)
    p[0], p[1] = 1.0, x0
    for ell in range(1, lmax + 1):
        p[ell + 1] = ((2 * ell + 1) * x0 * p[ell] - ell * p[ell - 1]) / (ell + 1)
    b = np.ones(lmax + 1)
    if radius_rad > 0:
        ell = np.arange(1, lmax + 1)
        b[1:] = (p[ell - 1] - p[ell + 1]) / ((2 * ell + 1) * (1.0 - x0))
    return b


def beam(kernel: str, scale_arcmin: float, lmax: int) -> np.ndarray:
    """Harmonic transfer of a smoothing kernel: Gaussian (scale = sigma) or top-hat (scale = radius)."""
    import healpy as hp

    scale = math.radians(scale_arcmin / 60.0)
    if kernel == "gaussian":
        return hp.gauss_beam(flat_survey.gaussian_fwhm(scale), lmax=lmax)
    if kernel == "tophat":
        return tophat_beam(scale, lmax)
    raise RaytraceError(f"survey.smoothing.kernel: unknown kernel {kernel!r}, expected one of {list(flat_survey.SMOOTHING_KERNELS)}")


def smooth(m: np.ndarray, scales_arcmin: Sequence[float], *, kernel: str = "gaussian", mask: np.ndarray | None = None,
           min_weight: float = 1e-3, lmax: int | None = None, iterations: int = 1) -> np.ndarray:
    """(n_scales, npix) smoothed maps; with ``mask``, normalised convolution smooth(m M)/smooth(M)."""
    import healpy as hp

    nside = hp.npix2nside(m.size)
    lmax = 3 * nside - 1 if lmax is None else lmax
    out = np.empty((len(scales_arcmin), m.size))
    alm = hp.map2alm(m if mask is None else m * mask, lmax=lmax, iter=iterations)
    walm = None if mask is None else hp.map2alm(mask.astype(float), lmax=lmax, iter=iterations)
    for i, s in enumerate(scales_arcmin):
        b = beam(kernel, float(s), lmax)
        num = hp.alm2map(hp.almxfl(alm, b), nside, lmax=lmax)
        if walm is None:
            out[i] = num
        else:
            den = hp.alm2map(hp.almxfl(walm, b), nside, lmax=lmax)
            good = den >= min_weight
            out[i] = np.where(good, num / np.where(good, den, 1.0), 0.0)
    return out


def smoothed_noise_sigma(sigma_pix: float, nside: int, scale_arcmin: float, kernel: str = "gaussian",
                         lmax: int | None = None) -> float:
    lmax = 3 * nside - 1 if lmax is None else lmax
    b = beam(kernel, scale_arcmin, lmax)
    ell = np.arange(lmax + 1)
    return float(sigma_pix * math.sqrt(pixel_area_sr(nside) * np.sum((2 * ell + 1) * b**2) / (4 * math.pi)))


def noise_map(nside: int, sigma: float, *, seed: int, realisation: int, bin_index: int, component: str) -> np.ndarray:
    """One Gaussian noise map of rms ``sigma`` from the flat branch's noise streams."""
    rng = np.random.default_rng(flat_survey.seed_sequence(seed, flat_survey.STREAM_NOISE, realisation, bin_index,
                                                          flat_survey.NOISE_COMPONENTS[component]))
    return sigma * rng.standard_normal(npix(nside))


# ------------------------------------------------------------------------------------
@dataclass
class SkyMaps:
    """The maps of one sphere trace file: sources, then bins, then the CMB map."""

    kappa: np.ndarray  # (n_maps, npix)
    gamma1: np.ndarray
    gamma2: np.ndarray
    labels: list[str]
    density_fraction: np.ndarray  # share of the galaxy sample; 0: no shape noise (CMB)
    nside: int


def read_sky_maps(path: str | Path) -> SkyMaps:
    with open_input(path) as f:
        for key in ("kappa", "gamma1", "gamma2"):
            if key not in f:
                raise RaytraceError(f"{path}: no {key} dataset (not a map file of the trace stage)")
        if str(f.attrs.get("geometry", "flat")) != "sphere":
            raise RaytraceError(f"{path}: not a sphere map file (attribute geometry)")
        labels = json.loads(f.attrs["map_labels"])
        parts = {k: [f[k][...].astype(np.float64)] for k in ("kappa", "gamma1", "gamma2")}
        fractions = [np.ones(f["kappa"].shape[0])]
        for group in ("bins", "cmb"):
            if group in f:
                for k in parts:
                    parts[k].append(f[group][k][...].astype(np.float64))
                fractions.append(np.asarray(f["bins/fraction"][...], dtype=float) if group == "bins"
                                 else np.zeros(1))
        maps = SkyMaps(*(np.concatenate(parts[k]) for k in ("kappa", "gamma1", "gamma2")), labels=labels,
                       density_fraction=np.concatenate(fractions), nside=int(f.attrs["nside"]))
    if len(maps.labels) != maps.kappa.shape[0]:
        raise RaytraceError(f"{path}: {len(maps.labels)} map labels for {maps.kappa.shape[0]} maps")
    return maps


def observe(maps_path: str | Path, output: str | Path, settings: Mapping[str, Any], *, seed: int, realization: int,
            base_dir: str | Path | None = None, fits_path: str | Path | None = None,
            log: Callable[[str], None] = lambda s: None) -> None:
    """Observe one sphere map file (module notes); ``settings`` is ``survey`` without ``sources``."""
    import healpy as hp

    maps = read_sky_maps(maps_path)
    nside = maps.nside
    if (settings.get("catalog") or {}).get("enabled"):
        raise RaytraceError("survey.catalog.enabled: mock catalogs are not available with maps.geometry: sphere")
    mask, parts = build_mask(settings.get("mask"), nside, seed=seed, base_dir=base_dir)
    noise = dict(settings.get("noise") or {})
    n_total = float(noise.get("galaxies_per_arcmin2", 30.0))
    sigma_e = float(noise.get("sigma_e", 0.26))
    smooth_cfg = dict(settings.get("smoothing") or {})
    scales = [float(s) for s in smooth_cfg.get("scales_arcmin", [])]
    kernel = smooth_cfg.get("kernel", "gaussian")
    n_maps = maps.kappa.shape[0]
    noisy = {k: np.empty_like(maps.kappa) for k in ("kappa", "gamma1", "gamma2")}
    smoothed = np.empty((len(scales), n_maps, npix(nside)))
    sigma = np.zeros(n_maps)
    sigma_s = np.zeros((len(scales), n_maps))
    for b in range(n_maps):
        density = n_total * maps.density_fraction[b]
        if noise.get("enabled", True) and density > 0:
            sigma[b] = flat_survey.pixel_noise_sigma(sigma_e, density, pixel_arcmin(nside))
        for comp in ("kappa", "gamma1", "gamma2"):
            value = getattr(maps, comp)[b].copy()
            if sigma[b] > 0:
                value += noise_map(nside, sigma[b], seed=seed, realisation=realization, bin_index=b, component=comp)
            noisy[comp][b] = value * mask
        if scales:
            smoothed[:, b] = smooth(noisy["kappa"][b], scales, kernel=kernel,
                                    mask=mask if smooth_cfg.get("mask_aware") else None) * mask
        sigma_s[:, b] = [smoothed_noise_sigma(sigma[b], nside, s, kernel) for s in scales]
        log(f"{maps.labels[b]}: noise rms {sigma[b]:.4g} per pixel, {len(scales)} smoothing scales")
    with atomic_h5(output, stage="observe", settings=settings, inputs=[maps_path], seed=seed) as f:
        write_observed(f, noisy, smoothed, mask, sigma, sigma_s, pixel_axes="pixel", labels=maps.labels,
                       scales=scales, kernel=kernel, mask_parts=parts)
        f.attrs["geometry"] = "sphere"
        f.attrs["nside"] = nside
        f.attrs["ordering"] = "RING"
        f.attrs["pixel_arcmin"] = pixel_arcmin(nside)
        f.attrs["galaxies_per_arcmin2"] = n_total * maps.density_fraction
        f.attrs["map_area_deg2"] = FULL_SKY_DEG2
        f.attrs["realization"] = int(realization)
    log(f"valid fraction {mask.mean():.4f}; written {output}")
    if fits_path is not None:
        columns = [np.where(mask, m, hp.UNSEEN).astype(np.float32) for m in noisy["kappa"]]
        names = [label.upper() for label in maps.labels]
        with atomic_file(fits_path) as tmp:
            hp.write_map(str(tmp), columns, column_names=names, dtype=[np.float32] * len(columns), overwrite=True,
                         extra_header=[("CONTENT", "convergence"), ("REALIZ", int(realization))])
        log(f"HEALPix FITS of {len(columns)} convergence maps written to {fits_path}")

