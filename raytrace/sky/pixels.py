r"""HEALPix pixel geometry: a compiled ``vec2pix`` (RING scheme), tangent bases, rotations.

:func:`vec2pix_ring` is the ring-scheme pixel index of a direction, written after the
algorithm of Górski et al. (2005, sec. 4 and appendix; the same arithmetic as the
HEALPix C++ library's ``loc2pix``), so that the shell-building kernels can bin particles
without leaving compiled code. Tests check it against ``healpy.vec2pix`` index for index.

The local orthonormal basis at a point :math:`\hat n(\theta, \phi)` is
:math:`\hat e_1 = \hat\theta = (\cos\theta\cos\phi, \cos\theta\sin\phi, -\sin\theta)`,
:math:`\hat e_2 = \hat\phi = (-\sin\phi, \cos\phi, 0)`, the basis of healpy's gradient
(``alm2map_der1``) and spin-2 (``alm2map_spin``) maps.

References
----------
Górski, K. M., Hivon, E., Banday, A. J. et al. 2005, ApJ 622, 759.
Shoemake, K. 1992, "Uniform random rotations", in *Graphics Gems III*, ed. D. Kirk,
Academic Press, p. 124.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..errors import RaytraceError

#: nside values accepted for maps (powers of two)
NSIDES = tuple(2**i for i in range(14))

ARCMIN2_PER_SR = (60.0 * 180.0 / math.pi) ** 2
DEG2_PER_SR = (180.0 / math.pi) ** 2
FULL_SKY_DEG2 = 4.0 * math.pi * DEG2_PER_SR


def check_nside(nside: int, key: str = "maps.nside") -> int:
    if int(nside) != nside or int(nside) not in NSIDES:
        raise RaytraceError(f"{key}: {nside!r} is not a power of two between 1 and {NSIDES[-1]}")
    return int(nside)


def npix(nside: int) -> int:
    return 12 * int(nside) ** 2


def pixel_area_sr(nside: int) -> float:
    """Solid angle of one pixel, :math:`4\\pi / N_{\\rm pix}` (all HEALPix pixels are equal)."""
    return 4.0 * math.pi / npix(nside)


def pixel_arcmin(nside: int) -> float:
    """Side of a square of the pixel's area, in arcmin."""
    return math.sqrt(pixel_area_sr(nside) * ARCMIN2_PER_SR)


def nside_from_npix(n: int, where: str) -> int:
    nside = int(round(math.sqrt(n / 12.0)))
    if 12 * nside**2 != n or nside not in NSIDES:
        raise RaytraceError(f"{where}: {n} values is not a HEALPix map (12 nside^2 with nside a power of two)")
    return nside


# ------------------------------------------------------------------------------------
@njit(cache=True, nogil=True, inline="always")
def vec2pix_ring(nside, x, y, z):
    """RING pixel of the direction (x, y, z) (any length > 0); see the module notes."""
    return vec2pix_ring_r(nside, x, y, z, math.sqrt(x * x + y * y + z * z))


@njit(cache=True, nogil=True, inline="always")
def vec2pix_ring_r(nside, x, y, z, r):
    """:func:`vec2pix_ring` with the vector's length ``r`` given."""
    nz = z / r
    phi = 0.0 if (x == 0.0 and y == 0.0) else math.atan2(y, x)
    za = abs(nz)
    tt = phi * (2.0 / math.pi)  # in [-2, 2]: the modulo 4 of the C++ code reduces to
    if tt < 0.0:  # one addition
        tt += 4.0
        if tt == 4.0:
            tt = 0.0
    if za <= 2.0 / 3.0:
        nl4 = 4 * nside
        temp1 = nside * (0.5 + tt)
        temp2 = nside * nz * 0.75
        jp = int(temp1 - temp2)
        jm = int(temp1 + temp2)
        ir = nside + 1 + jp - jm
        kshift = 1 - (ir & 1)
        t1 = jp + jm - nside + kshift + 1 + nl4 + nl4
        ip = (t1 >> 1) % nl4
        return 2 * nside * (nside - 1) + (ir - 1) * nl4 + ip
    tp = tt - int(tt)
    if za < 0.99:
        tmp = nside * math.sqrt(3.0 * (1.0 - za))
    else:
        sth = math.sqrt(x * x + y * y) / r
        tmp = nside * sth / math.sqrt((1.0 + za) / 3.0)
    jp = int(tp * tmp)
    jm = int((1.0 - tp) * tmp)
    ir = jp + jm + 1
    ip = int(tt * ir)
    if nz > 0:
        return 2 * ir * (ir - 1) + ip
    return 12 * nside * nside - 2 * ir * (ir + 1) + ip


@njit(cache=True, nogil=True)
def vec2pix_ring_array(nside, v, out):
    """:func:`vec2pix_ring` of every row of ``v`` (n, 3) into ``out`` (n,) int64."""
    for i in range(v.shape[0]):
        out[i] = vec2pix_ring(nside, v[i, 0], v[i, 1], v[i, 2])


