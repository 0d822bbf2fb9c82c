r"""Survey realism: source redshift distributions, shape noise, masks, smoothing,
mock shear catalogs, FITS export and flat-sky validity warnings.

Every function here is pure (no global state); random numbers come from
:class:`numpy.random.SeedSequence` objects built from ``(seed, stream, realisation,
bin index, component)`` so that the same realisation index gives the same noise,
catalog positions and intrinsic ellipticities in every cosmological model (paired
simulations), while different streams never share random numbers.

Conventions
-----------
Maps are square ``(P, P)`` arrays; axis 1 is :math:`x`, axis 0 is :math:`y`. Pixel
``[i, j]`` has its centre at

.. math:: \theta_y = (i + 1/2)\,d - F/2, \qquad \theta_x = (j + 1/2)\,d - F/2,

with pixel side :math:`d = F/P` and field side :math:`F` (degrees in files and
configuration keys, radians internally).

Shear: :math:`\gamma_1 = (\psi_{,xx} - \psi_{,yy})/2`, :math:`\gamma_2 = \psi_{,xy}`.
The lens mapping :math:`\beta = A\theta` has Jacobian

.. math:: A = \begin{pmatrix} 1-\kappa-\gamma_1 & -\gamma_2 \\
                              -\gamma_2 & 1-\kappa+\gamma_1 \end{pmatrix}

(rows/columns ordered :math:`x, y`). An image is elongated along the eigenvector of
:math:`A` with the smaller eigenvalue, so a positive :math:`\gamma_1` stretches images
along :math:`x` (map axis 1) and squeezes them along :math:`y`; a negative
:math:`\gamma_1` stretches along :math:`y`; a positive :math:`\gamma_2` stretches along
the diagonal :math:`x = y`. The complex ellipticity :math:`\epsilon = \epsilon_1 +
i\epsilon_2` of catalogs uses the same axes: :math:`\epsilon_1 > 0` is an elongation
along :math:`x`.

On the sky (see :func:`write_convergence_fits`) the map's :math:`x` axis points
towards decreasing right ascension (west, RA increases to the left as usual) and
:math:`y` towards increasing declination (north). The sky standard coordinates are
therefore :math:`\xi = -\theta_x` (east) and :math:`\eta = \theta_y` (north), a
parity flip: :math:`\gamma_1` (E-W versus N-S elongation) is the same in both frames,
while :math:`\gamma_2` and :math:`\epsilon_2` change sign when going to the usual
(east, north) sky frame.
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

import numba
import numpy as np
import scipy.fft
import scipy.ndimage
import scipy.special

from .errors import RaytraceError
from .hdf5 import atomic_file, atomic_h5, write_dataset

ARCMIN_PER_RAD = 60.0 * 180.0 / np.pi

#: Field side (deg) above which :func:`check_flat_sky` warns. At the corner of a
#: square field of side F the tangent-plane distance tan(theta) exceeds the angle
#: theta by theta^2/3 (relative); for F = 10 deg (theta = 7.07 deg) this is 0.5 %,
#: a common-practice tolerance for the flat-sky approximation.
FLAT_SKY_MAX_FIELD_DEG = 10.0

#: Independent random streams (first element of every SeedSequence spawn key).
STREAM_NOISE = 0
STREAM_CATALOG = 1
STREAM_MASK = 2

#: Component index of each noise map in its spawn key.
NOISE_COMPONENTS = {"kappa": 0, "gamma1": 1, "gamma2": 2}

SMOOTHING_KERNELS = ("gaussian", "tophat")


# ---------------------------------------------------------------------------
# Geometry helpers
# ---------------------------------------------------------------------------


def pixel_centres_rad(n_pix: int, field_deg: float) -> np.ndarray:
    r"""Coordinates of the pixel centres along one axis, in radians.

    Parameters
    ----------
    n_pix : int
        Number of pixels per side, :math:`P`.
    field_deg : float
        Field side :math:`F` in degrees.

    Returns
    -------
    numpy.ndarray
        ``(P,)`` array :math:`(k + 1/2)\,d - F/2` for :math:`k = 0 \dots P-1`.
    """
    field = np.deg2rad(field_deg)
    d = field / n_pix
    return (np.arange(n_pix) + 0.5) * d - 0.5 * field


def _check_field(n_pix: int, field_deg: float, key: str = "maps.field_deg") -> None:
    if not (np.isfinite(field_deg) and field_deg > 0):
        raise RaytraceError(f"{key}: field side must be a positive number of degrees, got {field_deg!r}")
    if int(n_pix) != n_pix or n_pix < 1:
        raise RaytraceError(f"maps.pixels: map side must be a positive integer number of pixels, got {n_pix!r}")


def pixel_arcmin(n_pix: int, field_deg: float) -> float:
    """Pixel side in arcmin, ``60 field_deg / n_pix``."""
    return 60.0 * field_deg / n_pix


# ---------------------------------------------------------------------------
# Source redshift distributions
# ---------------------------------------------------------------------------


def smail_normalisation(z0: float, alpha: float, beta: float) -> float:
    r"""Integral of the unnormalised Smail et al. (1994) distribution.

    Parameters
    ----------
    z0, alpha, beta : float
        Parameters of :math:`z^\alpha \exp[-(z/z_0)^\beta]`.

    Returns
    -------
    float
        :math:`\int_0^\infty z^\alpha e^{-(z/z_0)^\beta} dz =
        z_0^{\alpha+1}\,\Gamma[(\alpha+1)/\beta]/\beta`.

    Notes
    -----
    Substitute :math:`u = (z/z_0)^\beta`. The moments follow the same way,
    :math:`\langle z^k\rangle = z_0^k \Gamma[(\alpha+1+k)/\beta] /
    \Gamma[(\alpha+1)/\beta]`.

    References
    ----------
    Smail I., Ellis R. S., Fitchett M. J., 1994, MNRAS 270, 245.
    """
    return float(z0 ** (alpha + 1.0) * math.gamma((alpha + 1.0) / beta) / beta)


def smail_nz(z: np.ndarray, z0: float, alpha: float = 2.0, beta: float = 1.5) -> np.ndarray:
    r"""Smail et al. (1994) source distribution, normalised analytically over :math:`z\ge 0`.

    Parameters
    ----------
    z : array_like
        Redshifts.
    z0 : float
        Scale redshift :math:`z_0 > 0`.
    alpha : float
        Low-redshift slope :math:`\alpha > -1`.
    beta : float
        High-redshift cut-off sharpness :math:`\beta > 0`.

    Returns
    -------
    numpy.ndarray
        :math:`n(z) = z^\alpha e^{-(z/z_0)^\beta} \beta / [z_0^{\alpha+1}
        \Gamma((\alpha+1)/\beta)]` for :math:`z \ge 0`, zero for :math:`z<0`.

    Notes
    -----
    The mean redshift is :math:`\langle z\rangle = z_0\,\Gamma[(\alpha+2)/\beta] /
    \Gamma[(\alpha+1)/\beta]`. The distribution is a generalised gamma distribution
    with shape :math:`(\alpha+1)/\beta`, power :math:`\beta` and scale :math:`z_0`
    (Stacy 1962). A grid truncated at :math:`z_{\max}` integrates to less than one.

    References
    ----------
    Smail I., Ellis R. S., Fitchett M. J., 1994, MNRAS 270, 245.
    Stacy E. W., 1962, Ann. Math. Stat. 33, 1187.
    """
    if not (z0 > 0 and alpha > -1 and beta > 0):
        raise RaytraceError(
            f"survey.sources.nz: Smail parameters need z0 > 0, alpha > -1, beta > 0; got z0={z0}, alpha={alpha}, beta={beta}"
        )
    z = np.asarray(z, dtype=float)
    zp = np.clip(z, 0.0, None)
    with np.errstate(divide="ignore", invalid="ignore"):
        n = np.where(z >= 0, zp**alpha * np.exp(-((zp / z0) ** beta)), 0.0)
    return n / smail_normalisation(z0, alpha, beta)


def _trapezoid_cumulative(z: np.ndarray, nz: np.ndarray) -> np.ndarray:
    """Cumulative integral of the piecewise-linear interpolant of ``nz`` (last axis)."""
    seg = 0.5 * (nz[..., 1:] + nz[..., :-1]) * np.diff(z)
    out = np.zeros(nz.shape[:-1] + (z.size,))
    np.cumsum(seg, axis=-1, out=out[..., 1:])
    return out


def normalise_nz(z: np.ndarray, nz: np.ndarray, *, name: str = "n(z)") -> np.ndarray:
    """Divide ``nz`` by its trapezoid integral over ``z``; an empty distribution raises.

    Parameters
    ----------
    z : (n_z,) increasing redshift grid.
    nz : (..., n_z) non-negative values.
    name : what to call the distribution in an error message (a file or key).

    Returns
    -------
    numpy.ndarray
        ``nz / integral`` with unit integral along the last axis.
    """
    z = np.asarray(z, dtype=float)
    nz = np.asarray(nz, dtype=float)
    total = np.trapezoid(nz, z, axis=-1)
    if np.any(~(total > 0)):
        raise RaytraceError(f"{name}: n(z) has no support (integral zero) on the redshift grid")
    return nz / np.asarray(total)[..., None]


def load_nz_table(path: str | os.PathLike, z_grid: np.ndarray | None = None, *,
                  key: str = "survey.sources.nz.file") -> tuple[np.ndarray, np.ndarray]:
    r"""Read a tabulated source distribution from a two-column text file.

    Parameters
    ----------
    path : path-like
        Text file with columns ``z n(z)`` (``#`` comments allowed); the normalisation
        of the second column is arbitrary.
    z_grid : array_like, optional
        Grid to interpolate onto (linearly, zero outside the table). By default the
        table's own redshifts are used.
    key : str
        Configuration key the file came from, named in error messages.

    Returns
    -------
    z : numpy.ndarray
        Redshift grid.
    nz : numpy.ndarray
        n(z) normalised to unit trapezoid integral over the grid.

    Raises
    ------
    RaytraceError
        If the file is missing or unreadable, has not two columns, has non-finite,
        negative-redshift, non-increasing redshifts, negative n(z) values, or no
        support (zero integral). The message names the key and the file.
    """
    p = Path(path)
    try:
        table = np.loadtxt(p, ndmin=2, dtype=float)
    except (OSError, ValueError) as exc:
        raise RaytraceError(f"{key}: {p} is not a readable two-column n(z) table ({exc})") from None
    if table.shape[1] != 2 or table.shape[0] < 2:
        raise RaytraceError(f"{key}: {p} must have two columns (z, n) and at least two rows, got shape {table.shape}")
    z, nz = table[:, 0], table[:, 1]
    if not np.all(np.isfinite(table)):
        raise RaytraceError(f"{key}: {p} contains non-finite values")
    if np.any(z < 0):
        raise RaytraceError(f"{key}: {p} has negative redshifts (min {z.min():g})")
    if np.any(np.diff(z) <= 0):
        raise RaytraceError(f"{key}: {p} redshifts are not strictly increasing")
    if np.any(nz < 0):
        k = int(np.argmin(nz))
        raise RaytraceError(f"{key}: {p} has negative n(z) values (min {nz[k]:g} at z={z[k]:g})")
    if z_grid is not None:
        zg = np.asarray(z_grid, dtype=float)
        nz = np.interp(zg, z, nz, left=0.0, right=0.0)
        z = zg
    if not np.trapezoid(nz, z) > 0:
        raise RaytraceError(f"{key}: {p} n(z) has no support (zero everywhere on the redshift grid)")
    return z, normalise_nz(z, nz, name=f"{key}: {p}")


def invert_cdf_linear(z: np.ndarray, nz: np.ndarray, u: np.ndarray) -> np.ndarray:
    r"""Quantiles of the piecewise-linear density through ``(z, nz)``.

    Parameters
    ----------
    z : (n_z,) increasing grid.
    nz : (n_z,) non-negative density values (any normalisation).
    u : array_like
        Cumulative probabilities in [0, 1].

    Returns
    -------
    numpy.ndarray
        Redshifts :math:`z_u` with :math:`\int_{z_0}^{z_u} n\,dz = u \int n\,dz`.

    Notes
    -----
    Inside a segment :math:`n(z_k + t) = n_k + s t`, so the cumulative integral is
    :math:`C_k + n_k t + s t^2/2`. The root is taken in the cancellation-free form
    :math:`t = 2\Delta / (n_k + \sqrt{n_k^2 + 2 s \Delta})` with
    :math:`\Delta = u\,C_{\rm tot} - C_k`, exact for every slope (including zero).
    Applied to uniform deviates this samples the density exactly (inverse-transform
    sampling, e.g. Devroye 1986, ch. 2).

    References
    ----------
    Devroye L., 1986, Non-Uniform Random Variate Generation, Springer.
    """
    z = np.asarray(z, dtype=float)
    nz = np.asarray(nz, dtype=float)
    cum = _trapezoid_cumulative(z, nz)
    target = np.asarray(u, dtype=float) * cum[-1]
    k = np.clip(np.searchsorted(cum, target, side="right") - 1, 0, z.size - 2)
    h = z[k + 1] - z[k]
    n0 = nz[k]
    s = (nz[k + 1] - n0) / h
    delta = np.clip(target - cum[k], 0.0, None)
    disc = np.sqrt(np.clip(n0 * n0 + 2.0 * s * delta, 0.0, None))
    denom = n0 + disc
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(denom > 0, 2.0 * delta / denom, 0.0)
    return z[k] + np.clip(t, 0.0, h)


def equal_number_edges(z: np.ndarray, nz: np.ndarray, n_bins: int) -> np.ndarray:
    """Bin edges holding equal numbers of galaxies of the (true-redshift) n(z).

    Parameters
    ----------
    z, nz : grid and density (piecewise linear between grid points).
    n_bins : number of bins.

    Returns
    -------
    numpy.ndarray
        ``(n_bins + 1,)`` edges from the first to the last redshift of the grid;
        interior edges are the ``k / n_bins`` quantiles (:func:`invert_cdf_linear`).
    """
    if int(n_bins) != n_bins or n_bins < 1:
        raise RaytraceError(f"survey.sources.bins.n_bins: must be a positive integer, got {n_bins!r}")
    q = np.linspace(0.0, 1.0, int(n_bins) + 1)
    edges = invert_cdf_linear(z, nz, q)
    edges[0], edges[-1] = z[0], z[-1]
    return edges


@dataclass(frozen=True)
class TomographicBins:
    """True-redshift distributions of photometric-redshift bins.

    Attributes
    ----------
    z : (n_z,) redshift grid.
    nz : (n_bins, n_z) true-z distribution of each bin, unit integral each.
    fractions : (n_bins,) fraction of all galaxies (of the parent n(z)) in each bin.
        With photo-z scatter the fractions sum to less than one when galaxies
        scatter outside the outermost edges.
    edges : (n_bins + 1,) photometric-redshift edges.
    sigma_z : photo-z scatter parameter (rms is sigma_z (1 + z)).
    """

    z: np.ndarray
    nz: np.ndarray
    fractions: np.ndarray
    edges: np.ndarray
    sigma_z: float

    @property
    def n_bins(self) -> int:
        return self.nz.shape[0]

    def galaxy_density(self, galaxies_per_arcmin2: float) -> np.ndarray:
        """Per-bin galaxy densities (arcmin^-2) for a total density of the parent n(z)."""
        return self.fractions * galaxies_per_arcmin2


def photoz_bin_probability(z: np.ndarray, z_lo: float, z_hi: float, sigma_z: float) -> np.ndarray:
    r"""Probability that a galaxy at true redshift ``z`` has photo-z in ``[z_lo, z_hi)``.

    Parameters
    ----------
    z : array_like
        True redshifts.
    z_lo, z_hi : float
        Photometric bin edges (may be infinite).
    sigma_z : float
        Scatter parameter; the photo-z is Gaussian with mean :math:`z` and rms
        :math:`\sigma_z (1 + z)`.

    Returns
    -------
    numpy.ndarray
        :math:`p(z) = \frac12\left[\mathrm{erf}\frac{z_{hi} - z}{\sqrt2\,\sigma_z(1+z)}
        - \mathrm{erf}\frac{z_{lo} - z}{\sqrt2\,\sigma_z(1+z)}\right]`; for
        :math:`\sigma_z = 0` the indicator of :math:`z_{lo} \le z < z_{hi}`.

    References
    ----------
    Ma Z., Hu W., Huterer D., 2006, ApJ 636, 21 (Gaussian photo-z model).
    """
    z = np.asarray(z, dtype=float)
    if not sigma_z >= 0:
        raise RaytraceError(f"survey.sources.photoz_sigma: must be >= 0, got {sigma_z}")
    if sigma_z == 0:
        return ((z >= z_lo) & (z < z_hi)).astype(float)
    s = np.sqrt(2.0) * sigma_z * (1.0 + z)
    return 0.5 * (scipy.special.erf((z_hi - z) / s) - scipy.special.erf((z_lo - z) / s))


def tomographic_bins(z: np.ndarray, nz: np.ndarray, *, edges: Sequence[float] | None = None,
                     n_bins: int | None = None, sigma_z: float = 0.0,
                     open_outer_edges: bool = False) -> TomographicBins:
    r"""Split a source distribution into photometric-redshift bins.

    Parameters
    ----------
    z : (n_z,) increasing redshift grid.
    nz : (n_z,) true redshift distribution (any normalisation).
    edges : sequence of float, optional
        Explicit photometric edges (strictly increasing).
    n_bins : int, optional
        Number of equal-number bins (edges are quantiles of the true n(z)); exactly
        one of ``edges`` and ``n_bins`` must be given.
    sigma_z : float
        Photo-z scatter parameter: rms :math:`\sigma_z (1+z)`.
    open_outer_edges : bool
        Treat the first and last edge as :math:`-\infty` and :math:`+\infty` so no
        galaxy is lost by scattering outside the binned range.

    Returns
    -------
    TomographicBins
        Normalised true-z distributions, galaxy fractions and edges.

    Notes
    -----
    Bin :math:`i` receives :math:`n_i(z) = n(z)\,p_i(z)` (:func:`photoz_bin_probability`)
    and holds the fraction :math:`f_i = \int n_i\,dz / \int n\,dz` of the galaxies;
    both integrals use the trapezoid rule on the grid, so that for
    :math:`\sigma_z = 0` and edges spanning the grid the bins partition
    :math:`n(z)` exactly: :math:`\sum_i f_i \hat n_i(z) = \hat n(z)` and
    :math:`\sum_i f_i = 1` (hats: unit-normalised). Equal-number edges are exact
    quantiles of the piecewise-linear n(z); the grid-integrated fractions then
    differ from :math:`1/n_{\rm bins}` by at most one grid cell of probability.

    References
    ----------
    Ma Z., Hu W., Huterer D., 2006, ApJ 636, 21.
    Hu W., 1999, ApJ 522, L21 (lensing tomography).
    """
    z = np.asarray(z, dtype=float)
    nz = np.asarray(nz, dtype=float)
    key = "survey.sources.bins"
    if (edges is None) == (n_bins is None):
        raise RaytraceError(f"{key}: give exactly one of 'edges' and 'n_bins'")
    if edges is None:
        e = equal_number_edges(z, nz, n_bins)
    else:
        e = np.asarray(edges, dtype=float)
        if e.ndim != 1 or e.size < 2 or np.any(np.diff(e) <= 0) or not np.all(np.isfinite(e)):
            raise RaytraceError(f"{key}.edges: need at least two finite, strictly increasing edges, got {list(e)}")
    total = np.trapezoid(nz, z)
    if not total > 0:
        raise RaytraceError("survey.sources.nz: n(z) has no support on the redshift grid")
    lo = e[:-1].copy()
    hi = e[1:].copy()
    if open_outer_edges:
        lo[0], hi[-1] = -np.inf, np.inf
    if sigma_z == 0 and not open_outer_edges:
        # the last edge is inclusive so that a grid point on the top edge is kept
        hi[-1] = np.nextafter(hi[-1], np.inf)
    p = np.stack([photoz_bin_probability(z, a, b, sigma_z) for a, b in zip(lo, hi)])
    nbin = nz[None, :] * p
    integ = np.trapezoid(nbin, z, axis=-1)
    fractions = integ / total
    empty = np.flatnonzero(~(integ > 0))
    if empty.size:
        raise RaytraceError(f"{key}: bin {int(empty[0])} [{e[empty[0]]:g}, {e[empty[0] + 1]:g}) holds no galaxies")
    return TomographicBins(z=z, nz=nbin / integ[:, None], fractions=fractions, edges=e, sigma_z=float(sigma_z))


def source_bins(settings: Mapping[str, Any] | None, *, base_dir: str | os.PathLike | None = None) -> TomographicBins:
    """Tomographic bins from the ``survey.sources`` configuration section.

    Parameters
    ----------
    settings : mapping or None
        ``nz``: ``{"kind": "smail", "z0", "alpha", "beta"}`` or
        ``{"kind": "table", "file": path}``; ``z_max`` and ``z_points`` (grid, defaults
        4.0 and 2001); ``bins``: ``{"edges": [...]}`` or ``{"n_bins": n}`` (default one
        bin spanning the grid); ``photoz_sigma`` (default 0); ``open_outer_edges``
        (default False).
    base_dir : directory that a relative table ``file`` is taken from.

    Returns
    -------
    TomographicBins
        See :func:`tomographic_bins`.
    """
    s = dict(settings or {})
    key = "survey.sources"
    z_max = float(s.get("z_max", 4.0))
    z_points = int(s.get("z_points", 2001))
    if not (z_max > 0 and z_points >= 2):
        raise RaytraceError(f"{key}.z_max/z_points: need z_max > 0 and z_points >= 2, got {z_max}, {z_points}")
    z = np.linspace(0.0, z_max, z_points)
    nz_cfg = dict(s.get("nz") or {"kind": "smail", "z0": 0.64, "alpha": 2.0, "beta": 1.5})
    kind = nz_cfg.get("kind", "smail")
    if kind == "smail":
        try:
            nz = smail_nz(z, float(nz_cfg["z0"]), float(nz_cfg.get("alpha", 2.0)), float(nz_cfg.get("beta", 1.5)))
        except KeyError:
            raise RaytraceError(f"{key}.nz.z0: required for a Smail n(z)") from None
    elif kind == "table":
        if not nz_cfg.get("file"):
            raise RaytraceError(f"{key}.nz.file: required for a tabulated n(z)")
        path = Path(nz_cfg["file"])
        if base_dir is not None and not path.is_absolute():
            path = Path(base_dir) / path
        _, nz = load_nz_table(path, z, key=f"{key}.nz.file")
    else:
        raise RaytraceError(f"{key}.nz.kind: unknown n(z) kind {kind!r}, expected 'smail' or 'table'")
    bins = dict(s.get("bins") or {"edges": [0.0, z_max]})
    return tomographic_bins(z, nz, edges=bins.get("edges"), n_bins=bins.get("n_bins"),
                            sigma_z=float(s.get("photoz_sigma", 0.0)),
                            open_outer_edges=bool(s.get("open_outer_edges", False)))


# ---------------------------------------------------------------------------
# Random streams and shape noise
# ---------------------------------------------------------------------------


def seed_sequence(seed: int, stream: int, realisation: int = 0, bin_index: int = 0,
                  component: int = 0) -> np.random.SeedSequence:
    """SeedSequence of one random stream, independent of the cosmological model.

    Parameters
    ----------
    seed : int
        Survey seed (configuration).
    stream : int
        ``STREAM_NOISE``, ``STREAM_CATALOG`` or ``STREAM_MASK``.
    realisation : int
        Model-independent realisation index (the paired-simulation index).
    bin_index : int
        Source-bin index.
    component : int
        Sub-stream (e.g. noise component, see ``NOISE_COMPONENTS``).

    Returns
    -------
    numpy.random.SeedSequence
        ``SeedSequence(seed, spawn_key=(stream, realisation, bin_index, component))``.

    Notes
    -----
    Different spawn keys give statistically independent streams (NumPy's
    SeedSequence hashes the entropy and the key into the generator state).

    References
    ----------
    NumPy documentation, "Parallel random number generation" (SeedSequence).
    """
    for name, v in (("seed", seed), ("realisation", realisation), ("bin_index", bin_index)):
        if int(v) != v or v < 0:
            raise RaytraceError(f"{name}: must be a non-negative integer, got {v!r}")
    return np.random.SeedSequence(int(seed), spawn_key=(int(stream), int(realisation), int(bin_index), int(component)))


def pixel_noise_sigma(sigma_e: float, galaxies_per_arcmin2: float, pixel_side_arcmin: float) -> float:
    r"""Per-pixel rms of the shape noise of one shear component (or of kappa).

    Parameters
    ----------
    sigma_e : float
        Intrinsic ellipticity dispersion **per component**, :math:`\sigma_e =
        \langle\epsilon_1^2\rangle^{1/2} = \langle\epsilon_2^2\rangle^{1/2}` (the total
        dispersion is :math:`\sqrt2\,\sigma_e`).
    galaxies_per_arcmin2 : float
        Galaxy density :math:`n_{\rm gal}` in arcmin^-2.
    pixel_side_arcmin : float
        Pixel side in arcmin.

    Returns
    -------
    float
        :math:`\sigma_{\rm pix} = \sigma_e / \sqrt{n_{\rm gal} A_{\rm pix}}`.

    Notes
    -----
    The noise power spectrum is white, :math:`N_\ell = \sigma_e^2 / n_{\rm gal}` with
    :math:`n_{\rm gal}` in sr^-1 (Kaiser 1992). The same rms is used for a
    convergence noise map (common practice: the Kaiser-Squires inversion of white
    shear noise is white with the same amplitude).

    References
    ----------
    Kaiser N., 1992, ApJ 388, 272.
    Van Waerbeke L., 2000, MNRAS 313, 524.
    """
    if not (sigma_e >= 0 and np.isfinite(sigma_e)):
        raise RaytraceError(f"survey.noise.sigma_e: must be a non-negative number, got {sigma_e!r}")
    if not (galaxies_per_arcmin2 > 0 and np.isfinite(galaxies_per_arcmin2)):
        raise RaytraceError(f"survey.noise.galaxies_per_arcmin2: must be positive, got {galaxies_per_arcmin2!r}")
    return float(sigma_e / np.sqrt(galaxies_per_arcmin2 * pixel_side_arcmin**2))


def shape_noise_maps(n_pix: int, field_deg: float, sigma_e: float, galaxies_per_arcmin2: float, *,
                     seed: int, realisation: int, bin_index: int = 0,
                     components: Sequence[str] = ("kappa", "gamma1", "gamma2"),
                     dtype: Any = np.float64) -> dict[str, np.ndarray]:
    r"""Gaussian shape-noise maps, paired across cosmological models.

    Parameters
    ----------
    n_pix : int
        Map side in pixels.
    field_deg : float
        Field side in degrees.
    sigma_e : float
        Ellipticity dispersion per component (see :func:`pixel_noise_sigma`).
    galaxies_per_arcmin2 : float
        Galaxy density of this source bin.
    seed, realisation, bin_index : int
        Select the random stream (:func:`seed_sequence`); each component has its own
        sub-stream, so e.g. the kappa noise does not depend on which other
        components are requested.
    components : sequence of str
        Any of ``"kappa"``, ``"gamma1"``, ``"gamma2"``.
    dtype : numpy dtype
        ``float64`` or ``float32``.

    Returns
    -------
    dict of str to numpy.ndarray
        One independent ``(P, P)`` map :math:`\sim \mathcal N(0, \sigma_{\rm pix}^2)`
        per component, :math:`\sigma_{\rm pix} = \sigma_e/\sqrt{n_{\rm gal} A_{\rm pix}}`.

    References
    ----------
    Kaiser N., 1992, ApJ 388, 272.
    """
    _check_field(n_pix, field_deg)
    sig = pixel_noise_sigma(sigma_e, galaxies_per_arcmin2, pixel_arcmin(n_pix, field_deg))
    out = {}
    for name in components:
        if name not in NOISE_COMPONENTS:
            raise RaytraceError(f"survey.noise.components: unknown component {name!r}, expected one of {sorted(NOISE_COMPONENTS)}")
        rng = np.random.default_rng(seed_sequence(seed, STREAM_NOISE, realisation, bin_index, NOISE_COMPONENTS[name]))
        m = rng.standard_normal((n_pix, n_pix), dtype=dtype)
        m *= sig
        out[name] = m
    return out


# ---------------------------------------------------------------------------
# Masks
# ---------------------------------------------------------------------------


def valid_fraction(mask: np.ndarray) -> float:
    """Fraction of valid (True) pixels of a boolean mask."""
    return float(np.count_nonzero(mask)) / mask.size


def power_law_radii(rng: np.random.Generator, n: int, r_min: float, r_max: float, slope: float) -> np.ndarray:
    r"""Draw radii from :math:`dN/dr \propto r^{-s}` on :math:`[r_{\min}, r_{\max}]`.

    Parameters
    ----------
    rng : numpy.random.Generator
    n : int
        Number of radii.
    r_min, r_max : float
        Range, :math:`0 < r_{\min} \le r_{\max}`.
    slope : float
        Power-law index :math:`s`.

    Returns
    -------
    numpy.ndarray
        Radii by inverse-transform sampling,
        :math:`r = [r_{\min}^{1-s} + u(r_{\max}^{1-s} - r_{\min}^{1-s})]^{1/(1-s)}`
        (:math:`r = r_{\min}(r_{\max}/r_{\min})^u` for :math:`s = 1`).
    """
    u = rng.random(n)
    if r_max == r_min:
        return np.full(n, float(r_min))
    if abs(slope - 1.0) < 1e-12:
        return r_min * (r_max / r_min) ** u
    a = 1.0 - slope
    return (r_min**a + u * (r_max**a - r_min**a)) ** (1.0 / a)


@numba.njit(cache=True)
def _paint_discs(mask, cx, cy, r):
    """Set pixels whose centres lie inside a disc to False (coordinates in pixel units,
    pixel [i, j] centred at (x, y) = (j + 0.5, i + 0.5))."""
    ny, nx = mask.shape
    for k in range(cx.size):
        x0, y0, rk = cx[k], cy[k], r[k]
        r2 = rk * rk
        j0 = max(int(np.floor(x0 - rk - 0.5)), 0)
        j1 = min(int(np.ceil(x0 + rk - 0.5)), nx - 1)
        i0 = max(int(np.floor(y0 - rk - 0.5)), 0)
        i1 = min(int(np.ceil(y0 + rk - 0.5)), ny - 1)
        for i in range(i0, i1 + 1):
            dy = i + 0.5 - y0
            dy2 = dy * dy
            if dy2 > r2:
                continue
            for j in range(j0, j1 + 1):
                dx = j + 0.5 - x0
                if dx * dx + dy2 <= r2:
                    mask[i, j] = False


@dataclass(frozen=True)
class HoleCatalog:
    """Holes of a random mask: centres (theta_x, theta_y) and radii, all in arcmin."""

    x_arcmin: np.ndarray
    y_arcmin: np.ndarray
    radius_arcmin: np.ndarray


def star_mask(n_pix: int, field_deg: float, *, holes_per_deg2: float, r_min_arcmin: float,
              r_max_arcmin: float, slope: float = 3.0, seed: int = 0,
              return_holes: bool = False) -> np.ndarray | tuple[np.ndarray, HoleCatalog]:
    r"""Random circular holes (bright-star-like) with a power-law size distribution.

    Parameters
    ----------
    n_pix : int
        Map side in pixels.
    field_deg : float
        Field side in degrees.
    holes_per_deg2 : float
        Mean surface density of hole centres, deg^-2.
    r_min_arcmin, r_max_arcmin : float
        Range of hole radii in arcmin.
    slope : float
        :math:`dN/dr \propto r^{-s}` (:func:`power_law_radii`).
    seed : int
        Survey seed; the mask is the same for every realisation and model.
    return_holes : bool
        Also return the :class:`HoleCatalog`.

    Returns
    -------
    numpy.ndarray or (numpy.ndarray, HoleCatalog)
        ``(P, P)`` bool mask, True = valid; a pixel is masked when its centre lies in
        a hole.

    Notes
    -----
    Centres form a Poisson process over the field enlarged by :math:`r_{\max}` on
    every side, so the coverage is homogeneous up to the edges. Overlapping holes
    make a Boolean model: the expected valid fraction is
    :math:`\exp(-\rho\,\pi\langle r^2\rangle)` with :math:`\rho` the centre density
    (Stoyan, Kendall & Mecke 1995, ch. 3).

    References
    ----------
    Stoyan D., Kendall W. S., Mecke J., 1995, Stochastic Geometry and its
    Applications, 2nd ed., Wiley.
    """
    _check_field(n_pix, field_deg)
    key = "survey.mask.holes"
    if not holes_per_deg2 >= 0:
        raise RaytraceError(f"{key}.per_deg2: must be >= 0, got {holes_per_deg2!r}")
    if not (0 < r_min_arcmin <= r_max_arcmin):
        raise RaytraceError(f"{key}: need 0 < r_min_arcmin <= r_max_arcmin, got {r_min_arcmin!r}, {r_max_arcmin!r}")
    rng = np.random.default_rng(seed_sequence(seed, STREAM_MASK, 0, 0, 0))
    f_arcmin = 60.0 * field_deg
    side = f_arcmin + 2.0 * r_max_arcmin
    n_holes = rng.poisson(holes_per_deg2 * (side / 60.0) ** 2)
    x = (rng.random(n_holes) - 0.5) * side
    y = (rng.random(n_holes) - 0.5) * side
    r = power_law_radii(rng, n_holes, r_min_arcmin, r_max_arcmin, slope)
    d = f_arcmin / n_pix
    mask = np.ones((n_pix, n_pix), dtype=np.bool_)
    _paint_discs(mask, (x + 0.5 * f_arcmin) / d, (y + 0.5 * f_arcmin) / d, r / d)
    if return_holes:
        return mask, HoleCatalog(x, y, r)
    return mask


def border_mask(n_pix: int, field_deg: float, width_arcmin: float) -> np.ndarray:
    """Mask a border: pixels whose centre is closer than ``width_arcmin`` to a field edge.

    Parameters
    ----------
    n_pix, field_deg : map side in pixels and degrees.
    width_arcmin : border width in arcmin (0 for none).

    Returns
    -------
    numpy.ndarray
        ``(P, P)`` bool mask, True = valid.
    """
    _check_field(n_pix, field_deg)
    if not width_arcmin >= 0:
        raise RaytraceError(f"survey.mask.border_arcmin: must be >= 0, got {width_arcmin!r}")
    d = 60.0 * field_deg / n_pix
    c = (np.arange(n_pix) + 0.5) * d
    ok = (c >= width_arcmin) & (60.0 * field_deg - c >= width_arcmin)
    return ok[:, None] & ok[None, :]


def stripe_mask(n_pix: int, field_deg: float, *, width_arcmin: float, spacing_arcmin: float,
                angle_deg: float = 0.0, offset_arcmin: float = 0.0) -> np.ndarray:
    r"""Mask parallel stripes (chip gaps, missing scan lines).

    Parameters
    ----------
    n_pix, field_deg : map side in pixels and degrees.
    width_arcmin : full width of each stripe.
    spacing_arcmin : distance between stripe centre lines.
    angle_deg : angle of the stripes from the :math:`x` axis, counter-clockwise
        towards :math:`y` (0: stripes along :math:`x`).
    offset_arcmin : distance of the first centre line from the field centre, along
        the stripes' normal.

    Returns
    -------
    numpy.ndarray
        ``(P, P)`` bool mask, True = valid: a pixel is masked when the distance of its
        centre to the nearest centre line is below ``width_arcmin / 2``. The expected
        valid fraction is :math:`1 - w/s` for :math:`w < s`.
    """
    _check_field(n_pix, field_deg)
    if not (spacing_arcmin > 0 and width_arcmin >= 0):
        raise RaytraceError(f"survey.mask.stripes: need spacing_arcmin > 0 and width_arcmin >= 0, got {spacing_arcmin!r}, {width_arcmin!r}")
    c = np.rad2deg(pixel_centres_rad(n_pix, field_deg)) * 60.0
    a = np.deg2rad(angle_deg)
    # signed distance along the normal (-sin a, cos a)
    u = -np.sin(a) * c[None, :] + np.cos(a) * c[:, None] - offset_arcmin
    dist = np.abs(u - spacing_arcmin * np.round(u / spacing_arcmin))
    return dist >= 0.5 * width_arcmin


def load_user_mask(path: str | os.PathLike, n_pix: int, *, key: str = "survey.mask.file",
                   hdu: int | str = 0) -> np.ndarray:
    """Read a user mask from a ``.npy`` or FITS file.

    Parameters
    ----------
    path : path-like
        ``.npy`` (numpy) or ``.fits``/``.fit``/``.fts`` (optionally ``.gz``) image; the
        array is indexed like the maps (axis 0 = y, axis 1 = x; FITS NAXIS1 = x).
    n_pix : int
        Expected map side.
    key : str
        Configuration key, named in error messages.
    hdu : int or str
        FITS extension holding the image (the first one with data if 0 is empty).

    Returns
    -------
    numpy.ndarray
        ``(P, P)`` bool mask, True where the value is finite and non-zero.

    Raises
    ------
    RaytraceError
        Missing or unreadable file, unknown extension, or a shape other than (P, P).
    """
    p = Path(path)
    if not p.exists():
        raise RaytraceError(f"{key}: {p} does not exist")
    name = p.name.lower()
    try:
        if name.endswith(".npy"):
            data = np.load(p, allow_pickle=False)
        elif name.endswith((".fits", ".fit", ".fts", ".fits.gz", ".fit.gz", ".fts.gz")):
            from astropy.io import fits

            with fits.open(p, memmap=False) as hdul:
                data = hdul[hdu].data
                if data is None and hdu == 0:
                    data = next((h.data for h in hdul if h.data is not None), None)
                if data is None:
                    raise RaytraceError(f"{key}: {p} has no image data")
                data = np.array(data)
        else:
            raise RaytraceError(f"{key}: {p} must be a .npy or FITS (.fits) file")
    except RaytraceError:
        raise
    except Exception as exc:  # numpy / astropy raise various types on broken files
        raise RaytraceError(f"{key}: {p} is not a readable mask ({exc})") from None
    if data.shape != (n_pix, n_pix):
        raise RaytraceError(f"{key}: {p} has shape {tuple(data.shape)}, maps are ({n_pix}, {n_pix})")
    if data.dtype == np.bool_:
        return data.copy()
    if not np.issubdtype(data.dtype, np.number):
        raise RaytraceError(f"{key}: {p} holds non-numeric data of type {data.dtype}")
    return np.isfinite(data) & (data != 0)


def build_mask(settings: Mapping[str, Any] | None, n_pix: int, field_deg: float, *, seed: int = 0,
               base_dir: str | os.PathLike | None = None) -> tuple[np.ndarray, dict[str, float]]:
    """Combine the masks configured under ``survey.mask``.

    Parameters
    ----------
    settings : mapping or None
        ``survey.mask`` section: ``file`` (path or null), ``border_arcmin``, ``holes``
        (``per_deg2``, ``r_min_arcmin``, ``r_max_arcmin``, ``slope``) and ``stripes``
        (``width_arcmin``, ``spacing_arcmin``, ``angle_deg``, ``offset_arcmin``).
    n_pix, field_deg : map geometry.
    seed : survey seed (holes).
    base_dir : directory that relative ``file`` paths are taken from.

    Returns
    -------
    mask : (P, P) bool, True = valid.
    fractions : dict
        Valid fraction of each component and ``"total"`` for the combination.
    """
    s = dict(settings or {})
    known = {"file", "border_arcmin", "holes", "stripes"}
    unknown = set(s) - known
    if unknown:
        raise RaytraceError(f"survey.mask.{sorted(unknown)[0]}: unknown key, expected one of {sorted(known)}")
    mask = np.ones((n_pix, n_pix), dtype=bool)
    fractions: dict[str, float] = {}
    if s.get("file"):
        path = Path(s["file"])
        if base_dir is not None and not path.is_absolute():
            path = Path(base_dir) / path
        m = load_user_mask(path, n_pix)
        fractions["file"] = valid_fraction(m)
        mask &= m
    if s.get("border_arcmin"):
        m = border_mask(n_pix, field_deg, float(s["border_arcmin"]))
        fractions["border"] = valid_fraction(m)
        mask &= m
    if s.get("holes"):
        h = dict(s["holes"])
        try:
            m = star_mask(n_pix, field_deg, holes_per_deg2=float(h["per_deg2"]),
                          r_min_arcmin=float(h["r_min_arcmin"]), r_max_arcmin=float(h["r_max_arcmin"]),
                          slope=float(h.get("slope", 3.0)), seed=seed)
        except KeyError as exc:
            raise RaytraceError(f"survey.mask.holes.{exc.args[0]}: required key missing") from None
        fractions["holes"] = valid_fraction(m)
        mask &= m
    if s.get("stripes"):
        st = dict(s["stripes"])
        try:
            m = stripe_mask(n_pix, field_deg, width_arcmin=float(st["width_arcmin"]),
                            spacing_arcmin=float(st["spacing_arcmin"]), angle_deg=float(st.get("angle_deg", 0.0)),
                            offset_arcmin=float(st.get("offset_arcmin", 0.0)))
        except KeyError as exc:
            raise RaytraceError(f"survey.mask.stripes.{exc.args[0]}: required key missing") from None
        fractions["stripes"] = valid_fraction(m)
        mask &= m
    fractions["total"] = valid_fraction(mask)
    if fractions["total"] == 0.0:
        warnings.warn("survey.mask: no valid pixel is left in the combined mask", stacklevel=2)
    return mask, fractions


# ---------------------------------------------------------------------------
# Smoothing
# ---------------------------------------------------------------------------


def gaussian_fwhm(sigma: float) -> float:
    r"""Full width at half maximum of a Gaussian of standard deviation ``sigma``:
    :math:`{\rm FWHM} = 2\sqrt{2\ln 2}\,\sigma \approx 2.3548\,\sigma` (same unit)."""
    return 2.0 * math.sqrt(2.0 * math.log(2.0)) * sigma


def gaussian_sigma_from_fwhm(fwhm: float) -> float:
    r"""Standard deviation of a Gaussian of given FWHM, :math:`\sigma = {\rm FWHM}/(2\sqrt{2\ln 2})`."""
    return fwhm / (2.0 * math.sqrt(2.0 * math.log(2.0)))


@numba.njit(cache=True)
def _apply_separable(f, wy, wx, out):
    """out[i, j] = f[i, j] * wy[i] * wx[j] (one pass, no temporaries)."""
    ny, nx = f.shape
    for i in range(ny):
        a = wy[i]
        for j in range(nx):
            out[i, j] = f[i, j] * (a * wx[j])


def _gaussian_factors(scale_rad: float, n_pix: int, pixel_rad: float) -> tuple[np.ndarray, np.ndarray]:
    """1-d factors of the separable Gaussian transform exp(-(ly^2 + lx^2) sigma^2 / 2)."""
    ly, lx = _ell_axes(n_pix, pixel_rad)
    return np.exp(-0.5 * (ly * scale_rad) ** 2), np.exp(-0.5 * (lx * scale_rad) ** 2)


#: Gaussian-kernel columns with exp(-lx^2 sigma^2/2) below this are dropped before the
#: inverse transform; their contribution is 1e-20 of the largest mode's, far below
#: double-precision round-off.
_PRUNE_BELOW = 1e-20


def _smooth_spectrum(f: np.ndarray, kernel: str, scale_rad: float, n_pix: int, pixel_rad: float,
                     workers: int | None) -> np.ndarray:
    """Inverse rfft2 of spectrum ``f`` times the kernel transform, as a real (P, P) map.

    For the Gaussian, columns of the half-plane where the kernel has underflowed are
    skipped: the axis-0 inverse runs on the kept columns only and the axis-1 c2r
    transform zero-pads the rest, identical to ``irfft2`` of the full product.
    """
    if kernel == "gaussian":
        wy, wx = _gaussian_factors(scale_rad, n_pix, pixel_rad)
        kc = max(int(np.count_nonzero(wx >= _PRUNE_BELOW)), 1)  # wx decreases with column
        g = np.empty((n_pix, kc), dtype=np.result_type(f.dtype, np.complex64))
        _apply_separable(f[:, :kc], wy, wx[:kc], g)
        h = scipy.fft.ifft(g, axis=0, workers=workers, overwrite_x=True)
        return scipy.fft.irfft(h, n=n_pix, axis=1, workers=workers, overwrite_x=True)
    w = kernel_fourier(kernel, scale_rad, n_pix, pixel_rad)
    return scipy.fft.irfft2(f * w, s=(n_pix, n_pix), workers=workers)


def _ell_axes(n_pix: int, pixel_rad: float) -> tuple[np.ndarray, np.ndarray]:
    ly = 2.0 * np.pi * scipy.fft.fftfreq(n_pix, d=pixel_rad)
    lx = 2.0 * np.pi * scipy.fft.rfftfreq(n_pix, d=pixel_rad)
    return ly, lx


def kernel_fourier(kernel: str, scale_rad: float, n_pix: int, pixel_rad: float) -> np.ndarray:
    r"""Fourier transform of a unit-integral smoothing kernel on the ``rfft2`` grid.

    Parameters
    ----------
    kernel : str
        ``"gaussian"``: scale is the standard deviation :math:`\sigma` of
        :math:`W(\theta) = e^{-\theta^2/2\sigma^2}/(2\pi\sigma^2)`, with
        :math:`\tilde W(\ell) = e^{-\ell^2\sigma^2/2}` and
        :math:`{\rm FWHM} = 2\sqrt{2\ln 2}\,\sigma \approx 2.3548\,\sigma`.
        ``"tophat"``: scale is the radius :math:`R` of a disc of unit integral, with
        :math:`\tilde W(\ell) = 2 J_1(\ell R)/(\ell R)`.
    scale_rad : float
        :math:`\sigma` or :math:`R` in radians (0: no smoothing).
    n_pix : int
        Map side.
    pixel_rad : float
        Pixel side in radians.

    Returns
    -------
    numpy.ndarray
        ``(P, P//2 + 1)`` real array.

    References
    ----------
    Bracewell R. N., 2000, The Fourier Transform and its Applications, 3rd ed.
    (Gaussian and circ-function Hankel transforms).
    """
    ly, lx = _ell_axes(n_pix, pixel_rad)
    if kernel == "gaussian":
        # separable: exp(-(ly^2 + lx^2) s^2/2) = outer product of two 1-d factors
        wy, wx = _gaussian_factors(scale_rad, n_pix, pixel_rad)
        return wy[:, None] * wx[None, :]
    if kernel == "tophat":
        x = np.hypot(ly[:, None], lx[None, :]) * scale_rad
        out = np.ones_like(x)
        nz = x > 0
        out[nz] = 2.0 * scipy.special.j1(x[nz]) / x[nz]
        return out
    raise RaytraceError(f"survey.smoothing.kernel: unknown kernel {kernel!r}, expected one of {list(SMOOTHING_KERNELS)}")


def smooth_maps(m: np.ndarray, field_deg: float, scales_arcmin: Sequence[float], *, kernel: str = "gaussian",
                mask: np.ndarray | None = None, min_weight: float = 1e-3, workers: int | None = None) -> np.ndarray:
    r"""Smooth a periodic map at several scales with one forward FFT.

    Parameters
    ----------
    m : (P, P) array
        Map.
    field_deg : float
        Field side in degrees.
    scales_arcmin : sequence of float
        Gaussian standard deviations :math:`\sigma` (not FWHM) or top-hat radii, in
        arcmin (:func:`kernel_fourier`).
    kernel : str
        ``"gaussian"`` or ``"tophat"``.
    mask : (P, P) bool, optional
        If given, mask-aware smoothing by normalised convolution:
        :math:`\kappa_s = W*(M\kappa) / W*M`, which removes the suppression of the
        smoothed field near masked regions.
    min_weight : float
        With a mask, pixels where :math:`W*M <` ``min_weight`` (almost no valid
        pixel within the kernel) are set to 0.
    workers : int, optional
        Threads for ``scipy.fft``.

    Returns
    -------
    numpy.ndarray
        ``(n_scales, P, P)`` smoothed maps. The map is treated as periodic.

    References
    ----------
    Knutsson H., Westin C.-F., 1993, Proc. IEEE CVPR, 515 (normalised convolution).
    """
    m = np.asarray(m)
    if m.ndim != 2 or m.shape[0] != m.shape[1]:
        raise ValueError(f"smooth_maps expects a square map, got shape {m.shape}")
    if kernel not in SMOOTHING_KERNELS:
        raise RaytraceError(f"survey.smoothing.kernel: unknown kernel {kernel!r}, expected one of {list(SMOOTHING_KERNELS)}")
    scales = [float(s) for s in scales_arcmin]
    if any(not (s >= 0 and np.isfinite(s)) for s in scales):
        raise RaytraceError(f"survey.smoothing.scales_arcmin: scales must be non-negative, got {scales}")
    n_pix = m.shape[0]
    pixel_rad = np.deg2rad(field_deg) / n_pix
    if mask is not None:
        if mask.shape != m.shape:
            raise ValueError(f"mask shape {mask.shape} differs from map shape {m.shape}")
        w = mask.astype(m.dtype)
        fm = scipy.fft.rfft2(m * w, workers=workers)
        fw = scipy.fft.rfft2(w, workers=workers)
    else:
        fm = scipy.fft.rfft2(m, workers=workers)
    out = np.empty((len(scales),) + m.shape, dtype=np.result_type(m.dtype, np.float32))
    for k, s in enumerate(scales):
        scale_rad = s / ARCMIN_PER_RAD
        num = _smooth_spectrum(fm, kernel, scale_rad, n_pix, pixel_rad, workers)
        if mask is None:
            out[k] = num
        else:
            den = _smooth_spectrum(fw, kernel, scale_rad, n_pix, pixel_rad, workers)
            good = den >= min_weight
            out[k] = np.where(good, num / np.where(good, den, 1.0), 0.0)
    return out


def smoothed_noise_sigma(sigma_pix: float, n_pix: int, field_deg: float, scale_arcmin: float,
                         kernel: str = "gaussian") -> float:
    r"""rms of white pixel noise after smoothing (exact on the periodic grid).

    Parameters
    ----------
    sigma_pix : per-pixel rms before smoothing.
    n_pix, field_deg : map geometry.
    scale_arcmin : kernel scale (see :func:`kernel_fourier`).
    kernel : kernel name.

    Returns
    -------
    float
        :math:`\sigma_{\rm pix}\,[\sum_{\bf k} \tilde W_{\bf k}^2 / P^2]^{1/2}` (Parseval);
        in the continuum limit for a Gaussian,
        :math:`\sigma_{\rm pix}\,[A_{\rm pix}/(4\pi\sigma^2)]^{1/2}`.
    """
    pixel_rad = np.deg2rad(field_deg) / n_pix
    mult = np.full(n_pix // 2 + 1, 2.0)  # rfft columns standing for two modes
    mult[0] = 1.0
    if n_pix % 2 == 0:
        mult[-1] = 1.0
    if kernel == "gaussian":  # separable sum, O(P)
        wy, wx = _gaussian_factors(scale_arcmin / ARCMIN_PER_RAD, n_pix, pixel_rad)
        total = np.sum(wy**2) * np.sum(wx**2 * mult)
    else:
        w = kernel_fourier(kernel, scale_arcmin / ARCMIN_PER_RAD, n_pix, pixel_rad)
        total = np.sum(w**2 * mult[None, :])
    return float(sigma_pix * np.sqrt(total / n_pix**2))


# ---------------------------------------------------------------------------
# Observing a map from the configuration
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class ObservedMap:
    """A convergence map after noise, mask and smoothing.

    Attributes
    ----------
    noisy : (P, P) map with shape noise, masked pixels set to 0.
    smoothed : (n_scales, P, P) smoothed maps (masked pixels set to 0).
    mask : (P, P) bool, True = valid.
    scales_arcmin : smoothing scales.
    noise_sigma_pix : per-pixel noise rms (0 without noise).
    noise_sigma_smoothed : (n_scales,) noise rms at each smoothing scale.
    """

    noisy: np.ndarray
    smoothed: np.ndarray
    mask: np.ndarray
    scales_arcmin: tuple[float, ...]
    noise_sigma_pix: float
    noise_sigma_smoothed: np.ndarray


def observe_map(kappa: np.ndarray, field_deg: float, settings: Mapping[str, Any], *, mask: np.ndarray | None = None,
                seed: int = 0, realisation: int = 0, bin_index: int = 0,
                galaxies_per_arcmin2: float | None = None, workers: int | None = None) -> ObservedMap:
    """Add shape noise, apply a mask and smooth one convergence map.

    Parameters
    ----------
    kappa : (P, P) noiseless convergence.
    field_deg : field side in degrees.
    settings : ``survey`` section; uses ``noise`` (``enabled``, ``sigma_e``,
        ``galaxies_per_arcmin2``) and ``smoothing`` (``kernel``, ``scales_arcmin``,
        ``mask_aware``).
    mask : (P, P) bool from :func:`build_mask` (None: all valid).
    seed, realisation, bin_index : noise stream (:func:`seed_sequence`).
    galaxies_per_arcmin2 : density of this bin; default ``noise.galaxies_per_arcmin2``
        (the caller multiplies by the bin's fraction for tomography).
    workers : FFT threads.

    Returns
    -------
    ObservedMap
    """
    n_pix = kappa.shape[0]
    if kappa.shape != (n_pix, n_pix):
        raise ValueError(f"observe_map expects a square map, got {kappa.shape}")
    noise = dict(settings.get("noise") or {})
    smooth = dict(settings.get("smoothing") or {})
    sig = 0.0
    if noise.get("enabled", True):
        n_gal = galaxies_per_arcmin2 if galaxies_per_arcmin2 is not None else float(noise.get("galaxies_per_arcmin2", 30.0))
        sig_e = float(noise.get("sigma_e", 0.26))
        sig = pixel_noise_sigma(sig_e, n_gal, pixel_arcmin(n_pix, field_deg))
        out = shape_noise_maps(n_pix, field_deg, sig_e, n_gal, seed=seed, realisation=realisation,
                               bin_index=bin_index, components=("kappa",))["kappa"]
        out += kappa
    else:
        out = np.array(kappa, dtype=np.float64, copy=True)
    if mask is not None:
        if mask.shape != kappa.shape:
            raise RaytraceError(f"survey.mask: mask has shape {mask.shape}, maps are {kappa.shape}")
        out *= mask
    kernel = smooth.get("kernel", "gaussian")
    scales = tuple(float(s) for s in smooth.get("scales_arcmin", ()))
    mask_aware = bool(smooth.get("mask_aware", False))
    if scales:
        sm = smooth_maps(out, field_deg, scales, kernel=kernel, mask=mask if mask_aware else None, workers=workers)
        if mask is not None:
            sm *= mask
    else:
        sm = np.empty((0, n_pix, n_pix))
    sig_s = np.array([smoothed_noise_sigma(sig, n_pix, field_deg, s, kernel) for s in scales])
    return ObservedMap(out, sm, mask if mask is not None else np.ones(kappa.shape, bool), scales, sig, sig_s)


# ---------------------------------------------------------------------------
# Mock shear catalogs
# ---------------------------------------------------------------------------


def reduced_shear(kappa: np.ndarray, gamma1: np.ndarray, gamma2: np.ndarray) -> np.ndarray:
    r"""Complex reduced shear :math:`g = (\gamma_1 + i\gamma_2)/(1 - \kappa)`.

    References
    ----------
    Bartelmann M., Schneider P., 2001, Phys. Rep. 340, 291, sect. 3.2.
    """
    return (np.asarray(gamma1) + 1j * np.asarray(gamma2)) / (1.0 - np.asarray(kappa))


def lens_ellipticity(eps_s: np.ndarray, g: np.ndarray) -> np.ndarray:
    r"""Observed complex ellipticity from the intrinsic one and the reduced shear.

    Parameters
    ----------
    eps_s : complex array
        Intrinsic (source) ellipticity, :math:`|\epsilon^{(s)}| < 1`, with
        :math:`|\epsilon| = (a - b)/(a + b)` for axis ratio :math:`b/a`.
    g : complex array
        Reduced shear.

    Returns
    -------
    numpy.ndarray
        .. math::
            \epsilon = \begin{cases} \dfrac{\epsilon^{(s)} + g}{1 + g^*\epsilon^{(s)}}
            & |g| \le 1 \\[1ex]
            \dfrac{1 + g\,\epsilon^{(s)*}}{\epsilon^{(s)*} + g^*} & |g| > 1
            \end{cases}

    Notes
    -----
    For an isotropic intrinsic distribution :math:`\langle\epsilon\rangle = g` when
    :math:`|g| \le 1` and :math:`1/g^*` otherwise (Seitz & Schneider 1997).

    References
    ----------
    Seitz C., Schneider P., 1997, A&A 318, 687.
    Bartelmann M., Schneider P., 2001, Phys. Rep. 340, 291, sect. 4.2.
    """
    eps_s = np.asarray(eps_s, dtype=complex)
    g = np.asarray(g, dtype=complex)
    weak = np.abs(g) <= 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        e_weak = (eps_s + g) / (1.0 + np.conj(g) * eps_s)
        e_strong = (1.0 + g * np.conj(eps_s)) / (np.conj(eps_s) + np.conj(g))
    return np.where(weak, e_weak, e_strong)


def intrinsic_ellipticities(rng: np.random.Generator, n: int, sigma_e: float) -> np.ndarray:
    r"""Gaussian intrinsic ellipticities, rms ``sigma_e`` per component before truncation.

    Draws with :math:`|\epsilon| \ge 1` (unphysical) are redrawn, which keeps the
    distribution isotropic (probability :math:`e^{-1/2\sigma_e^2}`, 6e-4 for
    :math:`\sigma_e = 0.26`).
    """
    eps = sigma_e * (rng.standard_normal(n) + 1j * rng.standard_normal(n))
    bad = np.flatnonzero(np.abs(eps) >= 1.0)
    while bad.size:
        eps[bad] = sigma_e * (rng.standard_normal(bad.size) + 1j * rng.standard_normal(bad.size))
        bad = bad[np.abs(eps[bad]) >= 1.0]
    return eps


def interpolate_planes(maps: np.ndarray, z_sources: np.ndarray, theta_x: np.ndarray, theta_y: np.ndarray,
                       z: np.ndarray, field_deg: float) -> np.ndarray:
    r"""Bilinear interpolation in angle and linear interpolation in redshift between planes.

    Parameters
    ----------
    maps : (n_sources, P, P) array
        One map per source plane.
    z_sources : (n_sources,) increasing source redshifts.
    theta_x, theta_y : (n,) positions in radians (field centred on 0).
    z : (n,) galaxy redshifts.
    field_deg : field side in degrees.

    Returns
    -------
    numpy.ndarray
        ``(n,)`` interpolated values.

    Notes
    -----
    Positions within half a pixel of the field edge take the edge pixel's value
    (``mode='nearest'``). In redshift the value is linear between the two planes
    bracketing :math:`z`; below the first plane it is linear between 0 at
    :math:`z = 0` (no lensing of sources at the observer) and the first plane; above
    the last plane the last plane's value is used (and :func:`mock_catalog` warns).
    """
    maps = np.asarray(maps)
    zs = np.asarray(z_sources, dtype=float)
    n_src, n_pix = maps.shape[0], maps.shape[-1]
    d = np.deg2rad(field_deg) / n_pix
    half = 0.5 * np.deg2rad(field_deg)
    coords = np.vstack([(theta_y + half) / d - 0.5, (theta_x + half) / d - 0.5])
    zg = np.concatenate([[0.0], zs])  # virtual zero plane at z = 0
    idx = np.clip(np.searchsorted(zg, z, side="right") - 1, 0, n_src)
    upper = np.minimum(idx + 1, n_src)
    with np.errstate(divide="ignore", invalid="ignore"):
        w_up = np.where(upper > idx, (z - zg[idx]) / (zg[upper] - zg[idx]), 1.0)
    w_up = np.clip(w_up, 0.0, 1.0)
    out = np.zeros(len(z))
    for s in range(n_src):  # loop over planes, vectorised over galaxies
        plane = s + 1  # index in zg
        lo_sel = np.flatnonzero(idx == plane)
        up_sel = np.flatnonzero(upper == plane)
        sel = np.union1d(lo_sel, up_sel)
        if sel.size == 0:
            continue
        val = scipy.ndimage.map_coordinates(maps[s], coords[:, sel], order=1, mode="nearest")
        # value = (1 - w) V[idx] + w V[upper]; beyond the last plane idx == upper and w == 1
        weight = np.where(idx[sel] == plane, 1.0 - w_up[sel], 0.0) + np.where(upper[sel] == plane, w_up[sel], 0.0)
        out[sel] += weight * val
    return out


def mock_catalog(kappa: np.ndarray, gamma1: np.ndarray, gamma2: np.ndarray, z_sources: Sequence[float],
                 field_deg: float, z_grid: np.ndarray, nz: np.ndarray, *, galaxies_per_arcmin2: float,
                 sigma_e: float, mask: np.ndarray | None = None, seed: int = 0, realisation: int = 0,
                 bin_index: int = 0, shear_bias: tuple[float, float, float] | None = None,
                 alignment: tuple[np.ndarray, np.ndarray] | None = None) -> dict[str, np.ndarray]:
    r"""Mock shear catalog drawn from ray-traced maps.

    Parameters
    ----------
    kappa, gamma1, gamma2 : (n_sources, P, P) arrays
        Maps on the source planes at ``z_sources``.
    z_sources : (n_sources,) increasing source-plane redshifts.
    field_deg : field side in degrees.
    z_grid, nz : redshift distribution of the catalog's galaxies (any normalisation).
    galaxies_per_arcmin2 : float
        Mean density; the number of galaxies is Poisson with mean density times the
        valid area.
    sigma_e : float
        Intrinsic ellipticity rms per component (:func:`intrinsic_ellipticities`).
    mask : (P, P) bool, optional
        Galaxies are placed uniformly within valid pixels only.
    seed, realisation, bin_index : int
        Random stream (:func:`seed_sequence`, stream ``STREAM_CATALOG``): a given
        realisation has the same positions, redshifts and intrinsic shapes in every
        model.
    shear_bias : (m, c1, c2), optional
        Shear calibration bias: the signal that shears the intrinsic shapes is
        :math:`(1+m)\,s + c_1 + i c_2` (Heymans et al. 2006) instead of :math:`s`.
    alignment : (P, P) maps of the two intrinsic-alignment shear components, optional
        Added to the reduced shear, :math:`s = g + \gamma^I`, read at each galaxy's
        position (bilinear): to first order in the shears an aligned intrinsic shape
        (see :mod:`raytrace.systematics`). Adds the columns ``ia1``, ``ia2``.

    Returns
    -------
    dict of str to numpy.ndarray
        ``theta_x_deg``, ``theta_y_deg`` (map frame, field centre at 0), ``z``,
        ``kappa``, ``gamma1``, ``gamma2``, ``g1``, ``g2`` (reduced shear),
        ``e1_int``, ``e2_int`` (intrinsic) and ``e1``, ``e2`` (observed,
        :func:`lens_ellipticity`). Ellipticity and shear components are in the map
        frame (:math:`\epsilon_1>0` along :math:`x`); in the (east, north) sky frame
        the second components change sign (module notes).

    Notes
    -----
    Map values are interpolated with :func:`interpolate_planes`; the reduced shear
    :math:`g = \gamma/(1-\kappa)` is formed per galaxy from the interpolated fields. The
    biased signal shears the random intrinsic shape exactly (:func:`lens_ellipticity`), so
    the mean observed ellipticity is :math:`(1+m)(g + \gamma^I) + c`: as for the maps, the
    bias acts on the signal and the shape noise is the measured one. The columns ``g1``,
    ``g2`` stay the true reduced shear.

    References
    ----------
    Seitz C., Schneider P., 1997, A&A 318, 687.
    Heymans C. et al., 2006, MNRAS 368, 1323.
    """
    kappa = np.asarray(kappa)
    gamma1 = np.asarray(gamma1)
    gamma2 = np.asarray(gamma2)
    zs = np.asarray(z_sources, dtype=float)
    if kappa.ndim != 3 or kappa.shape != gamma1.shape or kappa.shape != gamma2.shape:
        raise ValueError(f"kappa, gamma1, gamma2 must share one (n_sources, P, P) shape, got {kappa.shape}, {gamma1.shape}, {gamma2.shape}")
    if zs.shape != (kappa.shape[0],) or np.any(np.diff(zs) <= 0) or np.any(zs <= 0):
        raise ValueError(f"z_sources must be {kappa.shape[0]} positive increasing redshifts, got {zs}")
    n_pix = kappa.shape[-1]
    _check_field(n_pix, field_deg)
    if not (galaxies_per_arcmin2 > 0):
        raise RaytraceError(f"survey.catalog.galaxies_per_arcmin2: must be positive, got {galaxies_per_arcmin2!r}")
    if mask is None:
        valid = np.arange(n_pix * n_pix)
    else:
        if mask.shape != (n_pix, n_pix):
            raise RaytraceError(f"survey.mask: mask has shape {mask.shape}, maps are ({n_pix}, {n_pix})")
        valid = np.flatnonzero(mask)
    rng = np.random.default_rng(seed_sequence(seed, STREAM_CATALOG, realisation, bin_index, 0))
    d_arcmin = pixel_arcmin(n_pix, field_deg)
    n_gal = int(rng.poisson(galaxies_per_arcmin2 * valid.size * d_arcmin**2)) if valid.size else 0
    pix = valid[rng.integers(0, valid.size, n_gal)] if n_gal else np.zeros(0, dtype=np.int64)
    i, j = np.divmod(pix, n_pix)
    d = np.deg2rad(field_deg) / n_pix
    half = 0.5 * np.deg2rad(field_deg)
    tx = (j + rng.random(n_gal)) * d - half
    ty = (i + rng.random(n_gal)) * d - half
    z = invert_cdf_linear(np.asarray(z_grid, float), np.asarray(nz, float), rng.random(n_gal))
    eps_s = intrinsic_ellipticities(rng, n_gal, sigma_e)
    if n_gal and z.max() > zs[-1]:
        warnings.warn(
            f"survey.catalog: {np.count_nonzero(z > zs[-1])} galaxies lie beyond the last source plane "
            f"(z = {zs[-1]:g}); they take that plane's values",
            stacklevel=2,
        )
    k = interpolate_planes(kappa, zs, tx, ty, z, field_deg)
    g1s = interpolate_planes(gamma1, zs, tx, ty, z, field_deg)
    g2s = interpolate_planes(gamma2, zs, tx, ty, z, field_deg)
    g = reduced_shear(k, g1s, g2s)
    signal = g
    extra = {}
    if alignment is not None:
        coords = np.vstack([(ty + half) / d - 0.5, (tx + half) / d - 0.5])
        ia1, ia2 = (scipy.ndimage.map_coordinates(np.asarray(a, dtype=float), coords, order=1, mode="nearest")
                    for a in alignment)
        signal = signal + (ia1 + 1j * ia2)
        extra = {"ia1": ia1, "ia2": ia2}
    if shear_bias is not None:
        m, c1, c2 = (float(v) for v in shear_bias)
        signal = (1.0 + m) * signal + (c1 + 1j * c2)
    eps = lens_ellipticity(eps_s, signal)
    return {
        "theta_x_deg": np.rad2deg(tx), "theta_y_deg": np.rad2deg(ty), "z": z,
        "kappa": k, "gamma1": g1s, "gamma2": g2s, "g1": g.real, "g2": g.imag,
        "e1_int": eps_s.real, "e2_int": eps_s.imag, "e1": eps.real, "e2": eps.imag, **extra,
    }


_CATALOG_UNITS = {"theta_x_deg": "deg", "theta_y_deg": "deg", "ra_deg": "deg", "dec_deg": "deg"}


def write_catalog_hdf5(path: str | os.PathLike, catalog: Mapping[str, np.ndarray], *,
                       settings: Mapping[str, Any] | None = None, inputs: Sequence[str | os.PathLike] = (),
                       seed: int | None = None, group: str = "catalog") -> None:
    """Write a catalog atomically to HDF5 (one dataset per column, with units).

    Parameters
    ----------
    path : output file.
    catalog : column name to 1-d array (equal lengths).
    settings, inputs, seed : provenance (:func:`raytrace.hdf5.atomic_h5`).
    group : group holding the columns.
    """
    n = _check_catalog(catalog)
    with atomic_h5(path, stage="catalog", settings=settings, inputs=inputs, seed=seed) as f:
        g = f.create_group(group)
        g.attrs["n_galaxies"] = n
        g.attrs["shear_frame"] = "map (x, y): e1 > 0 along x; e2 flips sign in the (east, north) sky frame"
        for name, col in catalog.items():
            write_dataset(g, name, np.asarray(col), _CATALOG_UNITS.get(name, "1"))


def write_catalog_fits(path: str | os.PathLike, catalog: Mapping[str, np.ndarray], *,
                       header: Mapping[str, Any] | None = None) -> None:
    """Write a catalog as a FITS binary table, via a temporary file renamed on success.

    Parameters
    ----------
    path : output file.
    catalog : column name to 1-d array (equal lengths); float columns are written
        as ``D`` (float64), integer columns as ``K`` (int64).
    header : extra keywords for the table header (8-character names).
    """
    from astropy.io import fits

    _check_catalog(catalog)
    cols = []
    for name, col in catalog.items():
        a = np.asarray(col)
        fmt = "K" if np.issubdtype(a.dtype, np.integer) else "D"
        cols.append(fits.Column(name=name, format=fmt, unit=_CATALOG_UNITS.get(name), array=a))
    hdu = fits.BinTableHDU.from_columns(cols, name="CATALOG")
    hdu.header["SHFRAME"] = ("MAP", "e1>0 along map x; e2 flips in E-N sky frame")
    for k, v in (header or {}).items():
        hdu.header[k] = v
    with atomic_file(path) as tmp:
        fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(tmp)


def _check_catalog(catalog: Mapping[str, np.ndarray]) -> int:
    lengths = {name: np.asarray(c).shape for name, c in catalog.items()}
    shapes = set(lengths.values())
    if len(shapes) != 1 or len(next(iter(shapes))) != 1:
        raise ValueError(f"catalog columns must be 1-d and of equal length, got {lengths}")
    return next(iter(shapes))[0]


# ---------------------------------------------------------------------------
# Sky coordinates and FITS maps
# ---------------------------------------------------------------------------


def map_to_sky(theta_x: np.ndarray, theta_y: np.ndarray, ra0_deg: float, dec0_deg: float) -> tuple[np.ndarray, np.ndarray]:
    r"""Right ascension and declination of map positions (inverse gnomonic projection).

    Parameters
    ----------
    theta_x, theta_y : array_like
        Map coordinates in radians, taken as tangent-plane coordinates with
        :math:`\xi = -\theta_x` (east) and :math:`\eta = \theta_y` (north).
    ra0_deg, dec0_deg : float
        Tangent point (field centre).

    Returns
    -------
    ra_deg, dec_deg : numpy.ndarray
        With :math:`\rho = \sqrt{\xi^2+\eta^2}`, :math:`c = \arctan\rho`:
        :math:`\delta = \arcsin(\cos c\sin\delta_0 + \eta\sin c\cos\delta_0/\rho)`,
        :math:`\alpha = \alpha_0 + \operatorname{atan2}(\xi\sin c,\ \rho\cos\delta_0\cos c
        - \eta\sin\delta_0\sin c)`.

    References
    ----------
    Snyder J. P., 1987, Map Projections - A Working Manual, USGS PP 1395, p. 164.
    Calabretta M. R., Greisen E. W., 2002, A&A 395, 1077 (TAN).
    """
    xi = -np.asarray(theta_x, dtype=float)
    eta = np.asarray(theta_y, dtype=float)
    a0, d0 = np.deg2rad(ra0_deg), np.deg2rad(dec0_deg)
    rho = np.hypot(xi, eta)
    c = np.arctan(rho)
    sc, cc = np.sin(c), np.cos(c)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(rho > 0, eta * sc / rho, 0.0)
    dec = np.arcsin(np.clip(cc * np.sin(d0) + ratio * np.cos(d0), -1.0, 1.0))
    ra = a0 + np.arctan2(xi * sc, rho * np.cos(d0) * cc - eta * np.sin(d0) * sc)
    return np.mod(np.rad2deg(ra), 360.0), np.rad2deg(dec)


def map_wcs_header(n_pix: int, field_deg: float, ra_deg: float = 0.0, dec_deg: float = 0.0) -> dict[str, Any]:
    r"""FITS WCS keywords of a map in the gnomonic (TAN) projection.

    Parameters
    ----------
    n_pix, field_deg : map geometry.
    ra_deg, dec_deg : sky position of the field centre (tangent point).

    Returns
    -------
    dict
        ``CTYPE1 = 'RA---TAN'``, ``CTYPE2 = 'DEC--TAN'``, ``CRPIX1 = CRPIX2 = P/2 + 1/2``
        (the field centre, in 1-based FITS pixels), ``CDELT1 = -d``, ``CDELT2 = +d``
        (degrees), ``CRVAL = (ra, dec)``.

    Notes
    -----
    Array axis 1 (:math:`x`, columns) is FITS axis 1 and runs towards decreasing RA
    (RA increases to the left in the usual display); array axis 0 (:math:`y`, rows)
    is FITS axis 2 and runs towards increasing Dec. The intermediate world
    coordinates are :math:`(-\theta_x, \theta_y)` in degrees, i.e. the tangent-plane
    coordinates of :func:`map_to_sky`.

    References
    ----------
    Calabretta M. R., Greisen E. W., 2002, A&A 395, 1077.
    Greisen E. W., Calabretta M. R., 2002, A&A 395, 1061.
    """
    if not (-90.0 <= dec_deg <= 90.0):
        raise RaytraceError(f"survey.fits.dec_deg: must lie in [-90, 90], got {dec_deg!r}")
    d = field_deg / n_pix
    return {
        "WCSAXES": 2, "CTYPE1": "RA---TAN", "CTYPE2": "DEC--TAN",
        "CRPIX1": 0.5 * n_pix + 0.5, "CRPIX2": 0.5 * n_pix + 0.5,
        "CRVAL1": float(ra_deg) % 360.0, "CRVAL2": float(dec_deg),
        "CDELT1": -d, "CDELT2": d, "CUNIT1": "deg", "CUNIT2": "deg",
        "RADESYS": "ICRS", "EQUINOX": 2000.0,
    }


def write_convergence_fits(path: str | os.PathLike, kappa: np.ndarray, field_deg: float, *,
                           ra_deg: float = 0.0, dec_deg: float = 0.0, z_source: float | None = None,
                           header: Mapping[str, Any] | None = None, overwrite: bool = True,
                           labels: Sequence[str] | None = None) -> None:
    """Write convergence maps as FITS images with a TAN WCS, atomically.

    Parameters
    ----------
    path : output file.
    kappa : (P, P) map, written as the primary image; or (n, P, P) maps, written as
        image extensions named by ``labels`` (``z_source`` may then be a sequence,
        None entries for bins). Stored as is, so FITS NAXIS1 is the map's x axis.
    field_deg : field side in degrees.
    ra_deg, dec_deg : field centre on the sky (:func:`map_wcs_header`).
    z_source : source redshift, stored as ``ZSOURCE``.
    header : extra keywords.
    overwrite : replace an existing file.
    labels : EXTNAME of each map of a stack.
    """
    from astropy.io import fits

    kappa = np.asarray(kappa)
    stack = kappa.ndim == 3
    maps = kappa if stack else kappa[None]
    if maps.ndim != 3 or maps.shape[1] != maps.shape[2]:
        raise ValueError(f"write_convergence_fits expects square maps, got {kappa.shape}")
    if Path(path).exists() and not overwrite:
        raise RaytraceError(f"{path}: output exists and overwrite is off")
    labels = list(labels) if labels is not None else [f"MAP{i}" for i in range(len(maps))]

    def image(hdu, i):
        for k, v in map_wcs_header(maps.shape[1], field_deg, ra_deg, dec_deg).items():
            hdu.header[k] = v
        hdu.header["BUNIT"] = ("", "convergence (dimensionless)")
        hdu.header["FIELDDEG"] = (float(field_deg), "field side in degrees")
        zs = z_source[i] if isinstance(z_source, (list, tuple, np.ndarray)) else z_source
        if zs is not None:
            hdu.header["ZSOURCE"] = (float(zs), "source redshift")
        for k, v in (header or {}).items():
            hdu.header[k] = v
        return hdu

    if stack:
        # one image extension per map, named by its label; an empty primary HDU
        hdus = [fits.PrimaryHDU()] + [image(fits.ImageHDU(data=m, name=labels[i]), i) for i, m in enumerate(maps)]
        out = fits.HDUList(hdus)
    else:
        out = image(fits.PrimaryHDU(data=maps[0]), 0)
    with atomic_file(path) as tmp:
        out.writeto(tmp)


# ---------------------------------------------------------------------------
# Validity warnings
# ---------------------------------------------------------------------------


def check_flat_sky(field_deg: float, max_field_deg: float = FLAT_SKY_MAX_FIELD_DEG) -> bool:
    r"""Warn when the field is too wide for the flat-sky (small-angle) approximation.

    Parameters
    ----------
    field_deg : field side in degrees.
    max_field_deg : threshold, default 10 deg.

    Returns
    -------
    bool
        True when within the threshold.

    Notes
    -----
    At the field corner (half-diagonal :math:`\theta = F/\sqrt2`) the gnomonic
    distance exceeds the angle by :math:`\tan\theta/\theta - 1 \approx \theta^2/3`,
    0.5 % for :math:`F = 10^\circ` (common practice to stay below ~10 deg).
    """
    if field_deg > max_field_deg:
        theta = np.deg2rad(field_deg) / np.sqrt(2.0)
        warnings.warn(
            f"maps.field_deg: {field_deg:g} deg exceeds {max_field_deg:g} deg; the flat-sky approximation "
            f"distorts corner distances by {100 * (np.tan(theta) / theta - 1):.2g} %",
            stacklevel=2,
        )
        return False
    return True


def check_box_repetition(field_deg: float, chi_max: float, box_size: float) -> bool:
    """Warn when the field at the farthest plane is wider than the simulation box.

    Parameters
    ----------
    field_deg : field side in degrees.
    chi_max : comoving distance of the farthest lens plane (same unit as ``box_size``).
    box_size : simulation box side.

    Returns
    -------
    bool
        True when ``field_rad * chi_max <= box_size``; otherwise the transverse
        extent of the light cone exceeds the box and the same structures appear
        repeatedly across the map.
    """
    width = np.deg2rad(field_deg) * chi_max
    if width > box_size:
        warnings.warn(
            f"maps.field_deg: the field spans {width:.4g} at the farthest plane (chi = {chi_max:.4g}), wider than "
            f"the box ({box_size:.4g}); structures repeat across the map",
            stacklevel=2,
        )
        return False
    return True
