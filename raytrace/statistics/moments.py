"""Spectral derivatives of convergence maps, the analysis region away from mask edges, and
the one-point moments of the field and its derivatives (variances, skewness, kurtosis and
the generalised skewness and kurtosis parameters of the perturbative Minkowski-functional
expansion).

Derivative settings (read by :func:`derivative_settings`, used by ``moments`` and
``minkowski``):

``margin_arcmin``
    pixels closer than this to a masked pixel (and, unless ``periodic``, to the map
    border) are left out. Default: twice the smoothing scale, at least 3 pixels.
``periodic``
    treat the map as periodic (default false: ray-traced maps are not).
"""

from __future__ import annotations

from typing import Any, Mapping

import numba
import numpy as np
import scipy.fft
import scipy.ndimage

from ..errors import RaytraceError
from . import MapSet, Measurement, Statistic, register
from .pdf import FAST_FLAGS, MAPSET_CACHE, bin_labels, cached_runs, finite_float, flag, row_runs

#: minimum margin in pixels kept between used pixels and mask edges
MIN_MARGIN_PIX = 3.0


# --------------------------------------------------------------------------------------
# derivatives
# --------------------------------------------------------------------------------------
def _wavenumbers(n_pix: int, pixel_rad: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Angular wavenumbers (rad^-1) along y (full) and x (half), and their copies with the
    Nyquist entry zeroed for odd-order derivatives (common practice: the Nyquist mode of a
    real field has no well-defined sign, so its odd derivative is set to zero)."""
    ky = (2.0 * np.pi * scipy.fft.fftfreq(n_pix, d=pixel_rad)).astype(np.float32)
    kx = (2.0 * np.pi * scipy.fft.rfftfreq(n_pix, d=pixel_rad)).astype(np.float32)
    ky_odd, kx_odd = ky.copy(), kx.copy()
    if n_pix % 2 == 0:
        ky_odd[n_pix // 2] = 0.0
        kx_odd[-1] = 0.0
    return ky, kx, ky_odd, kx_odd


def spectral_derivatives(field: np.ndarray, pixel_rad: float, workers: int | None = None) -> dict[str, np.ndarray]:
    r"""First and second angular derivatives of a square map by Fourier differentiation.

    Parameters
    ----------
    field : (P, P) real map, periodic (fill masked pixels before calling). Axis 0 is y,
        axis 1 is x.
    pixel_rad : pixel side in radians.
    workers : threads for ``scipy.fft``; None (default) takes the caller's
        ``scipy.fft.set_workers`` context (one thread unless set).

    Returns
    -------
    dict with float32 (P, P) arrays ``"x"``, ``"y"``, ``"xx"``, ``"yy"``, ``"xy"``: the
    derivatives :math:`\partial_x\kappa`, ..., in rad^-1 and rad^-2.

    Notes
    -----
    :math:`\widetilde{\partial_a\kappa} = i\ell_a\tilde\kappa` and
    :math:`\widetilde{\partial_a\partial_b\kappa} = -\ell_a\ell_b\tilde\kappa`, with the
    Nyquist entry of odd derivatives zeroed (common practice). The transform is split into
    its two axes: with :math:`G=\mathcal F_x\kappa` (transform along x only),
    :math:`\partial_x^n\kappa=\mathcal F_x^{-1}[(i\ell_x)^nG]` needs no y-transform;
    :math:`G_y=\mathcal F_y^{-1}[i\ell_y\mathcal F_yG]` and
    :math:`G_{yy}=\mathcal F_y^{-1}[-\ell_y^2\mathcal F_yG]` give
    :math:`\partial_y\kappa`, :math:`\partial_x\partial_y\kappa` and
    :math:`\partial_y^2\kappa` by inverse x-transforms. In all: one forward 2-D transform,
    two inverse y-transforms and five inverse x-transforms. Transforms run in single
    precision; statistics built on them accumulate in double precision.
    """
    n_pix = field.shape[-1]
    ky, kx, ky_odd, kx_odd = _wavenumbers(n_pix, pixel_rad)
    g = scipy.fft.rfft(np.asarray(field, dtype=np.float32), axis=1, workers=workers)  # (P, P/2+1)
    full = scipy.fft.fft(g, axis=0, workers=workers)
    iky = (1j * ky_odd).astype(np.complex64)[:, None]
    ikx = (1j * kx_odd).astype(np.complex64)[None, :]
    kx2 = (-(kx**2))[None, :]
    ky2 = (-(ky**2))[:, None]
    buf = np.empty_like(g)
    out: dict[str, np.ndarray] = {}

    def back_x(spec: np.ndarray, factor: np.ndarray | None) -> np.ndarray:
        # the product goes to a scratch buffer that the inverse transform may overwrite
        if factor is None:  # ``spec`` itself is scratch
            return scipy.fft.irfft(spec, n=n_pix, axis=1, workers=workers, overwrite_x=True)
        np.multiply(spec, factor, out=buf)
        return scipy.fft.irfft(buf, n=n_pix, axis=1, workers=workers, overwrite_x=True)

    out["x"] = back_x(g, ikx)
    out["xx"] = back_x(g, kx2)
    np.multiply(full, ky2, out=buf)
    g_yy = scipy.fft.ifft(buf, axis=0, workers=workers)
    np.multiply(full, iky, out=full)
    g_y = scipy.fft.ifft(full, axis=0, workers=workers, overwrite_x=True)
    del full
    out["yy"] = back_x(g_yy, None)
    out["xy"] = back_x(g_y, ikx)
    out["y"] = back_x(g_y, None)
    return {k: out[k].astype(np.float32, copy=False) for k in ("x", "y", "xx", "yy", "xy")}


# --------------------------------------------------------------------------------------
# analysis region
# --------------------------------------------------------------------------------------
def derivative_settings(settings: Mapping[str, Any], stat: str, mapset: MapSet) -> tuple[float, bool]:
    """Margin in pixels and periodicity from ``margin_arcmin`` and ``periodic``."""
    margin = finite_float(settings, "margin_arcmin", None, stat)
    if margin is None:
        margin_pix = max(MIN_MARGIN_PIX, 2.0 * float(mapset.smoothing_arcmin) / float(mapset.pixel_arcmin))
    else:
        if margin < 0:
            raise RaytraceError(f"statistics.{stat}.margin_arcmin: must be non-negative")
        margin_pix = margin / float(mapset.pixel_arcmin)
    return margin_pix, flag(settings, "periodic", False, stat)


def analysis_mask(mask: np.ndarray, margin_pix: float, periodic: bool) -> np.ndarray:
    """Valid pixels farther than ``margin_pix`` pixels from every masked pixel.

    Parameters
    ----------
    mask : (P, P) bool, True where valid.
    margin_pix : distance in pixels (Euclidean, centre to centre).
    periodic : if False, the region outside the map counts as masked too.

    Returns
    -------
    (P, P) bool array of the pixels to use.

    Notes
    -----
    A pixel is kept if the Euclidean distance to the nearest masked pixel exceeds the
    margin (exact Euclidean distance transform, ``scipy.ndimage.distance_transform_edt``).
    Spectral derivatives of a zero- or
    mean-filled masked map ring near the mask boundary; the margin removes the worst of it.
    """
    mask = np.asarray(mask, dtype=bool)
    if mask.all():
        use = np.ones_like(mask)
        if not periodic:
            # distance from pixel i to the outside pixel -1 is i + 1
            w = int(np.floor(margin_pix))
            if w > 0:
                use[:w, :] = use[-w:, :] = False
                use[:, :w] = use[:, -w:] = False
        return use
    if not mask.any():
        return mask.copy()
    pad = int(np.ceil(margin_pix)) + 1
    if periodic:
        padded = np.pad(mask, pad, mode="wrap")
    else:
        padded = np.pad(mask, pad, mode="constant", constant_values=False)
    dist = scipy.ndimage.distance_transform_edt(padded)[pad:-pad, pad:-pad]
    return dist > margin_pix


# --------------------------------------------------------------------------------------
# derived arrays shared between statistics through the per-MapSet cache
# --------------------------------------------------------------------------------------
def map_derivatives(mapset: MapSet, index: int) -> dict[str, np.ndarray]:
    """:func:`spectral_derivatives` of map ``index`` with masked pixels set to the mean of
    the valid ones (so the filled region adds no step of its own); cached per MapSet."""

    def compute():
        field = np.asarray(mapset.maps[index], dtype=np.float64)
        mask = np.asarray(mapset.mask, dtype=bool)
        if not mask.all():
            fill = float(field[mask].mean()) if mask.any() else 0.0
            field = np.where(mask, field, fill)
        return spectral_derivatives(field, mapset.pixel_rad)

    return MAPSET_CACHE.get(mapset, ("derivatives", index), compute)


def map_analysis_mask(mapset: MapSet, margin_pix: float, periodic: bool) -> np.ndarray:
    """:func:`analysis_mask` of ``mapset.mask``, cached per MapSet."""
    return MAPSET_CACHE.get(
        mapset, ("mask", float(margin_pix), bool(periodic)), lambda: analysis_mask(mapset.mask, margin_pix, periodic)
    )


# --------------------------------------------------------------------------------------
# moments
# --------------------------------------------------------------------------------------
#: order of the entries returned by :class:`Moments` (per source bin)
MOMENT_NAMES = (
    "sigma0_sq",
    "sigma1_sq",
    "sigma2_sq",
    "skewness",
    "kurtosis",
    "S0",
    "S1",
    "S2",
    "K0",
    "K1",
    "K2",
    "K3",
)

_N_SUMS = 17


@numba.njit(cache=True, fastmath=FAST_FLAGS)
def _moment_sums(k, kx, ky, lap, runs):
    """Means of the centred products needed by :func:`moments_from_sums`."""
    n = 0.0
    c1 = c2 = c3 = c4 = 0.0
    for r in range(runs.shape[0]):
        i = runs[r, 0]
        for j in range(runs[r, 1], runs[r, 2]):
            c1 += k[i, j]
            c2 += kx[i, j]
            c3 += ky[i, j]
            c4 += lap[i, j]
        n += runs[r, 2] - runs[r, 1]
    s = np.zeros(_N_SUMS)
    if n == 0.0:
        return s, n
    m0, m1, m2, m3 = c1 / n, c2 / n, c3 / n, c4 / n
    t0 = 0.0
    t1 = 0.0
    t2 = 0.0
    t3 = 0.0
    t4 = 0.0
    t5 = 0.0
    t6 = 0.0
    t7 = 0.0
    t8 = 0.0
    t9 = 0.0
    t10 = 0.0
    t11 = 0.0
    t12 = 0.0
    t13 = 0.0
    t14 = 0.0
    t15 = 0.0
    t16 = 0.0
    for r in range(runs.shape[0]):
        i = runs[r, 0]
        for j in range(runs[r, 1], runs[r, 2]):
            a = k[i, j] - m0
            gx = kx[i, j] - m1
            gy = ky[i, j] - m2
            lp = lap[i, j] - m3
            g2 = gx * gx + gy * gy
            a2 = a * a
            t0 += a2
            t1 += a2 * a
            t2 += a2 * a2
            t3 += gx * gx
            t4 += gy * gy
            t5 += gx * gy
            t6 += a * gx
            t7 += a * gy
            t8 += gx * lp
            t9 += gy * lp
            t10 += lp * lp
            t11 += a * lp
            t12 += a2 * lp
            t13 += g2 * lp
            t14 += a2 * a * lp
            t15 += a * g2 * lp
            t16 += g2 * g2
    out = np.array([t0, t1, t2, t3, t4, t5, t6, t7, t8, t9, t10, t11, t12, t13, t14, t15, t16])
    return out / n, n


def moments_from_sums(s: np.ndarray) -> np.ndarray:
    """The values of :data:`MOMENT_NAMES` from the centred means of :func:`_moment_sums`."""
    k2, k3, k4, xx, yy, xy, kgx, kgy, gxl, gyl, l2, kl, k2l, g2l, k3l, kg2l, g4 = s
    s0 = k2
    s1 = xx + yy
    with np.errstate(divide="ignore", invalid="ignore"):
        skew = k3 / s0**1.5
        kurt = k4 / s0**2 - 3.0
        S0 = k3 / s0**2
        S1 = -0.75 * k2l / (s0 * s1)
        S2 = -3.0 * g2l / s1**2
        c4_0 = k4 - 3.0 * k2**2
        c4_1 = k3l - 3.0 * k2 * kl
        c4_2 = kg2l - kl * s1 - 2.0 * (kgx * gxl + kgy * gyl)
        c4_3 = g4 - s1**2 - 2.0 * (xx**2 + yy**2 + 2.0 * xy**2)
        K0 = c4_0 / s0**3
        K1 = c4_1 / (s0**2 * s1)
        K2 = c4_2 / (s0 * s1**2)
        K3 = c4_3 / s1**2
    return np.array([s0, s1, l2, skew, kurt, S0, S1, S2, K0, K1, K2, K3])


def field_moments(
    kappa: np.ndarray,
    kx: np.ndarray,
    ky: np.ndarray,
    lap: np.ndarray,
    use: np.ndarray,
    runs: np.ndarray | None = None,
) -> tuple[np.ndarray, int]:
    r"""One-point moments of a field and its derivatives over the pixels ``use``.

    Parameters
    ----------
    kappa : (P, P) field.
    kx, ky, lap : (P, P) its x and y derivatives and Laplacian (rad^-1, rad^-2).
    use : (P, P) bool, pixels to average over.
    runs : optional :func:`.pdf.row_runs` of ``use``.

    Returns
    -------
    values : (12,) in the order of :data:`MOMENT_NAMES` (see :class:`Moments`).
    n_used : number of pixels averaged over.
    """
    s, n = _moment_sums(
        np.ascontiguousarray(kappa, dtype=np.float64),
        np.ascontiguousarray(kx),
        np.ascontiguousarray(ky),
        np.ascontiguousarray(lap),
        row_runs(use) if runs is None else runs,
    )
    if n == 0:
        return np.full(len(MOMENT_NAMES), np.nan), 0
    return moments_from_sums(s), int(n)


@register
class Moments(Statistic):
    r"""Moments of the convergence and its derivatives (generalised skewness/kurtosis).

    Settings: ``margin_arcmin`` (default twice the smoothing scale, at least 3 pixels),
    ``periodic`` (default false); see :func:`derivative_settings`. Derivatives are taken
    by FFT of the map with masked pixels filled by the valid mean; only valid pixels
    farther than the margin from any masked pixel (and from the border, unless periodic)
    are averaged over.

    Returns
    -------
    Measurement
        One bin (``bin_name`` ``"moment"``, centre 0); one row per moment and source bin,
        labelled ``"<moment>:<bin label>"`` with the moments of :data:`MOMENT_NAMES` in
        that order. ``sigma1_sq`` is in rad^-2, ``sigma2_sq`` in rad^-4, the rest are
        dimensionless. ``extra["n_pixels"]`` holds the number of pixels used.

    Notes
    -----
    All averages :math:`\langle\cdot\rangle` run over the used pixels, with
    :math:`\kappa`, :math:`\partial_i\kappa` and :math:`\nabla^2\kappa` each centred on
    its own mean there; :math:`\eta=|\nabla\kappa|^2`.

    * :math:`\sigma_0^2=\langle\kappa^2\rangle`, :math:`\sigma_1^2=\langle\eta\rangle`,
      :math:`\sigma_2^2=\langle(\nabla^2\kappa)^2\rangle`.
    * skewness :math:`\langle\kappa^3\rangle/\sigma_0^3`, kurtosis (excess)
      :math:`\langle\kappa^4\rangle/\sigma_0^4-3`.
    * skewness parameters of Matsubara (2003) in two dimensions:
      :math:`S^{(0)}=\langle\kappa^3\rangle/\sigma_0^4`,
      :math:`S^{(1)}=-\tfrac34\langle\kappa^2\nabla^2\kappa\rangle/(\sigma_0^2\sigma_1^2)`,
      :math:`S^{(2)}=-3\langle\eta\,\nabla^2\kappa\rangle/\sigma_1^4`.
      For a local quadratic field :math:`\phi+f(\phi^2-\sigma^2)` all three equal
      :math:`6f` at leading order.
    * the four connected fourth-order cumulants that enter the next order of that
      expansion, normalised to be dimensionless but *without* the numerical prefactors
      of any particular paper's kurtosis parameters:
      :math:`K_0=\langle\kappa^4\rangle_c/\sigma_0^6`,
      :math:`K_1=\langle\kappa^3\nabla^2\kappa\rangle_c/(\sigma_0^4\sigma_1^2)`,
      :math:`K_2=\langle\kappa\,\eta\,\nabla^2\kappa\rangle_c/(\sigma_0^2\sigma_1^4)`,
      :math:`K_3=\langle\eta^2\rangle_c/\sigma_1^4`, with
      :math:`\langle\kappa^4\rangle_c=\langle\kappa^4\rangle-3\sigma_0^4`,
      :math:`\langle\kappa^3\nabla^2\kappa\rangle_c=\langle\kappa^3\nabla^2\kappa\rangle
      -3\sigma_0^2\langle\kappa\nabla^2\kappa\rangle`,
      :math:`\langle\kappa\eta\nabla^2\kappa\rangle_c=\langle\kappa\eta\nabla^2\kappa\rangle
      -\langle\kappa\nabla^2\kappa\rangle\sigma_1^2
      -2\sum_i\langle\kappa\partial_i\kappa\rangle\langle\partial_i\kappa\nabla^2\kappa\rangle`,
      :math:`\langle\eta^2\rangle_c=\langle\eta^2\rangle-\sigma_1^4
      -2\sum_{ij}\langle\partial_i\kappa\partial_j\kappa\rangle^2`.

    References
    ----------
    Matsubara T., 2003, ApJ, 584, 1, "Statistics of smoothed cosmic fields in
    perturbation theory. I. Formulation and useful formulae in second-order perturbation
    theory".
    Matsubara T., 2010, Phys. Rev. D, 81, 083505, "Analytic Minkowski functionals of the
    cosmic microwave background: second-order non-Gaussianity with bispectrum and
    trispectrum".
    """

    name = "moments"
    smoothed = True

    def measure(self, mapset: MapSet) -> Measurement:
        margin_pix, periodic = derivative_settings(self.settings, self.name, mapset)
        use = map_analysis_mask(mapset, margin_pix, periodic)
        labels = bin_labels(mapset)
        values = np.empty((len(MOMENT_NAMES), len(labels)))
        n_used = np.zeros(len(labels))
        for i in range(mapset.n_bins):
            d = map_derivatives(mapset, i)
            lap = d["xx"] + d["yy"]
            runs = cached_runs(mapset, use, ("analysis", margin_pix, periodic))
            values[:, i], n_used[i] = field_moments(mapset.maps[i], d["x"], d["y"], lap, use, runs)
        entries = [f"{m}:{label}" for m in MOMENT_NAMES for label in labels]
        return Measurement(
            bin_name="moment",
            bin_centers=np.zeros(1),
            values=values.reshape(-1, 1),
            entries=entries,
            bin_edges=None,
            bin_unit="1",
            unit="1 (sigma1_sq: rad^-2, sigma2_sq: rad^-4)",
            extra={"n_pixels": np.tile(n_used, len(MOMENT_NAMES))[:, None]},
        )