# ------------------------------------------------------------------------------------
def tangent_basis(vec: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    r""":math:`\hat\theta` and :math:`\hat\phi` (each (n, 3)) at unit vectors ``vec`` (n, 3).

    At the poles (where :math:`\phi` is undefined) the limit :math:`\phi = 0` is taken.
    """
    x, y, z = vec[:, 0], vec[:, 1], vec[:, 2]
    rho = np.hypot(x, y)
    safe = rho > 0
    cphi = np.where(safe, x / np.where(safe, rho, 1.0), 1.0)
    sphi = np.where(safe, y / np.where(safe, rho, 1.0), 0.0)
    e_theta = np.stack([z * cphi, z * sphi, -rho], axis=1)
    e_phi = np.stack([-sphi, cphi, np.zeros_like(x)], axis=1)
    return e_theta, e_phi


def pixel_vectors(nside: int) -> np.ndarray:
    """Unit vectors (npix, 3) of the RING pixel centres."""
    import healpy as hp

    return np.ascontiguousarray(np.array(hp.pix2vec(nside, np.arange(npix(nside)))).T)


def random_rotation(rng: np.random.Generator) -> np.ndarray:
    """A rotation matrix drawn uniformly from SO(3): a normalised 4-D Gaussian quaternion (Shoemake 1992)."""
    q = rng.standard_normal(4)
    w, x, y, z = q / np.linalg.norm(q)
    return np.array(
        [
            [1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y)],
            [2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x)],
            [2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y)],
        ]
    )


def lonlat_vector(lon_deg: float, lat_deg: float) -> np.ndarray:
    """Unit vector of longitude and latitude (degrees) in the map frame."""
    lon, lat = np.deg2rad(lon_deg), np.deg2rad(lat_deg)
    return np.array([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])


# ------------------------------------------------------------------------------------
_WINDOWS: dict[tuple[int, int, int], np.ndarray] = {}


def pixel_window(nside: int, lmax: int | None = None, *, subdivision: int | None = None,
                 samples_per_ring: int = 16) -> np.ndarray:
    r"""HEALPix pixel window :math:`w_\ell` (pixel averaging in harmonic space), :math:`\ell = 0 \dots` lmax.

    With :math:`w_{p\ell m} = \Omega_{\rm pix}^{-1}\int_p Y_{\ell m}\,d\Omega`, the window is
    :math:`w_\ell^2 = \frac{4\pi}{(2\ell+1)N_{\rm pix}}\sum_p\sum_m |w_{p\ell m}|^2` (Górski et
    al. 2005; the definition behind healpy's ``pixwin``, from memory). By the addition
    theorem this is the mean over pixels of
    :math:`\Omega_{\rm pix}^{-2}\int_p\int_p P_\ell(\hat n\cdot\hat n')\,d\Omega\,d\Omega'`, computed
    here with ``subdivision``\ :sup:`2` equal-area sub-pixels (the NESTED children; default
    16 up to nside 256, else 8), the pair separations histogrammed finely before the
    Legendre sum. Pixels of an equatorial ring are congruent (one per ring is used); in the
    polar caps the shapes change along a ring, so up to ``samples_per_ring`` pixels evenly
    spread over a quarter ring are used (the four quarters and the two caps are congruent).
    healpy's tabulated windows are downloaded on demand, so they cannot be relied on offline.
    """
    import healpy as hp

    nside = check_nside(nside)
    lmax = 3 * nside - 1 if lmax is None else int(lmax)
    subdivision = (16 if nside <= 256 else 8) if subdivision is None else int(subdivision)
    key = (nside, lmax, subdivision, samples_per_ring)
    if key in _WINDOWS:
        return _WINDOWS[key].copy()
    pixels, weights = [], []
    for ring in range(1, 2 * nside + 1):
        mirror = 2.0 if ring < 2 * nside else 1.0  # the south half mirrors the north
        if ring < nside:  # polar cap: 4 ring pixels, quarter rings congruent
            j = np.unique(np.linspace(0, ring - 1, min(ring, samples_per_ring)).round().astype(int))
            pixels.append(2 * ring * (ring - 1) + j)
            weights.append(np.full(j.size, mirror * 4.0 * ring / j.size))
        else:
            pixels.append(np.array([2 * nside * (nside - 1) + (ring - nside) * 4 * nside]))
            weights.append(np.array([mirror * 4.0 * nside]))
    pixels, weights = np.concatenate(pixels), np.concatenate(weights)
    n_sub = subdivision**2
    nest = hp.ring2nest(nside, pixels)
    gamma_max = 4.0 / nside
    n_bins = 8192
    hist = np.zeros(n_bins)
    for p, w in zip(nest, weights):
        v = np.array(hp.pix2vec(nside * subdivision, p * n_sub + np.arange(n_sub), nest=True)).T
        d2 = np.maximum(2.0 - 2.0 * (v @ v.T), 0.0)
        gamma = 2.0 * np.arcsin(np.minimum(np.sqrt(d2), 2.0) / 2.0)
        idx = np.minimum((gamma / gamma_max * n_bins).astype(np.int64), n_bins - 1)
        hist += w * np.bincount(idx.ravel(), minlength=n_bins)
    x = np.cos((np.arange(n_bins) + 0.5) * gamma_max / n_bins)
    keep = hist > 0
    x, h = x[keep], hist[keep] / hist.sum()
    out = np.empty(lmax + 1)
    p0, p1 = np.ones_like(x), x.copy()
    out[0] = 1.0
    if lmax >= 1:
        out[1] = h @ p1
    for ell in range(1, lmax):
        p0, p1 = p1, ((2 * ell + 1) * x * p1 - ell * p0) / (ell + 1)
        out[ell + 1] = h @ p1
    w_ell = np.sqrt(np.maximum(out, 0.0))
    _WINDOWS[key] = w_ell
    return w_ell.copy()
