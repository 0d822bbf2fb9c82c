"""Binned flat-sky bispectrum of convergence maps by the FFT shell-filter estimator."""

from __future__ import annotations

import functools
from typing import Any, Mapping, Sequence

import numpy as np
import scipy.fft

from ..errors import RaytraceError
from . import MapSet, Measurement, Statistic, register
from .pdf import bin_labels, finite_float, increasing_edges, positive_int
from .power_spectrum import rfft_mode_weights

CONFIGURATIONS = ("equilateral", "isosceles", "squeezed", "folded")
DEFAULTS = {
    "ell_min_fundamentals": 4.0,  # default ell_min in units of the fundamental 2 pi / L
    "ell_max_nyquist": 0.5,  # default ell_max as a fraction of the Nyquist multipole
    "bins": 8,
    "isosceles_ratios": (0.5, 1.5),
    "squeezed_min_ratio": 3.0,
}


# --------------------------------------------------------------------------------------
# settings
# --------------------------------------------------------------------------------------
def bispectrum_ell_edges(settings: Mapping[str, Any], n_pix: int, pixel_rad: float) -> np.ndarray:
    """Multipole bin edges from ``ell_edges`` or ``ell_min``/``ell_max``/``bins``/``spacing``.

    Defaults: ``ell_min`` four fundamentals :math:`8\\pi/L`, ``ell_max`` half the Nyquist
    multipole :math:`\\pi/(2\\Delta\\theta)`, 8 logarithmic bins.
    """
    stat = "bispectrum"
    if settings.get("ell_edges") is not None:
        edges = increasing_edges(settings["ell_edges"], "ell_edges", stat)
        if edges[0] <= 0:
            raise RaytraceError(f"statistics.{stat}.ell_edges: must be positive")
        return edges
    fundamental = 2.0 * np.pi / (n_pix * pixel_rad)
    nyquist = np.pi / pixel_rad
    ell_min = finite_float(settings, "ell_min", DEFAULTS["ell_min_fundamentals"] * fundamental, stat)
    ell_max = finite_float(settings, "ell_max", DEFAULTS["ell_max_nyquist"] * nyquist, stat)
    bins = positive_int(settings, "bins", DEFAULTS["bins"], stat)
    if not ell_min > 0:
        raise RaytraceError(f"statistics.{stat}.ell_min: must be positive")
    if not ell_max > ell_min:
        raise RaytraceError(f"statistics.{stat}.ell_max: must exceed ell_min")
    spacing = settings.get("spacing", "log") or "log"
    if spacing == "log":
        return np.geomspace(ell_min, ell_max, bins + 1)
    if spacing == "linear":
        return np.linspace(ell_min, ell_max, bins + 1)
    raise RaytraceError(f"statistics.{stat}.spacing: must be 'log' or 'linear'")


def _configuration_settings(settings: Mapping[str, Any]) -> tuple[tuple[str, ...], tuple[float, ...], float]:
    stat = "bispectrum"
    which = settings.get("configurations", CONFIGURATIONS)
    if which is None:
        which = CONFIGURATIONS
    if isinstance(which, str):
        which = (which,)
    which = tuple(which)
    bad = [w for w in which if w not in CONFIGURATIONS]
    if bad or not which:
        known = ", ".join(CONFIGURATIONS)
        raise RaytraceError(f"statistics.{stat}.configurations: must be a non-empty list from {known}")
    ratios = settings.get("isosceles_ratios", DEFAULTS["isosceles_ratios"])
    try:
        ratios = tuple(float(r) for r in (ratios or ()))
    except (TypeError, ValueError):
        raise RaytraceError(f"statistics.{stat}.isosceles_ratios: must be a list of numbers") from None
    if any(not (0.0 < r <= 2.0) for r in ratios):
        raise RaytraceError(f"statistics.{stat}.isosceles_ratios: each must lie in (0, 2]")
    if "isosceles" in which and not ratios:
        raise RaytraceError(f"statistics.{stat}.isosceles_ratios: needs at least one ratio")
    squeeze = finite_float(settings, "squeezed_min_ratio", DEFAULTS["squeezed_min_ratio"], stat)
    if squeeze < 1.0:
        raise RaytraceError(f"statistics.{stat}.squeezed_min_ratio: must be at least 1")
    return which, ratios, squeeze


