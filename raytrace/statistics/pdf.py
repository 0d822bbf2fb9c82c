"""One-point probability density of the convergence, and the threshold binning shared by
the statistics that bin in convergence (``kappa``) or signal-to-noise (``nu``).

Threshold settings (read by :func:`threshold_edges`, used by ``pdf``, ``peaks``,
``minima`` and ``minkowski``):

``binning``
    ``"nu"`` (default) or ``"kappa"``. With ``nu`` a pixel value is divided by the
    scale returned by :func:`threshold_scale` before binning.
``edges``
    explicit, strictly increasing bin edges (overrides the three keys below).
``min``, ``max``, ``bins``
    evenly spaced edges; defaults -4, 6, 20 for ``nu`` and -0.05, 0.15, 20 for ``kappa``.
"""

from __future__ import annotations

import weakref
from typing import Any, Callable, Hashable, Mapping

import numba
import numpy as np

from ..errors import RaytraceError
from . import MapSet, Measurement, Statistic, register

#: floating-point relaxations allowed in the summation kernels: reassociation (so that
#: sums vectorise) and fused multiply-adds, but no assumptions about NaN or infinity
FAST_FLAGS = {"reassoc", "contract", "nsz"}

#: default (min, max, bins) of the threshold bins per binning variable
THRESHOLD_DEFAULTS = {"nu": (-4.0, 6.0, 20), "kappa": (-0.05, 0.15, 20)}


# --------------------------------------------------------------------------------------
# setting helpers shared by the suite
# --------------------------------------------------------------------------------------
def positive_int(settings: Mapping[str, Any], key: str, default: int, stat: str) -> int:
    """``settings[key]`` as a positive integer (bools rejected), else ``RaytraceError``."""
    value = settings.get(key, default)
    if value is None:
        value = default
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < 1:
        raise RaytraceError(f"statistics.{stat}.{key}: must be a positive integer")
    return int(value)


def finite_float(settings: Mapping[str, Any], key: str, default: float | None, stat: str) -> float | None:
    """``settings[key]`` as a finite float (``None`` passes through as the default)."""
    value = settings.get(key, default)
    if value is None:
        return None
    if isinstance(value, (bool, np.bool_)):
        raise RaytraceError(f"statistics.{stat}.{key}: must be a number")
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise RaytraceError(f"statistics.{stat}.{key}: must be a number") from None
    if not np.isfinite(out):
        raise RaytraceError(f"statistics.{stat}.{key}: must be finite")
    return out


def flag(settings: Mapping[str, Any], key: str, default: bool, stat: str) -> bool:
    """``settings[key]`` as a bool, else ``RaytraceError``."""
    value = settings.get(key, default)
    if value is None:
        return default
    if not isinstance(value, (bool, np.bool_)):
        raise RaytraceError(f"statistics.{stat}.{key}: must be true or false")
    return bool(value)


def increasing_edges(value: Any, key: str, stat: str) -> np.ndarray:
    """Validate a list of at least two finite, strictly increasing bin edges."""
    try:
        edges = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise RaytraceError(f"statistics.{stat}.{key}: must be a list of numbers") from None
    if edges.ndim != 1 or edges.size < 2:
        raise RaytraceError(f"statistics.{stat}.{key}: needs at least two edges")
    if not np.all(np.isfinite(edges)):
        raise RaytraceError(f"statistics.{stat}.{key}: must be finite")
    if np.any(np.diff(edges) <= 0):
        raise RaytraceError(f"statistics.{stat}.{key}: must be strictly increasing")
    return edges


def threshold_binning(settings: Mapping[str, Any], stat: str) -> str:
    """The binning variable, ``"nu"`` or ``"kappa"``."""
    binning = settings.get("binning", "nu")
    if binning is None:
        binning = "nu"
    if binning not in THRESHOLD_DEFAULTS:
        raise RaytraceError(f"statistics.{stat}.binning: must be 'kappa' or 'nu'")
    return str(binning)


def threshold_edges(settings: Mapping[str, Any], stat: str) -> tuple[str, np.ndarray]:
    """Binning variable and threshold bin edges from a statistic's settings.

    Parameters
    ----------
    settings : the ``statistics.<stat>`` section (keys ``binning``, ``edges``,
        ``min``, ``max``, ``bins``; see the module docstring for defaults).
    stat : name of the statistic, used in error messages.

    Returns
    -------
    binning : ``"nu"`` or ``"kappa"``.
    edges : (n_b + 1,) strictly increasing bin edges in units of the binning variable.
    """
    binning = threshold_binning(settings, stat)
    if settings.get("edges") is not None:
        return binning, increasing_edges(settings["edges"], "edges", stat)
    lo_default, hi_default, n_default = THRESHOLD_DEFAULTS[binning]
    lo = finite_float(settings, "min", lo_default, stat)
    hi = finite_float(settings, "max", hi_default, stat)
    n = positive_int(settings, "bins", n_default, stat)
    if not hi > lo:
        raise RaytraceError(f"statistics.{stat}.max: must exceed min")
    return binning, np.linspace(lo, hi, n + 1)


