"""Flat-sky angular power spectrum of convergence maps, auto and cross between source bins."""

from __future__ import annotations

import numpy as np
import scipy.fft

from . import MapSet, Measurement, Statistic, pair_labels, register


def ell_grid(n_pix: int, pixel_rad: float) -> np.ndarray:
    """|ell| of every mode of an ``rfft2`` of an (n_pix, n_pix) map with square pixels."""
    ly = 2.0 * np.pi * scipy.fft.fftfreq(n_pix, d=pixel_rad)
    lx = 2.0 * np.pi * scipy.fft.rfftfreq(n_pix, d=pixel_rad)
    return np.hypot(ly[:, None], lx[None, :])


def rfft_mode_weights(n_pix: int) -> np.ndarray:
    """Multiplicity of each ``rfft2`` column: the half-plane columns stand for two modes."""
    w = np.full(n_pix // 2 + 1, 2.0)
    w[0] = 1.0
    if n_pix % 2 == 0:
        w[-1] = 1.0
    return w


def bin_modes(
    values: np.ndarray, n_pix: int, pixel_rad: float, ell_edges: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mode-weighted bin averages of an ``rfft2``-shaped array and of |ell| itself.

    Returns (ell_mean, mean of ``values``, number of modes) per bin; an empty bin gets
    its centre as ell_mean and NaN as value.
    """
    ell = ell_grid(n_pix, pixel_rad)
    weight = np.broadcast_to(rfft_mode_weights(n_pix)[None, :], ell.shape).ravel()
    idx = np.digitize(ell.ravel(), ell_edges) - 1
    ok = (idx >= 0) & (idx < len(ell_edges) - 1)
    nb = len(ell_edges) - 1
    w = weight[ok]
    n_modes = np.bincount(idx[ok], weights=w, minlength=nb)
    sum_v = np.bincount(idx[ok], weights=w * values.ravel()[ok], minlength=nb)
    sum_l = np.bincount(idx[ok], weights=w * ell.ravel()[ok], minlength=nb)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = sum_v / n_modes
        ell_mean = np.where(n_modes > 0, sum_l / n_modes, 0.5 * (ell_edges[1:] + ell_edges[:-1]))
    return ell_mean, mean, n_modes


def ell_bin_edges(settings: dict, n_pix: int, pixel_rad: float) -> np.ndarray:
    """Bin edges from ``ell_edges`` or from ``ell_min``/``ell_max``/``bins``/``spacing``."""
    if settings.get("ell_edges") is not None:
        return np.asarray(settings["ell_edges"], dtype=float)
    field_rad = n_pix * pixel_rad
    ell_min = settings.get("ell_min") or 2.0 * np.pi / field_rad
    ell_max = settings.get("ell_max") or np.pi / pixel_rad
    bins = int(settings.get("bins", 20))
    if settings.get("spacing", "log") == "log":
        return np.geomspace(ell_min, ell_max, bins + 1)
    return np.linspace(ell_min, ell_max, bins + 1)


def binned_cross_spectrum(
    map1: np.ndarray,
    map2: np.ndarray | None,
    pixel_rad: float,
    ell_edges: np.ndarray,
    *,
    mask: np.ndarray | None = None,
    pixel_window: bool = False,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Binned flat-sky (cross) power spectrum :math:`C_\ell` of square maps.

    Parameters
    ----------
    map1, map2 : (P, P) maps; ``map2=None`` gives the auto spectrum of ``map1``.
    pixel_rad : pixel side in radians.
    ell_edges : (n_b + 1,) bin edges in multipole.
    mask : (P, P) bool, True where valid. Masked pixels are set to zero and the
        spectrum is divided by the valid fraction (the first-order correction for
        the lost area; mode coupling is not undone).

    Returns
    -------
    ell_mean : (n_b,) mode-weighted mean multipole of each bin.
    cl : (n_b,) binned power, in steradians (map units squared).
    n_modes : (n_b,) number of Fourier modes in each bin.

    Notes
    -----
    With the discrete Fourier transform :math:`\tilde\kappa_{\bf k}` of an
    :math:`N\times N` map of pixel area :math:`\Delta\Omega`, the estimator is
    :math:`\hat C_\ell = \Delta\Omega\,|\tilde\kappa_{\bf k}|^2 / N^2`, averaged over
    the modes with :math:`|\boldsymbol\ell| = 2\pi|{\bf k}|/(N\Delta\theta)` in the bin
    (common practice). Ray-traced maps sample the field at pixel centres, so no pixel
    window is divided out.
    """
    n_pix = map1.shape[-1]
    fraction = 1.0
    if mask is not None:
        fraction = float(np.mean(mask))
        map1 = np.where(mask, map1, 0.0)
        map2 = None if map2 is None else np.where(mask, map2, 0.0)
    f1 = scipy.fft.rfft2(map1)
    f2 = f1 if map2 is None else scipy.fft.rfft2(map2)
    power = (f1 * np.conj(f2)).real * (pixel_rad**2 / n_pix**2) / fraction
    if pixel_window:
        fy = scipy.fft.fftfreq(n_pix)[:, None]  # cycles per pixel: l Delta / (2 pi)
        fx = scipy.fft.rfftfreq(n_pix)[None, :]
        power = power / (np.sinc(fx) * np.sinc(fy)) ** 2
    ell_mean, cl, n_modes = bin_modes(power, n_pix, pixel_rad, ell_edges)
    return ell_mean, cl, n_modes


@register
class PowerSpectrum(Statistic):
    r"""Convergence power spectrum, auto and (if ``cross: true``) cross between source bins.

    Settings: ``ell_edges`` or ``ell_min``, ``ell_max``, ``bins``, ``spacing`` (log | linear);
    ``cross`` (default true); ``pixel_window`` (default false). Measured on the unsmoothed maps.

    Ray-traced maps sample the field at pixel centres and need no pixel-window
    correction (the default). Maps whose pixels are averages over the pixel area (e.g.
    made from galaxy catalogs) carry the window
    :math:`W = {\rm sinc}(\ell_x\Delta/2)\,{\rm sinc}(\ell_y\Delta/2)`; with
    ``pixel_window: true`` each mode is divided by :math:`W^2` before binning.
    """

    name = "power_spectrum"
    smoothed = False

    def measure(self, mapset: MapSet) -> Measurement:
        n_pix = mapset.maps.shape[-1]
        edges = ell_bin_edges(self.settings, n_pix, mapset.pixel_rad)
        labels = mapset.bin_labels or tuple(str(i) for i in range(mapset.n_bins))
        rows, entries, ell_mean, n_modes = [], [], None, None
        for i, j, label in pair_labels(labels, bool(self.settings.get("cross", True))):
            ell_mean, cl, n_modes = binned_cross_spectrum(
                mapset.maps[i], None if i == j else mapset.maps[j], mapset.pixel_rad, edges, mask=mapset.mask,
                pixel_window=bool(self.settings.get("pixel_window", False)),
            )
            rows.append(cl)
            entries.append(label)
        return Measurement(
            bin_name="ell",
            bin_centers=ell_mean,
            values=np.array(rows),
            entries=entries,
            bin_edges=edges,
            unit="sr",
            extra={"n_modes": n_modes},
        )


def expected_binned_spectrum(
    ell: np.ndarray,
    cl: np.ndarray,
    n_pix: int,
    pixel_rad: float,
    ell_edges: np.ndarray,
    *,
    embed: int = 8,
) -> tuple[np.ndarray, np.ndarray]:
    r"""What :func:`binned_cross_spectrum` returns on average for a field of spectrum ``cl``.

    A map is a finite, non-periodic patch of the sky, so its periodogram is the true
    spectrum convolved with the patch's window (power leaks from large to small scales;
    for spectra steeper than :math:`\ell^{-2}` the effect reaches tens of per cent).
    This computes the expectation exactly for a statistically homogeneous field:

    .. math::
        \langle\hat C(\mathbf k)\rangle = \Delta\theta^2 \sum_{\mathbf r} \xi(\mathbf r)
        \Big(1-\frac{|r_x|}{N}\Big)\Big(1-\frac{|r_y|}{N}\Big) e^{-i\mathbf k\cdot\mathbf r},

    with the correlation function :math:`\xi` of pixel values at lag :math:`\mathbf r`
    (Wiener–Khinchin theorem for a finite sample; e.g. Percival & Walden 1993,
    *Spectral Analysis for Physical Applications*, sec. 6.3), obtained from ``cl`` on a
    periodic grid ``embed`` times larger than the map.

    Parameters
    ----------
    ell, cl : the theory spectrum, tabulated on increasing ``ell`` (interpolated in log-log).
    n_pix, pixel_rad : map size and pixel side.
    ell_edges : the bins used for the measurement.
    embed : size of the periodic embedding in map sides.

    Returns
    -------
    ell_mean, cl_expected : as :func:`binned_cross_spectrum` would give them on average.
    """
    m = embed * n_pix
    ly = 2.0 * np.pi * scipy.fft.fftfreq(m, d=pixel_rad)[:, None]
    lx = 2.0 * np.pi * scipy.fft.fftfreq(m, d=pixel_rad)[None, :]
    lmag = np.hypot(lx, ly)
    grid_cl = np.zeros_like(lmag)
    nz = lmag > 0
    grid_cl[nz] = np.exp(np.interp(np.log(lmag[nz]), np.log(ell), np.log(cl)))
    xi = scipy.fft.ifft2(grid_cl).real / pixel_rad**2  # correlation of pixel values, lags mod m
    n = n_pix
    lags = np.r_[0:n, -n + 1 : 0]  # -(n-1) .. n-1, in the order of a size-(2n-1) transform
    weight = 1.0 - np.abs(lags) / n
    block = xi[np.ix_(lags % m, lags % m)] * weight[:, None] * weight[None, :]
    size = 2 * n
    padded = np.zeros((size, size))
    padded[np.ix_(lags % size, lags % size)] = block
    spectrum = scipy.fft.fft2(padded).real * pixel_rad**2  # at frequencies 2 pi j / (2 n d)
    expected = spectrum[::2, ::2][:, : n // 2 + 1]  # the map's own Fourier frequencies, rfft half-plane
    ell_mean, cl_exp, _ = bin_modes(expected, n, pixel_rad, ell_edges)
    return ell_mean, cl_exp
