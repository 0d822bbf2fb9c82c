"""Report figure of the full-sky branch: example convergence maps in Mollweide projection."""

from __future__ import annotations

from pathlib import Path
from typing import Mapping

import numpy as np

from ..errors import RaytraceError


def mollweide(m: np.ndarray, xsize: int = 480) -> np.ndarray:
    """A HEALPix map (RING) as a Mollweide image (healpy's projector); NaN outside the ellipse."""
    import healpy as hp

    nside = hp.npix2nside(m.size)
    proj = hp.projector.MollweideProj(xsize=xsize)
    img = proj.projmap(np.asarray(m, dtype=float), lambda x, y, z: hp.vec2pix(nside, x, y, z))
    return np.where(np.isfinite(img) & (img > -1e30), img, np.nan)


def plot_example_maps(maps_files: Mapping[str, str], observed_files: Mapping[str, str], label: str,
                      path: str | Path, smoothing_arcmin: float | None = None) -> Path:
    """Noiseless (top) and observed (bottom) full-sky convergence of one map, one column per model."""
    from ..report import _pyplot, _save, observed_map
    from .survey import read_sky_maps

    plt = _pyplot()
    models = list(maps_files)
    top, bottom, scale = [], [], 0.0
    for model in models:
        traced = read_sky_maps(maps_files[model])
        if label not in traced.labels:
            raise RaytraceError(f"report.map: {maps_files[model]} has no map {label!r}")
        top.append(mollweide(traced.kappa[traced.labels.index(label)]))
        obs, scale_k, mask, _ = observed_map(observed_files[model], label, smoothing_arcmin)
        scale = scale_k or scale
        bottom.append(mollweide(np.where(mask, obs, np.nan)))
    fig, axes = plt.subplots(2, len(models), figsize=(3.2 * len(models) + 0.8, 4.2), squeeze=False)
    lim_t = np.nanpercentile(np.abs(np.array(top)), 99.5)
    lim_b = np.nanpercentile(np.abs(np.array(bottom)), 99.5)
    for j, model in enumerate(models):
        for row, (data, lim) in enumerate(((top[j], lim_t), (bottom[j], lim_b))):
            ax = axes[row, j]
            im = ax.imshow(data, origin="lower", cmap="RdBu_r", vmin=-lim, vmax=lim)
            ax.set_axis_off()
            if row == 0:
                ax.set_title(model, fontsize=9)
        if j == len(models) - 1:
            fig.colorbar(im, ax=axes.ravel().tolist(), fraction=0.02, pad=0.02)
    axes[0, 0].text(-0.05, 0.5, f"κ noiseless ({label})", transform=axes[0, 0].transAxes, rotation=90,
                    ha="right", va="center", fontsize=8)
    axes[1, 0].text(-0.05, 0.5, f"observed, {scale:g}' smoothing" if scale else "observed",
                    transform=axes[1, 0].transAxes, rotation=90, ha="right", va="center", fontsize=8)
    fig.suptitle("realisation 0, full sky (Mollweide)", fontsize=9)
    return _save(fig, path)
