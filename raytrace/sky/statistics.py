r"""Summary statistics of observed HEALPix convergence maps, in the statistics-file layout.

The measuring stage on the sphere runs the configured statistics that make sense there —
``power_spectrum``, ``pdf``, ``moments``, ``peaks`` and ``minima`` — and writes them
exactly as the flat branch does (one group per statistic, one subgroup per smoothing
scale with ``values`` [entry, bin], ``bin_centers``, ``bin_edges``, ``entries``,
``bin_name``), so the stack and forecast stages read them unchanged. Settings are the
same keys as on the flat sky (:mod:`raytrace.statistics`).

**Power spectrum.** Pseudo-:math:`C_\ell` of the masked maps,
:math:`\tilde C_\ell = \sum_m a_{\ell m} b^*_{\ell m}/(2\ell+1)` (``healpy.map2alm`` and
``alm2cl``), corrected for the mask (``mask_correction``):

``master`` (default on the sphere)
    the MASTER estimator of Hivon et al. (2002): bandpowers
    :math:`C_b = \sum_{b'} K^{-1}_{bb'} \sum_{\ell\in b'} \tilde C_\ell / N_{b'}` with the
    binned coupling matrix :math:`K_{bb'} = N_b^{-1}\sum_{\ell\in b}\sum_{\ell'\in b'}
    M_{\ell\ell'} F_{\ell'}` and

    .. math:: M_{\ell_1\ell_2} = \frac{2\ell_2+1}{4\pi}\sum_{\ell_3}(2\ell_3+1)\,W_{\ell_3}
       \begin{pmatrix}\ell_1 & \ell_2 & \ell_3\\ 0 & 0 & 0\end{pmatrix}^2,

    :math:`W_\ell` the mask's power spectrum and :math:`F_\ell = w_\ell^2` the HEALPix pixel
    window (``healpy.pixwin``) when ``pixel_window: true``, else 1. Two outer bins,
    :math:`[0, \ell_{\rm first})` and :math:`[\ell_{\rm last}, 3N_{\rm side})`, take part in the
    inversion and are not reported. The Wigner symbols come from the closed form of
    Edmonds (1957, eq. 3.7.17) for the first and a two-term ratio for the rest.
``fsky``
    :math:`\tilde C_\ell` divided by the mean of the squared mask (and by :math:`w_\ell^2`).

No noise bias is subtracted (as on the flat sky). Bins are integer multipoles
:math:`\ell` with ``ell_edges[b] <= ell < ell_edges[b+1]``; the centre is the bin's mean
:math:`\ell`. Defaults: ``ell_min`` 2, ``ell_max`` :math:`2N_{\rm side}`.

**PDF, peaks, minima.** Over valid pixels, with the threshold binning of the flat branch
(``nu`` = value / noise rms, or the map's own rms when noiseless). A peak (minimum) is a
pixel above (below) all of its HEALPix neighbours (``healpy.get_all_neighbours``: 8, or 7
at the 24 pixels where a corner has three neighbours); a pixel counts only when it and all
its neighbours are valid. Densities are per square degree of eligible area.

**Moments.** The flat branch's moments (:class:`raytrace.statistics.moments.Moments`)
with the derivatives from the harmonic coefficients (``alm2map_der1`` for the gradient in
the :math:`(\hat\theta, \hat\phi)` basis, :math:`-\ell(\ell+1)a_{\ell m}` for the Laplacian),
masked pixels filled with the valid mean, averaged over valid pixels farther than the
margin from the mask (by repeated erosion through the neighbours).

References
----------
Hivon, E., Górski, K. M., Netterfield, C. B. et al. 2002, ApJ 567, 2.
Edmonds, A. R. 1957, *Angular Momentum in Quantum Mechanics*, Princeton.
Bond, J. R. & Efstathiou, G. 1987, MNRAS 226, 655 (peaks of Gaussian fields).
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping

import numpy as np
from numba import njit

from ..errors import RaytraceError
from ..statistics import Measurement, pair_labels
from ..statistics.moments import MIN_MARGIN_PIX, MOMENT_NAMES, field_moments
from ..statistics.pdf import row_runs, threshold_edges
from ..statistics.peaks import bin_counts
from .config import SPHERE_STATISTICS
from .pixels import DEG2_PER_SR, npix, pixel_area_sr, pixel_arcmin
from .pixels import pixel_window as pixel_window_fn


@dataclass(frozen=True)
class SkyMapSet:
    """HEALPix maps one statistic sees at one smoothing scale (RING order)."""

    maps: np.ndarray  # (n_maps, npix)
    mask: np.ndarray  # (npix,) bool
    nside: int
    smoothing_arcmin: float = 0.0
    noise_sigma: np.ndarray | None = None
    bin_labels: tuple[str, ...] = ()

    @property
    def n_bins(self) -> int:
        return self.maps.shape[0]

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(self.bin_labels) or tuple(str(i) for i in range(self.n_bins))


# ------------------------------------------------------------------------------------
# mode coupling
@njit(cache=True, nogil=True)
def coupling_sums(w_ell, lmax):
    r""":math:`S_{\ell_1\ell_2} = \sum_{\ell_3}(2\ell_3+1)W_{\ell_3}\,(\ell_1\,\ell_2\,\ell_3;0\,0\,0)^2`, (lmax+1)^2.

    For :math:`\ell_1 \ge \ell_2` the first symbol (:math:`\ell_3 = \ell_1-\ell_2`,
    :math:`J = \ell_1`) is :math:`\frac{(2\ell_1-2\ell_2)!\,(2\ell_2)!}{(2\ell_1+1)!}
    \big[\frac{\ell_1!}{(\ell_1-\ell_2)!\,\ell_2!}\big]^2`; each next one (:math:`\ell_3+2`,
    :math:`J+1`) follows from the closed form by the ratio
    :math:`\frac{(2J-2\ell_1+1)(2J-2\ell_2+1)(J-\ell_3)(J+1)}{(J-\ell_1+1)(J-\ell_2+1)(2J-2\ell_3-1)(2J+3)}`.
    """
    lw = w_ell.shape[0] - 1
    out = np.zeros((lmax + 1, lmax + 1))
    for l1 in range(lmax + 1):
        for l2 in range(l1 + 1):
            a, b = l1, l2
            logw = (math.lgamma(2 * a - 2 * b + 1) + math.lgamma(2 * b + 1) - math.lgamma(2 * a + 2)
                    + 2.0 * (math.lgamma(a + 1) - math.lgamma(a - b + 1) - math.lgamma(b + 1)))
            w = math.exp(logw)
            l3 = a - b
            J = a
            total = 0.0
            top = min(a + b, lw)
            while l3 <= top:
                total += (2 * l3 + 1) * w_ell[l3] * w
                if l3 + 2 > a + b:
                    break
                w *= ((2 * J - 2 * a + 1) * (2 * J - 2 * b + 1) * (J - l3) * (J + 1)) / (
                    (J - a + 1) * (J - b + 1) * (2 * J - 2 * l3 - 1) * (2 * J + 3))
                l3 += 2
                J += 1
            out[l1, l2] = total
            out[l2, l1] = total
    return out


def coupling_matrix(w_ell: np.ndarray, lmax: int) -> np.ndarray:
    """MASTER :math:`M_{\\ell\\ell'}` (module notes) from the mask power ``w_ell``."""
    s = coupling_sums(np.ascontiguousarray(w_ell, dtype=np.float64), int(lmax))
    ell = np.arange(lmax + 1)
    return s * (2 * ell[None, :] + 1) / (4 * np.pi)


def multipole_bins(edges: np.ndarray, lmax: int) -> list[np.ndarray]:
    """Integer multipoles of each bin [edge_b, edge_b+1); an empty bin is an error."""
    bins = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        ell = np.arange(int(math.ceil(lo)), int(math.ceil(hi)))
        ell = ell[ell <= lmax]
        if ell.size == 0:
            raise RaytraceError(f"statistics.power_spectrum: the bin [{lo:g}, {hi:g}) holds no multipole <= {lmax}")
        bins.append(ell)
    return bins


class MasterEstimator:
    """Binned MASTER deconvolution for one mask, bins and pixel window."""

    def __init__(self, mask: np.ndarray, edges: np.ndarray, nside: int, *, pixel_window: bool, lmax: int,
                 iterations: int = 1):
        import healpy as hp

        self.lmax = lmax
        self.inner = multipole_bins(edges, lmax)
        first, last = int(self.inner[0][0]), int(self.inner[-1][-1]) + 1
        groups = ([np.arange(0, first)] if first > 0 else []) + self.inner + (
            [np.arange(last, lmax + 1)] if last <= lmax else [])
        self.offset = 1 if first > 0 else 0
        w_ell = hp.anafast(mask.astype(float), lmax=lmax, iter=iterations)
        m = coupling_matrix(w_ell, lmax)
        f = pixel_window_fn(nside, lmax) ** 2 if pixel_window else np.ones(lmax + 1)
        n = len(groups)
        p = np.zeros((n, lmax + 1))
        q = np.zeros((lmax + 1, n))
        for b, ell in enumerate(groups):
            p[b, ell] = 1.0 / ell.size
            q[ell, b] = 1.0
        k = p @ (m * f[None, :]) @ q
        self.binning = p
        self.kinv = np.linalg.inv(k)

    def __call__(self, pseudo_cl: np.ndarray) -> np.ndarray:
        full = self.kinv @ (self.binning @ pseudo_cl[: self.lmax + 1])
        return full[self.offset : self.offset + len(self.inner)]


_MASTER_CACHE: dict[tuple, MasterEstimator] = {}


def master_estimator(mask: np.ndarray, edges: np.ndarray, nside: int, pixel_window: bool, lmax: int) -> MasterEstimator:
    """:class:`MasterEstimator`, cached per mask, bins and options (the mask is fixed per survey)."""
    key = (hashlib.sha1(np.packbits(mask).tobytes()).hexdigest(), tuple(np.round(edges, 9)), nside,
           pixel_window, lmax)
    if key not in _MASTER_CACHE:
        _MASTER_CACHE.clear()
        _MASTER_CACHE[key] = MasterEstimator(mask, edges, nside, pixel_window=pixel_window, lmax=lmax)
    return _MASTER_CACHE[key]


def ell_edges(settings: Mapping[str, Any], nside: int) -> np.ndarray:
    if settings.get("ell_edges") is not None:
        return np.asarray(settings["ell_edges"], dtype=float)
    lo = float(settings.get("ell_min") or 2.0)
    hi = float(settings.get("ell_max") or 2 * nside)
    bins = int(settings.get("bins", 20))
    if settings.get("spacing", "log") == "log":
        return np.geomspace(lo, hi, bins + 1)
    return np.linspace(lo, hi, bins + 1)


def power_spectrum(ms: SkyMapSet, settings: Mapping[str, Any], *, iterations: int = 1) -> Measurement:
    """Auto (and cross) angular power spectra with the mask correction (module notes)."""
    import healpy as hp

    lmax = 3 * ms.nside - 1
    edges = ell_edges(settings, ms.nside)
    correction = settings.get("mask_correction") or "master"
    pixel_window = bool(settings.get("pixel_window", False))
    mask = np.asarray(ms.mask, dtype=bool)
    bins = multipole_bins(edges, lmax)
    if correction == "master":
        estimate = master_estimator(mask, edges, ms.nside, pixel_window, lmax)
    elif correction == "fsky":
        window = pixel_window_fn(ms.nside, lmax) ** 2 if pixel_window else np.ones(lmax + 1)
        fsky = float(np.mean(mask.astype(float) ** 2))

        def estimate(cl):
            return np.array([np.mean(cl[ell] / window[ell]) for ell in bins]) / fsky
    else:
        raise RaytraceError(f"statistics.power_spectrum.mask_correction: unknown correction {correction!r} (master | fsky)")
    alms = [hp.map2alm(np.where(mask, m, 0.0), lmax=lmax, iter=iterations) for m in ms.maps]
    rows, entries = [], []
    for i, j, label in pair_labels(ms.labels, bool(settings.get("cross", True))):
        rows.append(estimate(hp.alm2cl(alms[i], alms[j])))
        entries.append(label)
    return Measurement(bin_name="ell", bin_centers=np.array([ell.mean() for ell in bins]), values=np.array(rows),
                       entries=entries, bin_edges=edges, unit="sr",
                       extra={"n_modes": np.array([float(np.sum(2 * ell + 1)) for ell in bins])})


# ------------------------------------------------------------------------------------
def _scale(ms: SkyMapSet, i: int, binning: str, use: np.ndarray) -> float:
    if binning == "kappa":
        return 1.0
    if ms.noise_sigma is not None and float(ms.noise_sigma[i]) > 0:
        return float(ms.noise_sigma[i])
    sigma = float(np.std(ms.maps[i][use])) if use.any() else 0.0
    if not sigma > 0:
        raise ValueError(f"map {i} has zero rms over its valid pixels; cannot bin in nu")
    return sigma


def pdf(ms: SkyMapSet, settings: Mapping[str, Any]) -> Measurement:
    """Histogram density of the valid pixels (as :class:`raytrace.statistics.pdf.PDF`)."""
    binning, edges = threshold_edges(settings, "pdf")
    use = np.asarray(ms.mask, dtype=bool)
    n_valid = max(int(use.sum()), 1)
    rows, outside, scales = [], [], []
    for i in range(ms.n_bins):
        scale = _scale(ms, i, binning, use)
        counts = bin_counts(ms.maps[i][use] / scale, edges)
        rows.append(counts / (n_valid * np.diff(edges)))
        outside.append(1.0 - counts.sum() / n_valid)
        scales.append(scale)
    n_b = edges.size - 1
    return Measurement(bin_name=binning, bin_centers=0.5 * (edges[1:] + edges[:-1]), values=np.array(rows),
                       entries=list(ms.labels), bin_edges=edges,
                       extra={"fraction_outside": np.repeat(np.array(outside)[:, None], n_b, axis=1),
                              "scale": np.repeat(np.array(scales)[:, None], n_b, axis=1)})


# neighbours: computed in chunks (8 x npix indices would be 800 MB at nside 1024)
_CHUNK = 1 << 20


def _neighbour_chunks(nside: int):
    import healpy as hp

    n = npix(nside)
    for start in range(0, n, _CHUNK):
        pix = np.arange(start, min(start + _CHUNK, n))
        yield pix, hp.get_all_neighbours(nside, pix)


def erode(mask: np.ndarray, nside: int, steps: int) -> np.ndarray:
    """Valid pixels whose neighbours, to ``steps`` rings of neighbours, are all valid."""
    use = np.asarray(mask, dtype=bool).copy()
    for _ in range(steps):
        nxt = use.copy()
        for pix, nb in _neighbour_chunks(nside):
            ok = np.where(nb >= 0, use[np.maximum(nb, 0)], True).all(axis=0)
            nxt[pix] &= ok
        use = nxt
    return use


def extrema(field: np.ndarray, mask: np.ndarray, nside: int, kind: str = "max") -> tuple[np.ndarray, np.ndarray]:
    """Pixels that are strict local maxima (minima) over their neighbours, and the eligible pixels."""
    sign = 1.0 if kind == "max" else -1.0
    found = np.zeros(field.size, dtype=bool)
    eligible = np.zeros(field.size, dtype=bool)
    for pix, nb in _neighbour_chunks(nside):
        safe = np.maximum(nb, 0)
        missing = nb < 0
        ok = mask[pix] & np.where(missing, True, mask[safe]).all(axis=0)
        values = np.where(missing, -np.inf, sign * field[safe])
        eligible[pix] = ok
        found[pix] = ok & (sign * field[pix] > values.max(axis=0))
    return found, eligible


def extrema_counts(ms: SkyMapSet, settings: Mapping[str, Any], name: str, kind: str) -> Measurement:
    binning, edges = threshold_edges(settings, name)
    mask = np.asarray(ms.mask, dtype=bool)
    rows, counts_all, totals, area = [], [], [], 0.0
    for i in range(ms.n_bins):
        found, eligible = extrema(ms.maps[i], mask, ms.nside, kind)
        area = float(eligible.sum()) * pixel_area_sr(ms.nside) * DEG2_PER_SR
        scale = _scale(ms, i, binning, mask)
        counts = bin_counts(ms.maps[i][found] / scale, edges)
        counts_all.append(counts)
        totals.append(float(found.sum()))
        rows.append(counts / area if area > 0 else np.full(edges.size - 1, np.nan))
    n_b = edges.size - 1
    return Measurement(bin_name=binning, bin_centers=0.5 * (edges[1:] + edges[:-1]), values=np.array(rows),
                       entries=list(ms.labels), bin_edges=edges, unit="deg^-2",
                       extra={"counts": np.array(counts_all), "area_deg2": np.full((ms.n_bins, n_b), area),
                              "total_all_heights": np.repeat(np.array(totals)[:, None], n_b, axis=1)})


def moments(ms: SkyMapSet, settings: Mapping[str, Any], *, iterations: int = 1) -> Measurement:
    """The moments of :mod:`raytrace.statistics.moments` on the sphere (module notes)."""
    import healpy as hp

    if settings.get("periodic"):
        raise RaytraceError("statistics.moments.periodic: has no meaning on the sphere (maps.geometry: sphere)")
    pix_arcmin = pixel_arcmin(ms.nside)
    margin = settings.get("margin_arcmin")
    margin_pix = (max(MIN_MARGIN_PIX, 2.0 * ms.smoothing_arcmin / pix_arcmin) if margin is None
                  else float(margin) / pix_arcmin)
    mask = np.asarray(ms.mask, dtype=bool)
    use = erode(mask, ms.nside, int(math.ceil(margin_pix))) if not mask.all() else mask
    runs = row_runs(use[None, :])
    lmax = 3 * ms.nside - 1
    ell = hp.Alm.getlm(lmax)[0].astype(float)
    values = np.empty((len(MOMENT_NAMES), ms.n_bins))
    n_used = np.zeros(ms.n_bins)
    for i in range(ms.n_bins):
        field = np.asarray(ms.maps[i], dtype=np.float64)
        if not mask.all():
            field = np.where(mask, field, field[mask].mean() if mask.any() else 0.0)
        alm = hp.map2alm(field, lmax=lmax, iter=iterations)
        _, d_theta, d_phi = hp.alm2map_der1(alm, ms.nside, lmax=lmax)
        lap = hp.alm2map(alm * (-ell * (ell + 1)), ms.nside, lmax=lmax)
        values[:, i], n_used[i] = field_moments(field[None, :], d_theta[None, :], d_phi[None, :], lap[None, :],
                                                use[None, :], runs)
    entries = [f"{m}:{label}" for m in MOMENT_NAMES for label in ms.labels]
    return Measurement(bin_name="moment", bin_centers=np.zeros(1), values=values.reshape(-1, 1), entries=entries,
                       unit="1 (sigma1_sq: rad^-2, sigma2_sq: rad^-4)",
                       extra={"n_pixels": np.tile(n_used, len(MOMENT_NAMES))[:, None]})


#: name -> (measure function, measured at every smoothing scale)
MEASURES: dict[str, tuple[Callable[[SkyMapSet, Mapping[str, Any]], Measurement], bool]] = {
    "power_spectrum": (power_spectrum, False),
    "pdf": (pdf, True),
    "moments": (moments, True),
    "peaks": (lambda ms, s: extrema_counts(ms, s, "peaks", "max"), True),
    "minima": (lambda ms, s: extrema_counts(ms, s, "minima", "min"), True),
}


def measure(path: str | Path, output: str | Path, settings: Mapping[str, Any],
            log: Callable[[str], None] = lambda s: None) -> None:
    """The measuring stage for one sphere observed-map file (layout in the module notes)."""
    from ..measuring import read_observed, write_measurements

    obs = read_observed(path, attrs=("nside",))
    nside = int(obs.attrs["nside"])
    unsmoothed, smoothed = obs.map_sets(lambda maps, scale, noise: SkyMapSet(maps, obs.mask, nside, scale, noise,
                                                                             obs.labels))

    def chosen(name, stat_settings):
        if name not in MEASURES:
            raise RaytraceError(f"statistics.{name}: not available with maps.geometry: sphere "
                                f"(available: {', '.join(SPHERE_STATISTICS)})")
        fn, per_scale = MEASURES[name]
        return per_scale, lambda ms: fn(ms, stat_settings)

    write_measurements(output, settings, path, obs.labels, unsmoothed, smoothed, chosen, log,
                       file_attrs={"geometry": "sphere"})
