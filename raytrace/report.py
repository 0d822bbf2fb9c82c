"""Figures and pages of the run report (collected by ``snakemake --report``).

- :func:`plot_example_maps`: one realisation's convergence per model, noiseless and
  as observed (noise, mask, smoothing).
- :func:`plot_statistic_ratios`: each statistic of each model divided by a
  reference model, with the fiducial model's 1-sigma error (of one map, or of the
  survey area) as error bars.
- :func:`write_provenance`: the run's configuration, versions and seeds as HTML.

Matplotlib runs with the Agg backend; every file is written atomically.
"""

from __future__ import annotations

import html
import json
import platform
import subprocess
import sys
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from .errors import RaytraceError
from .stack import entry_kind, entry_maps, read_stack


#: Axis labels of the bin centres of the statistics.
BIN_LABELS = {"ell": "ℓ", "nu": "ν = κ / σ_noise", "kappa": "κ"}


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _save(fig, path) -> Path:
    from .hdf5 import atomic_file

    plt = _pyplot()
    final = Path(path)
    try:
        with atomic_file(final) as tmp:
            fig.savefig(tmp, dpi=110, format="png")
    except OSError as exc:
        raise RaytraceError(f"{final}: cannot write the figure ({exc.strerror or exc})") from None
    finally:
        plt.close(fig)
    return final



