"""Peak counts: local maxima of the convergence, per unit valid area, in height bins.

Shared with :mod:`.minima` through :func:`local_extrema` and :class:`ExtremaStatistic`.
"""

from __future__ import annotations

import numpy as np

from . import MapSet, Measurement, Statistic, register
from .pdf import bin_labels, threshold_edges, threshold_scale


_BLOCK_ROWS = 64


def eligible_pixels(mask: np.ndarray) -> np.ndarray:
    """Pixels that can host an extremum: not on the map edge, whole 3x3 block valid.

    Parameters
    ----------
    mask : (P, P) bool, True where valid.

    Returns
    -------
    (P - 2, P - 2) bool array for the interior pixels ``[1:-1, 1:-1]``.
    """
    mask = np.asarray(mask, dtype=bool)
    if mask.all():
        return np.ones((mask.shape[0] - 2, mask.shape[1] - 2), dtype=bool)
    ny, nx = mask.shape
    ok = mask[1:-1, 1:-1].copy()
    for dy in (0, 1, 2):
        for dx in (0, 1, 2):
            if dy == 1 and dx == 1:
                continue
            ok &= mask[dy : ny - 2 + dy, dx : nx - 2 + dx]
    return ok


def local_extrema(field: np.ndarray, eligible: np.ndarray, kind: str = "max") -> np.ndarray:
    r"""Strict local maxima (or minima) over the 8 neighbours, by array shifts.

    Parameters
    ----------
    field : (P, P) map.
    eligible : (P - 2, P - 2) bool from :func:`eligible_pixels`.
    kind : ``"max"`` or ``"min"``.

    Returns
    -------
    (P - 2, P - 2) bool, True at the interior pixels that are extrema.

    Notes
    -----
    A pixel is a maximum when it exceeds all 8 neighbours, i.e. exceeds their maximum.
    That maximum is built separably: the 3-wide running maximum along x of the rows above
    and below, and the maximum of the left and right neighbours in the pixel's own row —
    five elementwise operations instead of eight comparisons (common practice).
    """
    a = np.asarray(field)
    op = np.maximum if kind == "max" else np.minimum
    beyond = np.greater if kind == "max" else np.less
    ny, nx = a.shape
    found = np.empty((ny - 2, nx - 2), dtype=bool)
    # blocks of rows keep the temporaries in cache; each block is fully vectorised
    for r0 in range(0, ny - 2, _BLOCK_ROWS):
        r1 = min(r0 + _BLOCK_ROWS, ny - 2)
        blk = a[r0 : r1 + 2]
        sides = op(blk[:, :-2], blk[:, 2:])
        run3 = op(sides, blk[:, 1:-1])
        neighbours = op(run3[:-2], run3[2:])
        op(neighbours, sides[1:-1], out=neighbours)
        beyond(blk[1:-1, 1:-1], neighbours, out=found[r0:r1])
    found &= eligible
    return found


def bin_counts(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Counts of ``values`` in the half-open bins ``[edges[k], edges[k+1])``."""
    idx = np.searchsorted(edges, values, side="right") - 1
    inside = (idx >= 0) & (idx < edges.size - 1)
    return np.bincount(idx[inside], minlength=edges.size - 1).astype(float)


class ExtremaStatistic(Statistic):
    """Number density of local maxima or minima per deg^2 of usable area, in height bins."""

    kind = "max"

    def measure(self, mapset: MapSet) -> Measurement:
        binning, edges = threshold_edges(self.settings, self.name)
        mask = np.asarray(mapset.mask, dtype=bool)
        eligible = eligible_pixels(mask)
        area_deg2 = float(eligible.sum()) * (mapset.pixel_arcmin / 60.0) ** 2
        n_b = edges.size - 1
        rows, counts_all, totals = [], [], []
        for i in range(mapset.n_bins):
            field = mapset.maps[i]
            scale = threshold_scale(mapset, i, binning, mask, "mask")
            found = local_extrema(field, eligible, self.kind)
            heights = field[1:-1, 1:-1][found] / scale
            counts = bin_counts(heights, edges)
            counts_all.append(counts)
            totals.append(float(found.sum()))
            rows.append(counts / area_deg2 if area_deg2 > 0 else np.full(n_b, np.nan))
        n_e = mapset.n_bins
        return Measurement(
            bin_name=binning,
            bin_centers=0.5 * (edges[1:] + edges[:-1]),
            values=np.array(rows),
            entries=list(bin_labels(mapset)),
            bin_edges=edges,
            bin_unit="1",
            unit="deg^-2",
            extra={
                "counts": np.array(counts_all),
                "area_deg2": np.full((n_e, n_b), area_deg2),
                "total_all_heights": np.repeat(np.array(totals)[:, None], n_b, axis=1),
            },
        )


@register
class Peaks(ExtremaStatistic):
    r"""Peak counts: local maxima of each source bin's map, per deg^2, in height bins.

    Settings: the threshold keys ``binning`` (``nu`` | ``kappa``, default ``nu``),
    ``edges`` or ``min``/``max``/``bins`` (see :func:`.pdf.threshold_edges`). With
    ``nu``, heights are divided by the noise rms, or by the map's own rms when the maps
    are noiseless.

    Returns
    -------
    Measurement
        One row per source bin (entry = bin label): the number of maxima with height in
        each bin per deg^2 of usable area (not divided by the bin width). ``extra``:
        ``counts`` (raw numbers), ``area_deg2`` (usable area), ``total_all_heights``
        (maxima at any height).

    Notes
    -----
    A pixel is a peak when its value exceeds those of its 8 neighbours. Pixels on the map
    edge or with a masked pixel among the 9 of their 3x3 block are not considered; the
    usable area is the number of remaining pixels times the pixel area, so the density is
    unbiased by the mask. Peaks are counted on each source bin's own map; peaks of maps
    combining source bins (cross-bin peaks) are not computed. For a Gaussian field the
    expected density per unit height :math:`\nu` is (Bond & Efstathiou 1987)

    .. math:: n_{\rm pk}(\nu)=\frac{1}{(2\pi)^{3/2}\theta_*^2}e^{-\nu^2/2}G(\gamma,\gamma\nu),
       \qquad \theta_*^2=2\sigma_1^2/\sigma_2^2,\quad\gamma=\sigma_1^2/(\sigma_0\sigma_2),

    with total :math:`n_{\rm pk}=\sigma_2^2/(8\sqrt3\,\pi\sigma_1^2)` and
    :math:`G(\gamma,x)=(x^2-\gamma^2)\bigl[1-\tfrac12{\rm erfc}\bigl(x/\sqrt{2(1-\gamma^2)}\bigr)\bigr]
    +\frac{x(1-\gamma^2)}{\sqrt{2\pi(1-\gamma^2)}}e^{-x^2/(2(1-\gamma^2))}
    +\frac{e^{-x^2/(3-2\gamma^2)}}{\sqrt{3-2\gamma^2}}\bigl[1-\tfrac12{\rm erfc}
    \bigl(x/\sqrt{2(1-\gamma^2)(3-2\gamma^2)}\bigr)\bigr]`.

    References
    ----------
    Bond J. R., Efstathiou G., 1987, MNRAS, 226, 655, "The statistics of cosmic
    background radiation fluctuations".
    """

    name = "peaks"
    smoothed = True
    kind = "max"
