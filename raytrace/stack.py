"""The stack stage: every realisation of one model as one labelled table.

A statistics file (measure stage) holds one group per statistic and one subgroup per
smoothing scale, each with ``values`` [entry, bin]. Stacking flattens them (statistics
and smoothing groups in the file's alphabetical order, then entry, then bin), into one data vector per realisation
(elements undefined by construction, NaN in every realisation, are left out),
labelled by :data:`raytrace.forecast.LABEL_FIELDS` (statistic, entry, smoothing scale,
bin centre), and stores the table with its mean, covariance and correlation.

Layout of a stack file::

    values          [realization, element]  every realisation's data vector
    realizations    [realization]           realisation index (the pairing seed across models)
    labels/statistic, labels/entry, labels/smoothing_arcmin, labels/center   [element]
    labels/bin_name [element]               what ``center`` is (ell, nu, moment ...)
    mean, std       [element]
    covariance, correlation   [element, element]  (N - 1 normalised; NaN correlation for constant elements)
    attrs: model, n_realizations
"""

from __future__ import annotations

import json
import re
import warnings
from pathlib import Path
from typing import Sequence

import h5py
import numpy as np

from .errors import RaytraceError
from .forecast import DataTable, ensemble_summary, make_labels

_REALIZATION = re.compile(r"r(\d+)\.h5$")
_STR = h5py.string_dtype()


def _elements(f, path: str):
    """(values, statistic, entry, smoothing, center, bin_name) columns of one statistics file."""
    vals, stat, entry, smooth, center, bin_name = [], [], [], [], [], []
    for name in f:
        group = f[name]
        for sub in group:
            g = group[sub]
            if "values" not in g or "entries" not in g.attrs:
                raise RaytraceError(f"{path}: {name}/{sub} is not a statistics group (no values or entries)")
            v = np.asarray(g["values"][...], dtype=float)
            entries = json.loads(g.attrs["entries"])
            centers = np.asarray(g["bin_centers"][...], dtype=float) if "bin_centers" in g else np.zeros(v.shape[1])
            if v.ndim != 2 or v.shape != (len(entries), centers.size):
                raise RaytraceError(f"{path}: {name}/{sub}: values of shape {v.shape} for "
                                    f"{len(entries)} entries and {centers.size} bins")
            s = float(g.attrs.get("smoothing_arcmin", 0.0))
            n_e, n_b = v.shape
            vals.append(v.ravel())
            stat += [name] * (n_e * n_b)
            entry += [e for e in entries for _ in range(n_b)]
            smooth += [s] * (n_e * n_b)
            center += list(np.tile(centers, n_e))
            bin_name += [str(g.attrs.get("bin_name", ""))] * (n_e * n_b)
    if not vals:
        raise RaytraceError(f"{path}: no statistics in the file")
    return np.concatenate(vals), stat, entry, smooth, center, bin_name


def realization_of(path: str | Path) -> int:
    """Realisation index from a statistics file name ``r<index>.h5``."""
    m = _REALIZATION.search(str(path))
    if not m:
        raise RaytraceError(f"{path}: file name does not end in r<realisation>.h5")
    return int(m.group(1))


def read_statistics(paths: Sequence[str | Path], model: str = "data") -> tuple[DataTable, list[str]]:
    """Read the statistics files of one model into a :class:`DataTable`.

    Returns
    -------
    table : values [realization, element], labels, seeds = realisation indices.
    bin_names : what the bin centre of each element is.
    """
    from .hdf5 import open_input

    if not paths:
        raise RaytraceError(f"{model}: no statistics files to stack")
    rows, seeds, first = [], [], None
    for path in paths:
        with open_input(path) as f:
            values, *cols = _elements(f, str(path))
        if first is None:
            first, first_path = cols, path
        elif cols[:3] != first[:3] or not np.allclose(cols[3], first[3], equal_nan=True):
            raise RaytraceError(f"{path}: its statistics, entries or bins differ from those of {first_path}")
        rows.append(values)
        seeds.append(realization_of(path))
    values = np.array(rows)
    finite = np.isfinite(values)
    # elements undefined by construction (a bispectrum bin without triangles) are NaN in
    # every realisation and are left out; NaN anywhere else is an error of that file
    defined = finite.any(axis=0)
    partial = defined & ~finite.all(axis=0)
    if partial.any():
        bad = int(np.flatnonzero(~finite[:, partial].all(axis=1))[0])
        raise RaytraceError(f"{paths[bad]}: non-finite statistics where other realisations have values")
    stat, entry, smooth, center, bin_name = (np.asarray(c, dtype=object)[defined] for c in first)
    table = DataTable(values[:, defined], make_labels(list(stat), list(entry), list(smooth), list(center)),
                      np.array(seeds), name=model)
    return table, list(bin_name)


