"""Figures of the forecast products (matplotlib, Agg backend, PNG files)."""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from .errors import RaytraceError
from .forecast import DELTA_CHI2_2D, pair_covariance


def _as_covariances(results: Any, parameters: Sequence[str]) -> list[tuple[str, np.ndarray]]:
    """(name, covariance restricted to ``parameters``) for each combination."""
    out = []
    if isinstance(results, Mapping):
        items = [(str(k), list(parameters), np.asarray(v, dtype=float)) for k, v in results.items()]
    else:
        items = []
        for r in results:
            try:
                items.append((str(r.name), list(r.parameters), np.asarray(r.covariance, dtype=float)))
            except AttributeError:
                raise RaytraceError(
                    "plot_fisher_ellipses: results must be forecast results or a mapping name -> covariance"
                ) from None
    for name, names, cov in items:
        if cov.shape != (len(names), len(names)):
            raise RaytraceError(f"plot_fisher_ellipses: {name}: covariance shape {cov.shape} does not match the parameters")
        missing = [q for q in parameters if q not in names]
        if missing:
            raise RaytraceError(f"forecast.plot.parameters: {name} has no parameter(s) {', '.join(missing)}")
        idx = [names.index(q) for q in parameters]
        out.append((name, cov[np.ix_(idx, idx)]))
    return out


def ellipse_curve(cov2: np.ndarray, delta_chi2: float, n: int = 200) -> tuple[np.ndarray, np.ndarray]:
    r"""Points of the contour :math:`\delta\theta^T C^{-1} \delta\theta = \Delta\chi^2` around the origin.

    The contour is :math:`\sqrt{\Delta\chi^2}\,L(\cos t, \sin t)^T` with :math:`C = LL^T`
    (Cholesky). Unlike the semi-axes of :func:`raytrace.forecast.ellipse_parameters`
    this does not depend on the relative units of the two parameters, so pairs such as
    (:math:`A_s`, :math:`\sum m_\nu`) with variances 20 orders of magnitude apart are drawn
    without round-off.
    """
    c = np.asarray(cov2, dtype=float)
    s = np.sqrt(np.diag(c))
    if c.shape != (2, 2) or not np.all(np.isfinite(c)) or np.any(s <= 0):
        raise RaytraceError("ellipse: need a finite 2x2 covariance with positive variances")
    r = c / np.outer(s, s)
    try:
        chol = np.linalg.cholesky(r)
    except np.linalg.LinAlgError:
        raise RaytraceError("ellipse: the 2x2 parameter covariance is not positive definite") from None
    t = np.linspace(0.0, 2.0 * np.pi, n)
    xy = math.sqrt(delta_chi2) * (chol @ np.vstack([np.cos(t), np.sin(t)]))
    return s[0] * xy[0], s[1] * xy[1]