def threshold_scale(
    mapset: MapSet, index: int, binning: str, use: np.ndarray, use_key: Hashable | None = None
) -> float:
    """Divisor turning the map ``index`` into the binning variable.

    For ``kappa`` it is 1. For ``nu`` it is ``mapset.noise_sigma[index]`` when the maps
    carry a noise level; for noiseless maps (``noise_sigma`` None) it falls back to the
    standard deviation of the map itself over the pixels ``use``, so that ``nu`` is then
    the height in units of the map's own rms (the usual convention for Gaussian-field
    predictions). ``use_key`` names ``use`` for caching the rms per MapSet.
    """
    if binning == "kappa":
        return 1.0
    if mapset.noise_sigma is not None:
        sigma = float(np.asarray(mapset.noise_sigma, dtype=float)[index])
        if not (np.isfinite(sigma) and sigma > 0):
            raise ValueError(f"noise_sigma[{index}] = {sigma} is not a positive number")
        return sigma

    def compute() -> float:
        runs = None if use_key is None else cached_runs(mapset, use, use_key)
        _, var, n = masked_mean_var(mapset.maps[index], use, runs)
        return float(np.sqrt(var)) if n > 0 else 0.0

    sigma = compute() if use_key is None else MAPSET_CACHE.get(mapset, ("rms", index, use_key), compute)
    if not sigma > 0:
        raise ValueError(f"map {index} has zero rms over its valid pixels; cannot bin in nu")
    return sigma


def bin_labels(mapset: MapSet) -> tuple[str, ...]:
    """Source-bin labels, defaulting to "0", "1", ..."""
    return tuple(mapset.bin_labels) or tuple(str(i) for i in range(mapset.n_bins))


# --------------------------------------------------------------------------------------
# per-MapSet cache
# --------------------------------------------------------------------------------------
class MapSetCache:
    """Values derived from the most recent :class:`MapSet`, dropped when that MapSet dies.

    The measuring stage hands the same MapSet to every statistic at one smoothing scale;
    keeping derived arrays (derivatives, rms, analysis masks) under a weak reference to it
    lets statistics share them without holding memory past the MapSet's lifetime. The
    maps of a MapSet must not be modified in place while it is being measured.
    """

    def __init__(self) -> None:
        self._ref: weakref.ref | None = None
        self._data: dict = {}

    def get(self, mapset: MapSet, key: Hashable, compute: Callable[[], Any]) -> Any:
        current = self._ref() if self._ref is not None else None
        if current is not mapset:
            self._data = {}
            self._ref = weakref.ref(mapset, self._drop)
        if key not in self._data:
            self._data[key] = compute()
        return self._data[key]

    def _drop(self, ref: weakref.ref) -> None:
        if self._ref is ref:
            self._data = {}
            self._ref = None


MAPSET_CACHE = MapSetCache()


# --------------------------------------------------------------------------------------
# sums over selected pixels, walked as runs of consecutive selected pixels along rows
# (branch-free inner loops that the compiler can vectorise)
# --------------------------------------------------------------------------------------
def row_runs(use: np.ndarray) -> np.ndarray:
    """Runs of True pixels along the rows of ``use``.

    Returns
    -------
    (n_runs, 3) int64 array of (row, first column, one past the last column).
    """
    use = np.asarray(use, dtype=bool)
    ny, nx = use.shape
    if use.all():
        rows = np.arange(ny, dtype=np.int64)
        return np.stack([rows, np.zeros(ny, dtype=np.int64), np.full(ny, nx, dtype=np.int64)], axis=1)
    padded = np.zeros((ny, nx + 2), dtype=np.int8)
    padded[:, 1:-1] = use
    step = np.diff(padded, axis=1)
    r0, c0 = np.nonzero(step == 1)
    _, c1 = np.nonzero(step == -1)  # row-major order pairs each start with its end
    return np.stack([r0, c0, c1], axis=1).astype(np.int64)


def cached_runs(mapset: MapSet, use: np.ndarray, use_key: Hashable) -> np.ndarray:
    """:func:`row_runs` of ``use``, cached per MapSet under ``use_key``."""
    return MAPSET_CACHE.get(mapset, ("runs", use_key), lambda: row_runs(use))


@numba.njit(cache=True, fastmath=FAST_FLAGS)
def _run_mean_var(values, runs, shift):
    c0 = c1 = c2 = 0.0
    for r in range(runs.shape[0]):
        i = runs[r, 0]
        for j in range(runs[r, 1], runs[r, 2]):
            d = values[i, j] - shift
            c1 += d
            c2 += d * d
        c0 += runs[r, 2] - runs[r, 1]
    if c0 == 0.0:
        return shift, 0.0, c0
    m1 = c1 / c0
    return shift + m1, max(c2 / c0 - m1 * m1, 0.0), c0


def masked_mean_var(values: np.ndarray, use: np.ndarray, runs: np.ndarray | None = None) -> tuple[float, float, int]:
    """Mean and (population) variance of ``values[use]`` and the number of pixels.

    One pass over the pixels, with the sums taken about the mean of a sparse subsample so
    that a large common offset does not cancel catastrophically (common practice)."""
    values = np.ascontiguousarray(values, dtype=np.float64)
    use = np.asarray(use, dtype=bool)
    sub = values[::16, ::16][use[::16, ::16]]
    shift = float(sub.mean()) if sub.size else 0.0
    mean, var, n = _run_mean_var(values, row_runs(use) if runs is None else runs, shift)
    return float(mean), float(var), int(n)