def write_stack(path: str | Path, table: DataTable, bin_names: Sequence[str], *, model: str,
                inputs: Sequence[str] = ()) -> None:
    """Write a stack file (layout in the module docstring), atomically."""
    from .hdf5 import atomic_h5, write_dataset

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # constant elements: NaN correlation, reported by the forecast
        summary = ensemble_summary(table) if table.n_realizations >= 2 else None
    with atomic_h5(path, stage="stack", settings={"model": model}, inputs=inputs) as f:
        write_dataset(f, "values", table.values, "1", axes="[realization, element]")
        write_dataset(f, "realizations", np.asarray(table.seeds, dtype=np.int64), "1")
        g = f.create_group("labels")
        for key in ("statistic", "entry"):
            g.create_dataset(key, data=np.asarray(table.labels[key], dtype=object), dtype=_STR)
        write_dataset(g, "smoothing_arcmin", table.labels["smoothing_arcmin"], "arcmin")
        write_dataset(g, "center", table.labels["center"], "1", description="bin centre (see bin_name)")
        g.create_dataset("bin_name", data=np.asarray(bin_names, dtype=object), dtype=_STR)
        if summary is not None:
            write_dataset(f, "mean", summary.mean, "1")
            write_dataset(f, "std", np.sqrt(np.diag(summary.covariance)), "1")
            write_dataset(f, "covariance", summary.covariance, "1", axes="[element, element]")
            write_dataset(f, "correlation", summary.correlation, "1", axes="[element, element]")
        else:
            write_dataset(f, "mean", table.values.mean(axis=0), "1")
        f.attrs["model"] = model
        f.attrs["n_realizations"] = table.n_realizations


def read_stack(path: str | Path) -> tuple[DataTable, list[str]]:
    """A stack file back as (:class:`DataTable`, bin names)."""
    from .hdf5 import open_input

    with open_input(path) as f:
        for key in ("values", "realizations", "labels"):
            if key not in f:
                raise RaytraceError(f"{path}: no {key} (not a file of the stack stage)")
        g = f["labels"]
        labels = make_labels(
            [s.decode() if isinstance(s, bytes) else s for s in g["statistic"][...]],
            [s.decode() if isinstance(s, bytes) else s for s in g["entry"][...]],
            g["smoothing_arcmin"][...], g["center"][...],
        )
        bin_names = [s.decode() if isinstance(s, bytes) else s for s in g["bin_name"][...]]
        model = str(f.attrs.get("model", Path(path).stem))
        table = DataTable(f["values"][...], labels, f["realizations"][...], name=model)
    return table, bin_names


def entry_maps(entry: str) -> tuple[str, ...]:
    """The maps an entry involves: ``"V0:bin0"`` -> (bin0,), ``"z0.50xbin1"`` -> (z0.50, bin1)."""
    return tuple(entry.rsplit(":", 1)[-1].split("x"))


def entry_kind(entry: str) -> str:
    """The part of an entry before its maps (``"V0"``, ``"equilateral"``; empty for none)."""
    return entry.rsplit(":", 1)[0] if ":" in entry else ""


def map_selection(labels: np.ndarray, maps: Sequence[str]) -> np.ndarray:
    """Elements whose every map is in ``maps``."""
    keep = set(maps)
    return np.array([set(entry_maps(e)) <= keep for e in labels["entry"]], dtype=bool)