def plot_fisher_ellipses(
    results: Any,
    parameters: Sequence[str],
    fiducial_values: Mapping[str, float] | Sequence[float],
    path: str | os.PathLike,
    *,
    levels: Sequence[float] = DELTA_CHI2_2D,
    parameter_labels: Mapping[str, str] | None = None,
    dpi: int = 120,
) -> Path:
    r"""Triangle plot of the Fisher confidence ellipses of every combination.

    Parameters
    ----------
    results : sequence of :class:`raytrace.forecast.ForecastResult` (anything with
        ``name``, ``parameters`` and ``covariance``), or a mapping combination name ->
        (n, n) parameter covariance in the order of ``parameters``.
    parameters : the parameters to show (with one, only its 1-D Gaussians are drawn).
    fiducial_values : centre of the ellipses, by name or in the order of ``parameters``.
    path : PNG file to write.
    levels : :math:`\Delta\chi^2` of the contours; default 2.30 and 6.18 (1 and 2
        sigma of two parameters, common practice). The first level is drawn solid,
        the others dashed.
    parameter_labels : axis label per parameter (LaTeX allowed); default the names.
    dpi : resolution.

    Returns
    -------
    path : the file written.

    Notes
    -----
    Panel (row i, column j < i) shows the ellipses of parameters j (x) and i (y) from
    the marginalised 2x2 covariance (:func:`ellipse_curve`);
    diagonal panels show the marginalised 1-D Gaussian
    :math:`\exp[-(\theta-\theta_0)^2/2\sigma^2]` of each combination.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from .hdf5 import atomic_file

    parameters = [str(q) for q in parameters]
    n = len(parameters)
    if n < 1:
        raise RaytraceError("plot_fisher_ellipses: no parameters to plot")
    if isinstance(fiducial_values, Mapping):
        missing = [q for q in parameters if q not in fiducial_values]
        if missing:
            raise RaytraceError(f"forecast.fiducial: no fiducial value for {', '.join(missing)}")
        centre = np.array([float(fiducial_values[q]) for q in parameters])
    else:
        centre = np.asarray(fiducial_values, dtype=float)
        if centre.shape != (n,):
            raise RaytraceError(f"forecast.fiducial: {centre.size} values for {n} parameters")
    combos = _as_covariances(results, parameters)
    if not combos:
        raise RaytraceError("plot_fisher_ellipses: no forecast results to plot")
    labels = {q: q for q in parameters}
    labels.update(parameter_labels or {})

    sigma = np.array([np.sqrt(np.diag(c)) for _, c in combos])  # (n_combos, n)
    if not np.all(np.isfinite(sigma)) or np.any(sigma <= 0):
        raise RaytraceError("plot_fisher_ellipses: a parameter covariance has non-positive variances")
    reach = math.sqrt(max(float(v) for v in levels)) * 1.15
    half_width = reach * sigma.max(axis=0)
    colours = plt.rcParams["axes.prop_cycle"].by_key().get("color", ["C0"])

    fig, axes = plt.subplots(n, n, figsize=(2.4 * n + 0.6, 2.4 * n + 0.6), squeeze=False)
    for i in range(n):
        for j in range(n):
            ax = axes[i, j]
            if j > i:
                ax.set_visible(False)
                continue
            ax.set_xlim(centre[j] - half_width[j], centre[j] + half_width[j])
            if i == j:
                x = np.linspace(centre[j] - half_width[j], centre[j] + half_width[j], 300)
                for k, (name, _) in enumerate(combos):
                    s = sigma[k, j]
                    ax.plot(x, np.exp(-0.5 * ((x - centre[j]) / s) ** 2), color=colours[k % len(colours)], lw=1.2)
                ax.set_ylim(0.0, 1.1)
                ax.set_yticks([])
            else:
                for k, (name, cov) in enumerate(combos):
                    for m, level in enumerate(levels):
                        x, y = ellipse_curve(pair_covariance(cov, j, i), float(level))
                        ax.plot(centre[j] + x, centre[i] + y, color=colours[k % len(colours)], lw=1.2,
                                ls="-" if m == 0 else "--")
                ax.plot(centre[j], centre[i], "k+", ms=5)
                ax.set_ylim(centre[i] - half_width[i], centre[i] + half_width[i])
                if j == 0:
                    ax.set_ylabel(labels[parameters[i]])
                else:
                    ax.set_yticklabels([])
            if i == n - 1:
                ax.set_xlabel(labels[parameters[j]])
            else:
                ax.set_xticklabels([])
            ax.tick_params(labelsize=7)
    handles = [plt.Line2D([], [], color=colours[k % len(colours)], lw=1.5) for k in range(len(combos))]
    names = [name for name, _ in combos]
    fig.tight_layout()
    if n >= 2:  # in the empty upper triangle
        spare = axes[0, n - 1]
        spare.set_visible(True)
        spare.axis("off")
        spare.legend(handles, names, loc="upper right", fontsize=8, frameon=False)
    else:
        fig.subplots_adjust(bottom=0.35)
        fig.legend(handles, names, loc="lower center", fontsize=8, frameon=False)

    final = Path(path)
    try:
        with atomic_file(final) as tmp:
            fig.savefig(tmp, dpi=dpi, format="png")
    except OSError as exc:
        raise RaytraceError(f"{final}: cannot write the figure ({exc.strerror or exc})") from None
    finally:
        plt.close(fig)
    return final
