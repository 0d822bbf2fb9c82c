"""Minkowski functionals V0, V1, V2 of the excursion sets of convergence maps."""

from __future__ import annotations

import numba
import numpy as np

from . import MapSet, Measurement, Statistic, register
from .moments import derivative_settings, map_analysis_mask, map_derivatives
from .pdf import (
    FAST_FLAGS,
    bin_index,
    bin_labels,
    cached_runs,
    edge_lookup,
    row_runs,
    threshold_edges,
    threshold_scale,
)


@numba.njit(cache=True, fastmath=FAST_FLAGS)
def _minkowski_sums(u, ux, uy, uxx, uyy, uxy, inv_scale, runs, edges, lo, inv_width, uniform):
    n_b = edges.size - 1
    counts = np.zeros(n_b)
    value_sum = np.zeros(n_b)
    grad_sum = np.zeros(n_b)
    curv_sum = np.zeros(n_b)
    n_used = 0.0
    n_above = 0.0
    hi = edges[n_b]
    nx = u.shape[1]
    v_run = np.empty(nx)
    g_run = np.empty(nx)
    c_run = np.empty(nx)
    for r in range(runs.shape[0]):
        i = runs[r, 0]
        start = runs[r, 1]
        m = runs[r, 2] - start
        n_used += m
        # pass 1 over the run: branch-free pointwise integrands (vectorisable); the
        # curvature numerator vanishes with the gradient, so max() only guards 0/0
        for t in range(m):
            j = start + t
            gx = ux[i, j] * inv_scale
            gy = uy[i, j] * inv_scale
            g2 = gx * gx + gy * gy
            v_run[t] = u[i, j] * inv_scale
            g_run[t] = np.sqrt(g2)
            c_run[t] = (
                (2.0 * gx * gy * uxy[i, j] - gx * gx * uyy[i, j] - gy * gy * uxx[i, j]) * inv_scale / max(g2, 1e-300)
            )
        # pass 2: accumulate into the threshold bins
        for t in range(m):
            v = v_run[t]
            if v >= hi:
                n_above += 1.0
                continue
            k = bin_index(v, edges, lo, inv_width, uniform)
            if k < 0:
                continue
            counts[k] += 1.0
            value_sum[k] += v
            grad_sum[k] += g_run[t]
            curv_sum[k] += c_run[t]
    return counts, value_sum, grad_sum, curv_sum, n_used, n_above


