"""The measure stage's files, shared by the flat and the full-sky branches.

:func:`read_observed` reads an observe-stage file (the same layout on both geometries, with
[map, pixel] arrays on the sphere) and :func:`write_measurements` writes one statistics file:
a group per statistic, a subgroup per smoothing scale (:func:`scale_label`) with ``values``
[entry, bin], ``bin_centers``, ``bin_edges`` and the statistic's extra arrays.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping, Sequence

import numpy as np

from .errors import RaytraceError

#: datasets every observe-stage file has
OBSERVED_KEYS = ("kappa", "kappa_smoothed", "mask", "noise_sigma")


def scale_label(smoothing_arcmin: float) -> str:
    """Group name of one smoothing scale in a statistics file."""
    return "unsmoothed" if smoothing_arcmin == 0 else f"smoothing_{smoothing_arcmin:g}arcmin"


@dataclass
class ObservedMaps:
    """The arrays of one observe-stage file and the attributes the statistics need."""

    kappa: np.ndarray  # [map, ...] float64
    smoothed: np.ndarray  # [scale, map, ...] float64
    mask: np.ndarray  # bool
    noise_sigma: np.ndarray
    noise_sigma_smoothed: np.ndarray
    scales: list[float]
    labels: tuple[str, ...]
    attrs: dict[str, Any] = field(default_factory=dict)

    def map_sets(self, make: Callable[[np.ndarray, float, np.ndarray | None], Any]) -> tuple[Any, list]:
        """(unsmoothed set, one set per smoothing scale) built by ``make(maps, scale, noise)``.

        ``noise`` is None for noiseless maps. Statistics of smoothed maps run at every scale, on
        the unsmoothed maps when no scale is configured.
        """
        def noise(sigma):
            return sigma if np.any(sigma > 0) else None

        unsmoothed = make(self.kappa, 0.0, noise(self.noise_sigma))
        smoothed = [make(self.smoothed[i], s, noise(self.noise_sigma_smoothed[i])) for i, s in enumerate(self.scales)]
        return unsmoothed, smoothed or [unsmoothed]


def write_observed(f, noisy: Mapping[str, np.ndarray], smoothed: np.ndarray, mask: np.ndarray, sigma: np.ndarray,
                   sigma_smoothed: np.ndarray, *, pixel_axes: str, labels: Sequence[str], scales: Sequence[float],
                   kernel: str, mask_parts: Mapping[str, float]) -> None:
    """Write the arrays and shared attributes of an observe-stage file into the open HDF5 file
    ``f`` (both geometries; ``pixel_axes`` is ``"iy, ix"`` or ``"pixel"``). The reader is
    :func:`read_observed`; each geometry adds its own attributes."""
    from .hdf5 import write_dataset

    for key, value in noisy.items():
        write_dataset(f, key, value.astype(np.float32), "1", axes=f"[map, {pixel_axes}]")
    write_dataset(f, "kappa_smoothed", smoothed.astype(np.float32), "1", axes=f"[scale, map, {pixel_axes}]")
    write_dataset(f, "mask", mask.astype(np.uint8), "1", description="1 where the pixel is observed")
    write_dataset(f, "noise_sigma", sigma, "1", axes="[map]")
    write_dataset(f, "noise_sigma_smoothed", sigma_smoothed, "1", axes="[scale, map]")
    f.attrs["smoothing_arcmin"] = np.asarray(scales, dtype=float)
    f.attrs["smoothing_kernel"] = kernel
    f.attrs["valid_fraction"] = float(mask.mean())
    f.attrs["mask_parts"] = json.dumps(dict(mask_parts))
    f.attrs["map_labels"] = json.dumps(list(labels))


def read_observed(path: str | Path, attrs: Iterable[str] = ()) -> ObservedMaps:
    """Read an observe-stage file; a missing dataset is an error naming the file."""
    from .hdf5 import open_input

    with open_input(path) as f:
        for key in OBSERVED_KEYS:
            if key not in f:
                raise RaytraceError(f"{path}: no {key} dataset (not a file of the observe stage)")
        return ObservedMaps(
            kappa=f["kappa"][...].astype(np.float64),
            smoothed=f["kappa_smoothed"][...].astype(np.float64),
            mask=f["mask"][...].astype(bool),
            noise_sigma=f["noise_sigma"][...],
            noise_sigma_smoothed=f["noise_sigma_smoothed"][...],
            scales=[float(x) for x in f.attrs["smoothing_arcmin"]],
            labels=tuple(json.loads(f.attrs["map_labels"])),
            attrs={key: f.attrs[key] for key in attrs},
        )


def write_measurements(output: str | Path, settings: Mapping[str, Any], source: str | Path, labels: tuple[str, ...],
                       unsmoothed: Any, smoothed: list, measure: Callable[[str, Mapping], tuple[bool, Callable]],
                       log: Callable[[str], None] = lambda s: None, file_attrs: Mapping[str, Any] | None = None) -> None:
    """Measure every statistic of ``settings["statistics"]`` and write the statistics file.

    ``measure(name, statistic_settings)`` returns (runs per smoothing scale, function of a
    map set returning a :class:`raytrace.statistics.Measurement`).
    """
    from .hdf5 import atomic_h5, write_dataset

    with atomic_h5(output, stage="measure", settings=settings, inputs=[source]) as out:
        out.attrs["map_labels"] = json.dumps(labels)
        for key, value in (file_attrs or {}).items():
            out.attrs[key] = value
        for name, stat_settings in settings["statistics"].items():
            per_scale, fn = measure(name, stat_settings or {})
            group = out.create_group(name)
            for ms in smoothed if per_scale else [unsmoothed]:
                result = fn(ms)
                g = group.create_group(scale_label(ms.smoothing_arcmin))
                g.attrs["smoothing_arcmin"] = ms.smoothing_arcmin
                write_dataset(g, "values", result.values, result.unit, axes="[entry, bin]")
                write_dataset(g, "bin_centers", result.bin_centers, result.bin_unit, quantity=result.bin_name)
                if result.bin_edges is not None:
                    write_dataset(g, "bin_edges", result.bin_edges, result.bin_unit)
                g.attrs["entries"] = json.dumps(result.entries)
                g.attrs["bin_name"] = result.bin_name
                for key, value in result.extra.items():
                    write_dataset(g, key, np.asarray(value), "1")
            log(f"{name}: {len(result.entries)} entries x {len(result.bin_centers)} bins"
                f" at {len(group)} smoothing scale(s)")
