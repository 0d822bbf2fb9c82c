"""Summary statistics of observed convergence maps, behind a small registry.

A statistic is one module in this package that defines a subclass of :class:`Statistic`
decorated with :func:`register`. The measuring stage calls :meth:`Statistic.measure`
once per smoothing scale (or once on the unsmoothed maps when ``smoothed`` is False)
with a :class:`MapSet`, and stores the returned :class:`Measurement` as a labelled
data vector. Adding a statistic means: one module here, its import in ``_MODULES``,
one entry under ``statistics`` in ``config/schema.yaml``, and one test.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass, field
from typing import Any, ClassVar, Mapping

import numpy as np

from ..errors import RaytraceError


@dataclass(frozen=True)
class MapSet:
    """The maps one statistic sees at one smoothing scale.

    Attributes
    ----------
    maps : (n_bins, P, P) float array, observed convergence per source bin.
        Axis 1 is the map's y direction, axis 2 its x direction.
    mask : (P, P) bool array, True where a pixel is valid (observed).
    pixel_arcmin : side of a square pixel in arcmin.
    smoothing_arcmin : smoothing scale applied to ``maps`` (0 for none).
    noise_sigma : (n_bins,) rms of the shape noise per pixel at this smoothing scale,
        or None for noiseless maps. Used for signal-to-noise (nu) binning.
    bin_labels : label of each source bin (e.g. "z0.50" or "bin0").
    """

    maps: np.ndarray
    mask: np.ndarray
    pixel_arcmin: float
    smoothing_arcmin: float = 0.0
    noise_sigma: np.ndarray | None = None
    bin_labels: tuple[str, ...] = ()

    @property
    def pixel_rad(self) -> float:
        return np.deg2rad(self.pixel_arcmin / 60.0)

    @property
    def n_bins(self) -> int:
        return self.maps.shape[0]


@dataclass
class Measurement:
    """A labelled data vector of one statistic at one smoothing scale.

    Attributes
    ----------
    bin_name : what the bins run over ("ell", "kappa", "nu", ...).
    bin_centers : (n_b,) centre of each bin, in ``bin_unit``.
    values : (n_entries, n_b) the statistic; one row per entry.
    entries : label of each row, e.g. "z0.50", "z0.50xz1.00", "V1:z1.00".
    bin_edges : (n_b + 1,) bin edges if the bins are intervals.
    unit : unit of ``values``.
    extra : further arrays worth keeping (e.g. mode counts), each (n_entries, n_b) or (n_b,).
    """

    bin_name: str
    bin_centers: np.ndarray
    values: np.ndarray
    entries: list[str]
    bin_edges: np.ndarray | None = None
    bin_unit: str = "1"
    unit: str = "1"
    extra: dict[str, np.ndarray] = field(default_factory=dict)


class Statistic:
    """Base class: subclasses set ``name`` and ``smoothed`` and implement ``measure``."""

    name: ClassVar[str] = ""
    #: measured at every smoothing scale (True) or once on the unsmoothed maps (False)
    smoothed: ClassVar[bool] = True

    def __init__(self, settings: Mapping[str, Any]):
        self.settings = dict(settings)

    def measure(self, mapset: MapSet) -> Measurement:  # pragma: no cover - interface
        raise NotImplementedError


_REGISTRY: dict[str, type[Statistic]] = {}
_MODULES = ("power_spectrum", "pdf", "moments", "peaks", "minima", "minkowski", "bispectrum")


def register(cls: type[Statistic]) -> type[Statistic]:
    """Class decorator adding a statistic to the registry under ``cls.name``."""
    if not cls.name:
        raise ValueError(f"{cls.__name__} has no name")
    if cls.name in _REGISTRY and _REGISTRY[cls.name] is not cls:
        raise ValueError(f"statistic {cls.name!r} registered twice")
    _REGISTRY[cls.name] = cls
    return cls


def _load_all() -> None:
    for module in _MODULES:
        importlib.import_module(f"{__name__}.{module}")


def available() -> list[str]:
    """Names of all registered statistics."""
    _load_all()
    return sorted(_REGISTRY)


def build(name: str, settings: Mapping[str, Any]) -> Statistic:
    """Instantiate the statistic ``name`` with its configuration section."""
    _load_all()
    try:
        cls = _REGISTRY[name]
    except KeyError:
        raise RaytraceError(f"statistics.{name}: unknown statistic (known: {', '.join(sorted(_REGISTRY))})") from None
    return cls(settings)


def pair_labels(labels: tuple[str, ...], cross: bool) -> list[tuple[int, int, str]]:
    """Index pairs (i, j) with i <= j and their labels; only autos when ``cross`` is False."""
    out = []
    for i, a in enumerate(labels):
        for j in range(i, len(labels)):
            if j == i:
                out.append((i, i, a))
            elif cross:
                out.append((i, j, f"{a}x{labels[j]}"))
    return out