# --------------------------------------------------------------------------------------
# shell filtering
# --------------------------------------------------------------------------------------
def transform_size(n_pix: int, pixel_rad: float, ell_edges: np.ndarray) -> tuple[int, int]:
    """Largest mode index inside the bins and the grid on which triple products are exact.

    A mode with :math:`|\\ell|<\\ell_{\\max}` has integer components of modulus at most
    :math:`k_{\\max}=\\lfloor\\ell_{\\max}/\\ell_f\\rfloor`; three of them sum to at most
    :math:`3k_{\\max}`, so on a grid of :math:`M\\ge3k_{\\max}+1` points the real-space
    sum of a triple product picks out exactly the closed triangles (no aliasing). The
    grid is the smallest fast FFT length with that property, capped at the map size (above
    two thirds of the Nyquist multipole the estimator then includes aliased triplets).
    """
    fundamental = 2.0 * np.pi / (n_pix * pixel_rad)
    kmax = min(int(np.floor(ell_edges[-1] / fundamental * (1 + 1e-12))), n_pix // 2)
    m = scipy.fft.next_fast_len(3 * kmax + 1, real=True)
    return kmax, (n_pix if m >= n_pix else m)


def _ell_on_grid(m: int, fundamental: float) -> np.ndarray:
    ly = scipy.fft.fftfreq(m) * m
    lx = scipy.fft.rfftfreq(m) * m
    return fundamental * np.hypot(ly[:, None], lx[None, :])


def _truncate(spec: np.ndarray, n_pix: int, m: int, kmax: int) -> np.ndarray:
    """Copy the modes with index components up to ``kmax`` from an (N, N/2+1) half plane
    onto an (M, M/2+1) one."""
    if m == n_pix:
        return spec
    out = np.zeros((m, m // 2 + 1), dtype=spec.dtype)
    out[: kmax + 1, : kmax + 1] = spec[: kmax + 1, : kmax + 1]
    out[m - kmax :, : kmax + 1] = spec[n_pix - kmax :, : kmax + 1]
    return out


def shell_fields(
    half_spectrum: np.ndarray, n_pix: int, pixel_rad: float, ell_edges: np.ndarray, dtype=np.float32
) -> np.ndarray:
    r"""Real-space fields of a half-plane spectrum restricted to each multipole shell.

    All shells share one grid (:func:`transform_size`), so any product of three of them
    sums to an exact triangle sum; useful for predictions weighted over the triangles of
    a bin exactly as the estimator weights them (the estimator itself uses the cheaper
    per-triple grids of :class:`_ShellGeometry`).

    Parameters
    ----------
    half_spectrum : (N, N/2+1) array in ``rfft2`` layout (e.g. ``rfft2`` of a map, or a
        Hermitian function of :math:`\ell` such as a power spectrum or ones).
    n_pix : map side N; pixel_rad : pixel side in radians.
    ell_edges : (n_b + 1,) multipole bin edges.
    dtype : real dtype of the transforms.

    Returns
    -------
    (n_b, M, M) array, ``M`` from :func:`transform_size`:
    :math:`I_b(x)=M^{-2}\sum_{\ell\in b}\tilde a_\ell e^{i\ell\cdot x}`.
    """
    kmax, m = transform_size(n_pix, pixel_rad, ell_edges)
    fundamental = 2.0 * np.pi / (n_pix * pixel_rad)
    cdtype = np.complex64 if np.dtype(dtype) == np.float32 else np.complex128
    spec = _truncate(np.asarray(half_spectrum).astype(cdtype, copy=False), n_pix, m, kmax)
    idx = np.digitize(_ell_on_grid(m, fundamental), ell_edges) - 1
    out = np.empty((len(ell_edges) - 1, m, m), dtype=dtype)
    for b in range(len(ell_edges) - 1):
        out[b] = scipy.fft.irfft2(np.where(idx == b, spec, 0), s=(m, m), workers=None)
    return out


def bin_mean_ell(n_pix: int, pixel_rad: float, ell_edges: np.ndarray) -> np.ndarray:
    """Mode-weighted mean multipole of each bin (bin centre if a bin holds no mode)."""
    return np.array(_bin_mean_ell(int(n_pix), float(pixel_rad), tuple(map(float, ell_edges))))


@functools.lru_cache(maxsize=8)
def _bin_mean_ell(n_pix: int, pixel_rad: float, ell_edges: tuple[float, ...]) -> np.ndarray:
    ell_edges = np.asarray(ell_edges)
    fundamental = 2.0 * np.pi / (n_pix * pixel_rad)
    ell = _ell_on_grid(n_pix, fundamental)
    w = np.broadcast_to(rfft_mode_weights(n_pix)[None, :], ell.shape).ravel()
    idx = np.digitize(ell.ravel(), ell_edges) - 1
    ok = (idx >= 0) & (idx < len(ell_edges) - 1)
    nb = len(ell_edges) - 1
    n = np.bincount(idx[ok], weights=w[ok], minlength=nb)
    s = np.bincount(idx[ok], weights=w[ok] * ell.ravel()[ok], minlength=nb)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, s / n, 0.5 * (ell_edges[1:] + ell_edges[:-1]))


class _ShellGeometry:
    r"""Mode lists of the multipole shells and the grids on which triple products run.

    A triple of shells (a, b, c) whose modes have index components up to
    :math:`k_a, k_b, k_c` closes only through :math:`\ell_1+\ell_2+\ell_3=0` on any grid
    of :math:`M>\max(k_a+k_b+k_c,\,2\max_i k_i)` points, and each shell is then
    represented without folding. Each triple is evaluated on the smallest fast FFT length
    satisfying this (capped at the map size), so low-multipole triples cost a fraction
    of a full-size transform.
    """

    def __init__(self, n_pix: int, pixel_rad: float, edges: tuple[float, ...]):
        self.n_pix = n_pix
        self.edges = np.asarray(edges)
        self.n_b = len(edges) - 1
        fundamental = 2.0 * np.pi / (n_pix * pixel_rad)
        iy = np.rint(scipy.fft.fftfreq(n_pix) * n_pix).astype(np.int64)
        ix = np.arange(n_pix // 2 + 1, dtype=np.int64)
        ell = fundamental * np.hypot(iy[:, None], ix[None, :])
        idx = (np.digitize(ell, self.edges) - 1).ravel()
        order = np.argsort(idx, kind="stable")
        bounds = np.searchsorted(idx[order], np.arange(self.n_b + 1))
        iy_all = np.broadcast_to(iy[:, None], ell.shape).ravel()
        ix_all = np.broadcast_to(ix[None, :], ell.shape).ravel()
        members = [order[bounds[b] : bounds[b + 1]] for b in range(self.n_b)]
        self.kmax = np.array(
            [int(max(np.abs(iy_all[f]).max(), ix_all[f].max())) if f.size else 0 for f in members]
        )
        #: columns of the half-plane spectrum that any shell uses
        self.width = int(min(n_pix // 2 + 1, self.kmax.max() + 1))
        self.iy = [iy_all[f] for f in members]
        self.ix = [ix_all[f] for f in members]
        self.flat_n = [(self.iy[b] % n_pix) * self.width + self.ix[b] for b in range(self.n_b)]
        self._flat_m: dict[tuple[int, int], np.ndarray] = {}
        self._counts: dict[tuple, np.ndarray] = {}

    def grid(self, triple: tuple[int, int, int]) -> int:
        k = self.kmax[list(triple)]
        need = max(int(k.sum()), 2 * int(k.max())) + 1
        m = scipy.fft.next_fast_len(need, real=True)
        return self.n_pix if m >= self.n_pix else int(m)

    def spectrum(self, field: np.ndarray) -> np.ndarray:
        """The (N, width) columns of the single-precision ``rfft2`` that the shells use."""
        g = scipy.fft.rfft(np.asarray(field, dtype=np.float32), axis=1, workers=None)[:, : self.width]
        return scipy.fft.fft(g, axis=0, workers=None, overwrite_x=True)

    def flat_m(self, m: int, b: int) -> np.ndarray:
        if (m, b) not in self._flat_m:
            self._flat_m[(m, b)] = (self.iy[b] % m) * (int(self.kmax[b]) + 1) + self.ix[b]
        return self._flat_m[(m, b)]

    def groups(self, triples: Sequence[tuple[int, int, int]]) -> dict[int, list[int]]:
        out: dict[int, list[int]] = {}
        for n, t in enumerate(triples):
            out.setdefault(self.grid(t), []).append(n)
        return out

    def triple_sums(self, half_spectrum: np.ndarray, triples, dtype=np.float32) -> np.ndarray:
        r""":math:`\sum_{\triangle}\tilde a_{\ell_1}\tilde a_{\ell_2}\tilde a_{\ell_3}` over the
        closed triangles of each triple, from the (N, width) columns of a half-plane
        spectrum (:meth:`spectrum`)."""
        cdtype = np.complex64 if np.dtype(dtype) == np.float32 else np.complex128
        flat_spec = np.asarray(half_spectrum).astype(cdtype, copy=False).ravel()
        out = np.empty(len(triples))
        for m, members in self.groups(triples).items():
            bins = sorted({b for n in members for b in triples[n]})
            fields = {}
            for b in bins:
                # only the columns up to the shell's largest |l_x| are non-zero: transform
                # those along y, then zero-pad along x in the real inverse transform
                z = np.zeros((m, int(self.kmax[b]) + 1), dtype=cdtype)
                z.ravel()[self.flat_m(m, b)] = flat_spec[self.flat_n[b]]
                z = scipy.fft.ifft(z, axis=0, workers=None, overwrite_x=True)
                fields[b] = scipy.fft.irfft(z, n=m, axis=1, workers=None, overwrite_x=True).ravel()
            pairs: dict[tuple[int, int], np.ndarray] = {}
            for n in members:
                a, b, c = triples[n]
                key = (min(a, b), max(a, b))
                if key not in pairs:
                    pairs[key] = fields[a] * fields[b]
                out[n] = float(np.dot(pairs[key], fields[c])) * float(m) ** 4
        return out

    def counts(self, triples: tuple) -> np.ndarray:
        if triples not in self._counts:
            ones = np.ones((self.n_pix, self.width))
            c = np.rint(self.triple_sums(ones, list(triples), dtype=np.float64))
            c.setflags(write=False)
            self._counts[triples] = c
        return self._counts[triples]


@functools.lru_cache(maxsize=8)
def _geometry(n_pix: int, pixel_rad: float, edges: tuple[float, ...]) -> _ShellGeometry:
    return _ShellGeometry(n_pix, pixel_rad, edges)


def shell_geometry(n_pix: int, pixel_rad: float, ell_edges: np.ndarray) -> _ShellGeometry:
    """Cached :class:`_ShellGeometry` of a map size, pixel size and set of bins."""
    return _geometry(int(n_pix), float(pixel_rad), tuple(map(float, ell_edges)))


def triangle_counts(n_pix: int, pixel_rad: float, ell_edges: np.ndarray, triples) -> np.ndarray:
    r"""Number of closed triplets :math:`(\ell_1,\ell_2,\ell_3)`, :math:`\ell_1+\ell_2+\ell_3=0`,
    with :math:`|\ell_i|` in the bins of each triple, counted with the unit-field version of
    the estimator, :math:`N_{\triangle}=M^4\sum_x J_aJ_bJ_c` (cached per geometry)."""
    geometry = shell_geometry(n_pix, pixel_rad, ell_edges)
    return np.array(geometry.counts(tuple(tuple(int(i) for i in t) for t in triples)))


def configuration_triples(
    ell_edges: np.ndarray,
    ell_mean: np.ndarray,
    which: Sequence[str] = CONFIGURATIONS,
    ratios: Sequence[float] = DEFAULTS["isosceles_ratios"],
    squeezed_min_ratio: float = DEFAULTS["squeezed_min_ratio"],
) -> list[tuple[str, list[tuple[int, int, int] | None]]]:
    """Bin triples (b, b, c) of each configuration, one per bin b of the repeated side.

    * ``equilateral``: c = b.
    * ``isosceles_r<r>``: c = bin holding :math:`r\\bar\\ell_b`, for each ratio r.
    * ``squeezed``: c = 0 (the lowest bin), where :math:`\\bar\\ell_b\\ge` ``squeezed_min_ratio``
      :math:`\\times\\bar\\ell_0`.
    * ``folded``: c = bin holding :math:`2\\bar\\ell_b` (flattened triangles,
      :math:`\\ell_3\\simeq\\ell_1+\\ell_2`).

    ``None`` marks a bin b where the configuration falls outside the binned range.
    """
    nb = len(ell_edges) - 1

    def bin_of(x: float) -> int | None:
        c = int(np.searchsorted(ell_edges, x, side="right")) - 1
        return c if 0 <= c < nb else None

    out = []
    for kind in which:
        if kind == "equilateral":
            out.append(("equilateral", [(b, b, b) for b in range(nb)]))
        elif kind == "isosceles":
            for r in ratios:
                rows = []
                for b in range(nb):
                    c = bin_of(r * ell_mean[b])
                    rows.append(None if c is None else (b, b, c))
                out.append((f"isosceles_r{r:g}", rows))
        elif kind == "squeezed":
            squeezed = [b > 0 and ell_mean[b] >= squeezed_min_ratio * ell_mean[0] for b in range(nb)]
            out.append(("squeezed", [(b, b, 0) if squeezed[b] else None for b in range(nb)]))
        elif kind == "folded":
            folded = [bin_of(2.0 * ell_mean[b]) for b in range(nb)]
            out.append(("folded", [None if folded[b] is None else (b, b, folded[b]) for b in range(nb)]))
    return out


def binned_bispectrum(
    kappa: np.ndarray,
    pixel_rad: float,
    ell_edges: np.ndarray,
    triples: Sequence[tuple[int, int, int]],
    *,
    mask: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    r"""Binned flat-sky bispectrum of a square map for a list of bin triples.

    Parameters
    ----------
    kappa : (N, N) map.
    pixel_rad : pixel side in radians.
    ell_edges : (n_b + 1,) multipole bin edges.
    triples : bin indices (a, b, c) of the three sides.
    mask : (N, N) bool, True where valid; masked pixels are set to zero and the result
        divided by the valid fraction (first-order correction for the lost area; mode
        coupling is not undone).

    Returns
    -------
    bispectrum : (n_triples,) in sr^2 (NaN where no triangle closes).
    n_triangles : (n_triples,) number of closed triplets of Fourier modes.

    Notes
    -----
    Shell-filter estimator (Scoccimarro 2015; Sefusatti et al. 2016): with :math:`I_b(x)`
    the map filtered to the multipole shell :math:`b` and :math:`J_b(x)` the same filter
    applied to a field of ones in Fourier space,

    .. math:: \hat B_{abc}=\frac{\Delta\Omega^2}{N^2}\,
       \frac{\sum_x I_a(x)I_b(x)I_c(x)}{\sum_x J_a(x)J_b(x)J_c(x)},

    the average of :math:`\Delta\Omega^3\tilde\kappa_{\ell_1}\tilde\kappa_{\ell_2}
    \tilde\kappa_{\ell_3}/A` over the closed triangles of the bins, which estimates
    :math:`B` defined by :math:`\langle\kappa(\ell_1)\kappa(\ell_2)\kappa(\ell_3)\rangle
    =(2\pi)^2\delta_D(\ell_1+\ell_2+\ell_3)B(\ell_1,\ell_2,\ell_3)`
    (:math:`\Delta\Omega` pixel area, :math:`A=N^2\Delta\Omega`). The real-space sums run
    on grids that make them exact triangle sums (see :class:`_ShellGeometry`).

    References
    ----------
    Sefusatti E., Crocce M., Scoccimarro R., Couchman H. M. P., 2016, MNRAS, 460, 3624.
    Scoccimarro R., 2015, Phys. Rev. D, 92, 083532.
    """
    n_pix = kappa.shape[-1]
    fraction = 1.0
    field = np.asarray(kappa, dtype=np.float64)
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        fraction = float(mask.mean())
        if not mask.all():
            field = np.where(mask, field, 0.0)
    triples = [tuple(int(i) for i in t) for t in triples]
    counts = triangle_counts(n_pix, pixel_rad, ell_edges, triples)
    if not triples:
        return np.zeros(0), counts
    geometry = shell_geometry(n_pix, pixel_rad, ell_edges)
    sums = geometry.triple_sums(geometry.spectrum(field), triples)
    with np.errstate(invalid="ignore", divide="ignore"):
        b = np.where(counts > 0, sums / counts, np.nan) * pixel_rad**4 / n_pix**2 / max(fraction, 1e-300)
    return b, counts


@register
class Bispectrum(Statistic):
    r"""Binned convergence bispectrum in equilateral, isosceles, squeezed and folded shapes.

    Settings: ``ell_edges`` or ``ell_min`` (default :math:`4\times2\pi/L`), ``ell_max``
    (default half the Nyquist multipole), ``bins`` (8), ``spacing`` (``log`` | ``linear``,
    default ``log``); ``configurations`` (subset of ``equilateral``, ``isosceles``,
    ``squeezed``, ``folded``; default all); ``isosceles_ratios`` (ratios
    :math:`\ell_3/\ell_1` in (0, 2], default [0.5, 1.5]); ``squeezed_min_ratio``
    (minimum :math:`\ell_1/\ell_3` of a squeezed triangle, default 3). Measured on the
    unsmoothed maps, per source bin (no cross-bin bispectra).

    Returns
    -------
    Measurement
        Bins over the repeated side :math:`\ell_1=\ell_2` (``bin_centers`` the
        mode-weighted mean multipole); rows ``"<configuration>:<bin label>"`` with
        configurations ``equilateral``, ``isosceles_r<r>``, ``squeezed``, ``folded``
        (see :func:`configuration_triples`), in sr^2, NaN where a configuration does not
        exist. ``extra``: ``n_triangles`` and ``ell3`` (mean multipole of the third side's
        bin), both (n_entries, n_b).

    Notes
    -----
    Estimator and normalisation in :func:`binned_bispectrum`. For the local quadratic
    field :math:`\phi+f(\phi^2-\langle\phi^2\rangle)` the tree-level bispectrum is
    :math:`2f[P(\ell_1)P(\ell_2)+P(\ell_2)P(\ell_3)+P(\ell_3)P(\ell_1)]`
    (e.g. Komatsu & Spergel 2001).

    References
    ----------
    Komatsu E., Spergel D. N., 2001, Phys. Rev. D, 63, 063002.
    Sefusatti E. et al., 2016, MNRAS, 460, 3624.
    """

    name = "bispectrum"
    smoothed = False

    def measure(self, mapset: MapSet) -> Measurement:
        n_pix = mapset.maps.shape[-1]
        edges = bispectrum_ell_edges(self.settings, n_pix, mapset.pixel_rad)
        which, ratios, squeeze = _configuration_settings(self.settings)
        ell_mean = bin_mean_ell(n_pix, mapset.pixel_rad, edges)
        configs = configuration_triples(edges, ell_mean, which, ratios, squeeze)
        flat = sorted({t for _, rows in configs for t in rows if t is not None})
        position = {t: n for n, t in enumerate(flat)}
        labels = bin_labels(mapset)
        nb = len(edges) - 1
        values, counts_rows, ell3_rows, entries = [], [], [], []
        for i in range(mapset.n_bins):
            b, counts = binned_bispectrum(mapset.maps[i], mapset.pixel_rad, edges, flat, mask=mapset.mask)
            for kind, rows in configs:
                v, c, l3 = np.full(nb, np.nan), np.zeros(nb), np.full(nb, np.nan)
                for k, t in enumerate(rows):
                    if t is not None:
                        v[k], c[k], l3[k] = b[position[t]], counts[position[t]], ell_mean[t[2]]
                values.append(v)
                counts_rows.append(c)
                ell3_rows.append(l3)
                entries.append(f"{kind}:{labels[i]}")
        return Measurement(
            bin_name="ell",
            bin_centers=ell_mean,
            values=np.array(values),
            entries=entries,
            bin_edges=edges,
            bin_unit="1",
            unit="sr^2",
            extra={"n_triangles": np.array(counts_rows), "ell3": np.array(ell3_rows)},
        )