def observed_map(path, label: str, smoothing_arcmin: float | None, attrs=()) -> tuple[np.ndarray, float, np.ndarray, dict]:
    """(map, its smoothing scale, mask, chosen attributes) of map ``label`` in an observe-stage
    file: at the scale nearest ``smoothing_arcmin`` (default the middle one), else unsmoothed."""
    from .hdf5 import open_input

    with open_input(path) as f:
        labels = json.loads(f.attrs["map_labels"])
        scales = [float(s) for s in f.attrs["smoothing_arcmin"]]
        i = labels.index(label)
        if scales:
            k = int(np.argmin(np.abs(np.asarray(scales) - (smoothing_arcmin or scales[len(scales) // 2]))))
            obs, scale = f["kappa_smoothed"][k, i], scales[k]
        else:
            obs, scale = f["kappa"][i], 0.0
        return obs, scale, f["mask"][...].astype(bool), {key: f.attrs[key] for key in attrs}


def plot_example_maps(maps_files: Mapping[str, str], observed_files: Mapping[str, str], label: str,
                      path: str | Path, smoothing_arcmin: float | None = None) -> Path:
    """Noiseless (top) and observed (bottom) convergence of one map label, one column per model."""
    from .observe import read_traced
    from .sky import is_sphere_file

    if maps_files and is_sphere_file(next(iter(maps_files.values()))):  # full-sky maps (raytrace.sky)
        from .sky.report import plot_example_maps as plot_sphere

        return plot_sphere(maps_files, observed_files, label, path, smoothing_arcmin)

    plt = _pyplot()
    models = list(maps_files)
    fig, axes = plt.subplots(2, len(models), figsize=(2.3 * len(models) + 0.8, 5.0), squeeze=False)
    top, bottom = [], []
    for model in models:
        traced = read_traced(maps_files[model])
        if label not in traced.labels:
            raise RaytraceError(f"report.map: {maps_files[model]} has no map {label!r}")
        top.append(traced.kappa[traced.labels.index(label)])
        obs, scale, mask, attrs = observed_map(observed_files[model], label, smoothing_arcmin, ("pixel_arcmin",))
        field = float(attrs["pixel_arcmin"]) * obs.shape[-1] / 60.0
        bottom.append(np.where(mask, obs, np.nan))
    extent = [0, field, 0, field]
    lim_t = np.nanpercentile(np.abs(np.array(top)), 99.5)
    lim_b = np.nanpercentile(np.abs(np.array(bottom)), 99.5)
    for j, model in enumerate(models):
        for row, (data, lim) in enumerate(((top[j], lim_t), (bottom[j], lim_b))):
            ax = axes[row, j]
            im = ax.imshow(data, origin="lower", cmap="RdBu_r", vmin=-lim, vmax=lim, extent=extent)
            ax.set_xticks([])
            ax.set_yticks([])
            if row == 0:
                ax.set_title(model, fontsize=9)
        if j == len(models) - 1:
            fig.colorbar(im, ax=axes.ravel().tolist(), fraction=0.02, pad=0.02)
    axes[0, 0].set_ylabel(f"κ noiseless ({label})", fontsize=8)
    axes[1, 0].set_ylabel(f"observed, {scale:g}' smoothing" if scale else "observed", fontsize=8)
    fig.suptitle(f"realisation 0, {field:.2g}° field", fontsize=9)
    return _save(fig, path)


def default_smoothing(labels: np.ndarray, statistic: str, preferred: float | None) -> float:
    """The smoothing scale shown for one statistic: ``preferred`` if present, else the middle one."""
    scales = sorted(set(labels["smoothing_arcmin"][labels["statistic"] == statistic]))
    if preferred is not None:
        near = min(scales, key=lambda s: abs(s - preferred))
        return near
    return scales[len(scales) // 2]


def plot_statistic_ratios(stacks: Mapping[str, str], statistic: str, *, reference: str, error_model: str,
                          map_label: str, path: str | Path, smoothing_arcmin: float | None = None,
                          area_factor: float = 1.0) -> Path:
    """Every model's mean of one statistic divided by the reference model's.

    Means are taken over the realisations shared by all models (paired, so their common
    cosmic variance cancels in the ratio). Error bars: the standard deviation of the
    ``error_model`` realisations divided by ``sqrt(area_factor)`` (survey area / map
    area), relative to the reference mean. Elements whose reference mean is smaller than
    a tenth of that error are not shown (a ratio there is meaningless).
    """
    plt = _pyplot()
    read = {m: read_stack(p) for m, p in stacks.items()}
    tables = {m: t for m, (t, _) in read.items()}
    if reference not in tables or error_model not in tables:
        raise RaytraceError(f"report.reference: no stack file for {reference!r} or {error_model!r}")
    ref = tables[reference]
    lab = ref.labels
    scale = default_smoothing(lab, statistic, smoothing_arcmin)
    sel = (lab["statistic"] == statistic) & np.isclose(lab["smoothing_arcmin"], scale) & np.array(
        [entry_maps(e) == (map_label,) or entry_maps(e) == (map_label, map_label) for e in lab["entry"]])
    if not sel.any():
        raise RaytraceError(f"report.map: statistic {statistic} has no entry of map {map_label!r}")
    shared = ref.seeds
    for t in tables.values():
        shared = np.intersect1d(shared, t.seeds)
    means = {m: t.values[np.isin(t.seeds, shared)][:, sel].mean(axis=0) for m, t in tables.items()}
    err = tables[error_model].values[:, sel].std(axis=0, ddof=1) / np.sqrt(area_factor)
    base = means[reference]
    ok = np.abs(base) > 0.1 * np.maximum(err, 1e-300)
    entries = lab["entry"][sel]
    centers = lab["center"][sel]
    kinds = list(dict.fromkeys(entry_kind(e) for e in entries))
    single = all((entries == e).sum() == 1 for e in set(entries))  # one bin per entry: categorical axis
    panels = [None] if single else kinds
    fig, axes = plt.subplots(1, len(panels), figsize=(4.2 * len(panels) + 0.5, 3.4), squeeze=False)
    colours = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    others = [m for m in tables if m != reference]
    for a, kind in enumerate(panels):
        ax = axes[0, a]
        rows = np.ones(sel.sum(), bool) if kind is None else np.array([entry_kind(e) == kind for e in entries])
        x = np.arange(rows.sum()) if kind is None else centers[rows]
        ax.axhline(1.0, color="0.3", lw=0.8)
        rel = np.where(ok[rows], err[rows] / np.abs(base[rows]), np.nan)
        ax.fill_between(x, 1 - rel, 1 + rel, color="0.85", step="mid" if kind is None else None,
                        label=f"σ {error_model}" + (" (survey)" if area_factor != 1 else " (one map)"))
        for k, m in enumerate(others):
            ratio = np.where(ok[rows], means[m][rows] / np.where(ok[rows], base[rows], 1.0), np.nan)
            ax.errorbar(x + 0.04 * (k - len(others) / 2) * (1 if kind is None else 0), ratio,
                        yerr=rel, fmt="o-", ms=3, lw=1, color=colours[k % len(colours)], label=m, capsize=2)
        if kind is None:
            ax.set_xticks(x)
            ax.set_xticklabels([entry_kind(e) or e for e in entries[rows]], rotation=60, fontsize=7)
        else:
            name = read[reference][1][int(np.flatnonzero(sel)[0])]
            ax.set_xlabel(BIN_LABELS.get(name, name or "bin centre"))
            if statistic in ("power_spectrum", "bispectrum"):
                from matplotlib.ticker import NullFormatter

                ax.set_xscale("log")
                ax.xaxis.set_minor_formatter(NullFormatter())
            ax.set_title(kind or statistic, fontsize=9)
        ax.set_ylabel(f"ratio to {reference}")
        finite = np.concatenate([means[m][rows][ok[rows]] / base[rows][ok[rows]] for m in others] or [np.ones(1)])
        if finite.size:
            lo, hi = np.nanpercentile(finite, [2, 98])
            pad = max(0.02, 0.15 * (hi - lo))
            ax.set_ylim(min(lo, 1) - pad, max(hi, 1) + pad)
    axes[0, -1].legend(fontsize=7, frameon=False)
    title = f"{statistic}, map {map_label}" + (f", {scale:g}' smoothing" if scale else "")
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    return _save(fig, path)


def _git_commit(directory: Path) -> str:
    try:
        out = subprocess.run(["git", "-C", str(directory), "rev-parse", "HEAD"], capture_output=True, text=True, timeout=10)
        return out.stdout.strip() or "unknown"
    except (OSError, subprocess.SubprocessError):
        return "unknown"


def write_provenance(path: str | Path, config: Mapping[str, Any], workflow_dir: str | Path) -> Path:
    """The configuration, software versions and source revision of the run, as HTML."""
    import yaml

    from . import __version__
    from .hdf5 import atomic_file

    versions = {"raytrace": __version__, "python": platform.python_version()}
    for name in ("numpy", "scipy", "numba", "h5py", "astropy", "camb", "healpy", "matplotlib", "snakemake"):
        try:
            versions[name] = __import__(name).__version__
        except Exception:  # noqa: BLE001 - a missing optional package is reported as such
            versions[name] = "not installed"
    rows = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(str(v))}</td></tr>" for k, v in versions.items())
    text = yaml.safe_dump(json.loads(json.dumps(config)), sort_keys=False)
    page = f"""<!doctype html><html><head><meta charset="utf-8"><title>Provenance</title>
<style>body{{font-family:sans-serif;font-size:14px}} td{{padding:2px 10px}} pre{{background:#f5f5f5;padding:8px}}</style>
</head><body><h3>Provenance</h3>
<p>Source revision {html.escape(_git_commit(Path(workflow_dir)))}; platform {html.escape(platform.platform())};
interpreter {html.escape(sys.executable)}. Every HDF5 product also carries its own provenance in root
attributes (package version, the settings of its stage, input files and checksums, seed).</p>
<table>{rows}</table>
<h4>Configuration (defaults filled in)</h4><pre>{html.escape(text)}</pre></body></html>
"""
    final = Path(path)
    with atomic_file(final) as tmp:
        Path(tmp).write_text(page)
    return final


def statistic_names(config: Mapping[str, Any]) -> list[str]:
    """Statistics of a run, in configuration order."""
    return list(config.get("statistics", {}))


def report_defaults(config: Mapping[str, Any], labels: Sequence[str], fiducial: str) -> dict[str, Any]:
    """Reference model, map label and smoothing scale of the report figures."""
    rep = config.get("report", {}) or {}
    bins = [x for x in labels if x.startswith("bin")]
    scales = config.get("survey", {}).get("smoothing", {}).get("scales_arcmin", []) or []
    return {
        "reference": rep.get("reference") or fiducial,
        "map": rep.get("map") or (bins[-1] if bins else labels[-1]),
        "smoothing_arcmin": rep.get("smoothing_arcmin", sorted(scales)[len(scales) // 2] if scales else None),
    }
