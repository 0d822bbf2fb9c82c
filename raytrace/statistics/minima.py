"""Minimum counts: local minima of the convergence, per unit valid area, in height bins."""

from __future__ import annotations

from . import register
from .peaks import ExtremaStatistic


@register
class Minima(ExtremaStatistic):
    r"""Local minima of each source bin's map, per deg^2 of usable area, in height bins.

    Settings and output as for :class:`.peaks.Peaks` (``binning``, ``edges`` or
    ``min``/``max``/``bins``; one row per source bin, entry = bin label, values per
    deg^2; ``extra`` ``counts``, ``area_deg2``, ``total_all_heights``).

    Notes
    -----
    A pixel is a minimum when its value is below those of its 8 neighbours; pixels on the
    map edge or next to a masked pixel are excluded as for peaks, and minima are counted
    per source bin only (no cross-bin minima). For a Gaussian field the density of minima
    at height :math:`\nu` equals the peak density at :math:`-\nu` (symmetry of the field
    under :math:`\kappa\to-\kappa`; Bond & Efstathiou 1987).

    References
    ----------
    Bond J. R., Efstathiou G., 1987, MNRAS, 226, 655.
    """

    name = "minima"
    smoothed = True
    kind = "min"