def minkowski_functionals(
    field: np.ndarray,
    derivatives: dict[str, np.ndarray],
    use: np.ndarray,
    edges: np.ndarray,
    scale: float = 1.0,
    runs: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    r"""Bin-averaged Minkowski functionals of the excursion sets of ``field / scale``.

    Parameters
    ----------
    field : (P, P) map.
    derivatives : its derivatives ``"x"``, ``"y"``, ``"xx"``, ``"yy"``, ``"xy"``
        (rad^-1, rad^-2), e.g. from :func:`.moments.spectral_derivatives`.
    use : (P, P) bool, the pixels making up the area :math:`A`.
    edges : (n_b + 1,) threshold bin edges in units of ``field / scale``.
    scale : divisor of the field (1 for kappa, the rms for nu).
    runs : optional :func:`.pdf.row_runs` of ``use``.

    Returns
    -------
    v0, v1, v2 : (n_b,) each; V1 in rad^-1, V2 in rad^-2.
    n_used : number of pixels in :math:`A`.

    Notes
    -----
    With :math:`u=\kappa/s`, the integral estimators of Schmalzing & Buchert (1997) are

    .. math::
        V_0(\nu)=\frac1A\int_A\Theta(u-\nu)\,dA,\qquad
        V_1(\nu)=\frac1{4A}\int_A\delta_D(u-\nu)\,|\nabla u|\,dA,

        V_2(\nu)=\frac1{2\pi A}\int_A\delta_D(u-\nu)\,
        \frac{2u_xu_yu_{xy}-u_x^2u_{yy}-u_y^2u_{xx}}{u_x^2+u_y^2}\,dA .

    The delta function is replaced by the top hat :math:`1/\Delta_k` over the bin
    :math:`[\nu_k,\nu_{k+1})`, which makes :math:`V_1,V_2` the exact averages of the
    functionals over the bin. For the same meaning, :math:`V_0` is also averaged over the
    bin: :math:`\bar V_{0,k}=\frac1{N\Delta_k}\sum_p\min(\max(u_p-\nu_k,0),\Delta_k)`.
    V1 and V2 are invariant under rescaling of the field, so only the binning variable
    depends on ``scale``.

    References
    ----------
    Schmalzing J., Buchert T., 1997, ApJ, 482, L1, "Beyond genus statistics: a unifying
    approach to the morphology of cosmic structure".
    """
    edges = np.asarray(edges, dtype=np.float64)
    counts, value_sum, grad_sum, curv_sum, n, n_above = _minkowski_sums(
        np.ascontiguousarray(field, dtype=np.float64),
        np.ascontiguousarray(derivatives["x"]),
        np.ascontiguousarray(derivatives["y"]),
        np.ascontiguousarray(derivatives["xx"]),
        np.ascontiguousarray(derivatives["yy"]),
        np.ascontiguousarray(derivatives["xy"]),
        1.0 / float(scale),
        row_runs(use) if runs is None else runs,
        edges,
        *edge_lookup(edges),
    )
    n_b = edges.size - 1
    if n == 0:
        nan = np.full(n_b, np.nan)
        return nan, nan.copy(), nan.copy(), 0
    widths = np.diff(edges)
    # pixels at or above the upper edge of each bin
    above = n_above + np.concatenate([np.cumsum(counts[::-1])[::-1][1:], [0.0]])
    v0 = above / n + (value_sum - counts * edges[:-1]) / (n * widths)
    v1 = grad_sum / (4.0 * n * widths)
    v2 = curv_sum / (2.0 * np.pi * n * widths)
    return v0, v1, v2, int(n)


@register
class Minkowski(Statistic):
    r"""Minkowski functionals V0 (area), V1 (boundary length), V2 (Euler characteristic).

    Settings: the threshold keys ``binning`` (``nu`` | ``kappa``, default ``nu``),
    ``edges`` or ``min``/``max``/``bins``; and the derivative keys ``margin_arcmin``
    (default twice the smoothing scale, at least 3 pixels) and ``periodic`` (default
    false). Derivatives are taken by FFT (:func:`.moments.spectral_derivatives`) and only
    valid pixels away from mask edges are used (:func:`.moments.analysis_mask`). With
    ``binning: nu`` on noiseless maps, the rms dividing the field is taken over those
    same pixels.

    Returns
    -------
    Measurement
        Rows ``"V0:<bin label>"``, ..., then ``"V1:..."`` and ``"V2:..."``, each over the
        threshold bins; values are bin averages (see :func:`minkowski_functionals`),
        V0 dimensionless, V1 in rad^-1, V2 in rad^-2. ``extra["n_pixels"]`` is the
        number of pixels used.

    Notes
    -----
    For a Gaussian field (Tomita 1986), with :math:`\sigma_1^2=\langle|\nabla\kappa|^2\rangle`,
    :math:`V_0=\tfrac12{\rm erfc}(\nu/\sqrt2)`,
    :math:`V_1=\frac{1}{8}\frac{\sigma_1}{\sqrt2\sigma_0}e^{-\nu^2/2}`,
    :math:`V_2=\frac{1}{(2\pi)^{3/2}}\frac{\sigma_1^2}{2\sigma_0^2}\nu e^{-\nu^2/2}`.

    References
    ----------
    Schmalzing J., Buchert T., 1997, ApJ, 482, L1.
    Tomita H., 1986, Prog. Theor. Phys., 76, 952, "Curvature invariants of random
    interface generated by Gaussian fields".
    """

    name = "minkowski"
    smoothed = True

    def measure(self, mapset: MapSet) -> Measurement:
        binning, edges = threshold_edges(self.settings, self.name)
        margin_pix, periodic = derivative_settings(self.settings, self.name, mapset)
        use = map_analysis_mask(mapset, margin_pix, periodic)
        labels = bin_labels(mapset)
        n_b = edges.size - 1
        v = np.empty((3, len(labels), n_b))
        n_used = np.zeros(len(labels))
        for i in range(mapset.n_bins):
            scale = threshold_scale(mapset, i, binning, use, ("analysis", margin_pix, periodic))
            d = map_derivatives(mapset, i)
            runs = cached_runs(mapset, use, ("analysis", margin_pix, periodic))
            v[0, i], v[1, i], v[2, i], n_used[i] = minkowski_functionals(mapset.maps[i], d, use, edges, scale, runs)
        entries = [f"V{k}:{label}" for k in range(3) for label in labels]
        return Measurement(
            bin_name=binning,
            bin_centers=0.5 * (edges[1:] + edges[:-1]),
            values=v.reshape(3 * len(labels), n_b),
            entries=entries,
            bin_edges=edges,
            bin_unit="1",
            unit="V0: 1, V1: rad^-1, V2: rad^-2",
            extra={"n_pixels": np.repeat(np.tile(n_used, 3)[:, None], n_b, axis=1)},
        )