@numba.njit(cache=True, inline="always")
def bin_index(v, edges, lo, inv_width, uniform):
    """Index k with edges[k] <= v < edges[k+1], or -1 outside; O(1) for uniform edges."""
    n_b = edges.size - 1
    if not (v >= lo and v < edges[n_b]):
        return -1
    if uniform:
        k = int((v - lo) * inv_width)
        # guard the rounding of the division at bin edges
        if k >= n_b:
            k = n_b - 1
        if v < edges[k]:
            k -= 1
        elif v >= edges[k + 1]:
            k += 1
        return k
    return np.searchsorted(edges, v, side="right") - 1


def edge_lookup(edges: np.ndarray) -> tuple[float, float, bool]:
    """(first edge, 1 / width, uniform?) for :func:`bin_index`."""
    widths = np.diff(edges)
    uniform = bool(np.allclose(widths, widths[0], rtol=1e-12, atol=0.0))
    return float(edges[0]), float(1.0 / widths[0]), uniform


@numba.njit(cache=True, fastmath=FAST_FLAGS)
def _histogram_runs(values, runs, edges, inv_scale, lo, inv_width, uniform):
    out = np.zeros(edges.size - 1)
    for r in range(runs.shape[0]):
        i = runs[r, 0]
        for j in range(runs[r, 1], runs[r, 2]):
            k = bin_index(values[i, j] * inv_scale, edges, lo, inv_width, uniform)
            if k >= 0:
                out[k] += 1.0
    return out


def histogram_selected(
    values: np.ndarray, use: np.ndarray, edges: np.ndarray, scale: float = 1.0, runs: np.ndarray | None = None
) -> np.ndarray:
    """Counts of ``values[use] / scale`` in the half-open bins ``[edges[k], edges[k+1])``.

    ``runs`` (from :func:`row_runs` of ``use``) may be passed to skip recomputing them."""
    values = np.ascontiguousarray(values, dtype=np.float64)
    edges = np.asarray(edges, dtype=np.float64)
    lo, inv_width, uniform = edge_lookup(edges)
    runs = row_runs(use) if runs is None else runs
    return _histogram_runs(values, runs, edges, 1.0 / float(scale), lo, inv_width, uniform)


@register
class PDF(Statistic):
    r"""One-point probability density of the convergence over the valid pixels.

    Settings: the threshold keys of :func:`threshold_edges` (``binning``, ``edges``,
    ``min``, ``max``, ``bins``). Measured at every smoothing scale.

    Returns
    -------
    Measurement
        ``bin_name`` ``"nu"`` or ``"kappa"``; one row per source bin (entry = bin label)
        holding the density :math:`p_k`; ``extra["fraction_outside"]`` (n_entries, n_b,
        constant along bins) is the fraction of valid pixels outside the binned range and
        ``extra["scale"]`` the divisor used for ``nu``.

    Notes
    -----
    With :math:`n_k` the number of valid pixels whose value falls in bin
    :math:`[x_k, x_{k+1})`, :math:`N` the number of valid pixels and
    :math:`\Delta_k = x_{k+1}-x_k`, the density is :math:`p_k = n_k/(N\Delta_k)`, so that
    :math:`\sum_k p_k\Delta_k` is the fraction of pixels inside the binned range (1 when
    the range covers the whole map). This is the histogram estimate of the one-point PDF
    (common practice). With ``binning: nu`` the variable is :math:`\nu=\kappa/\sigma`,
    :math:`\sigma` the per-pixel noise rms, or the map's own rms for noiseless maps (see
    :func:`threshold_scale`).
    """

    name = "pdf"
    smoothed = True

    def measure(self, mapset: MapSet) -> Measurement:
        binning, edges = threshold_edges(self.settings, self.name)
        use = np.asarray(mapset.mask, dtype=bool)
        n_valid = int(use.sum())
        widths = np.diff(edges)
        rows, outside, scales = [], [], []
        for i in range(mapset.n_bins):
            scale = threshold_scale(mapset, i, binning, use, "mask")
            counts = histogram_selected(mapset.maps[i], use, edges, scale, cached_runs(mapset, use, "mask"))
            rows.append(counts / (max(n_valid, 1) * widths))
            outside.append(1.0 - counts.sum() / max(n_valid, 1))
            scales.append(scale)
        n_b = edges.size - 1
        return Measurement(
            bin_name=binning,
            bin_centers=0.5 * (edges[1:] + edges[:-1]),
            values=np.array(rows),
            entries=list(bin_labels(mapset)),
            bin_edges=edges,
            bin_unit="1",
            unit="1",
            extra={
                "fraction_outside": np.repeat(np.array(outside)[:, None], n_b, axis=1),
                "scale": np.repeat(np.array(scales)[:, None], n_b, axis=1),
            },
        )
