r"""The forecast stage: stack files in, Fisher forecasts per combination of statistics out.

The chain (the numerics are in :mod:`raytrace.forecast`):

1. The data vector is restricted to the elements whose maps are all in
   ``forecast.maps``; elements that are constant over the fiducial realisations
   (an empty histogram bin, say) or exact linear combinations of other elements of
   their statistic (:func:`independent_elements`) are dropped with a warning, since
   they carry no information and make the covariance singular.
2. The covariance comes from every realisation of the fiducial model.
3. The derivatives come from the realisations shared by the stepped models and the
   fiducial (the same seeds, hence the same plane choices and noise): central
   differences where a model exists on both sides, one-sided otherwise (with a
   warning).
4. For each combination of statistics (after ``forecast.scale_cuts``): the Fisher
   matrix with the Hartlap et al. (2007) debiased precision matrix, scaled from the
   map area to ``forecast.survey_area_deg2``; marginalised and conditional errors,
   with and without the Dodelson & Schneider (2013) factor; the same with the priors
   of ``forecast.priors`` when there are any.
5. Diagnostics: every error recomputed from either half of the fiducial
   realisations and from either half of the derivative pairs.

Products: ``forecast.h5`` (everything), ``errors.csv`` (one row per combination and
parameter), ``errors.html`` (the table for the report), ``diagnostics.csv`` and
``ellipses.png`` (every parameter pair, all combinations overlaid).

Survey area (common practice): the covariance of a map statistic scales as the
inverse of the area, so the Fisher matrix of a survey of area :math:`A` made of
independent patches like the simulated map of area :math:`A_{\rm map}` is
:math:`A/A_{\rm map}` times that of one map. ``survey_area_deg2`` is the survey's
area before masking, with the mask density of the simulated maps. Super-sample
covariance is not included.
"""

from __future__ import annotations

import csv
import html
import json
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from . import forecast as fc
from .errors import RaytraceError
from .stack import map_selection, read_stack

#: Axis labels of the cosmological parameters in figures.
PARAMETER_LABELS = {
    "m_nu_eV": r"$\sum m_\nu$ [eV]",
    "Omega_m": r"$\Omega_{\rm m}$",
    "Omega_b": r"$\Omega_{\rm b}$",
    "A_s": r"$10^9 A_{\rm s}$",
    "h": r"$h$",
    "n_s": r"$n_{\rm s}$",
}


#: Factors the parameters are multiplied by in figures (to match PARAMETER_LABELS).
PARAMETER_SCALES = {"A_s": 1e9}


@dataclass
class ForecastProducts:
    """What the forecast stage computed (also written to its files)."""

    parameters: list[str]
    fiducial_values: dict[str, float]
    labels: np.ndarray
    n_sims: int
    derivatives: fc.DerivativeResult
    covariance: np.ndarray
    mean: np.ndarray
    results: list[fc.ForecastResult]
    with_priors: list[fc.ForecastResult]
    diagnostics: list[fc.StabilityDiagnostics]
    warnings: list[str]
    area_factor: float
    with_nuisance: list[fc.ForecastResult] = field(default_factory=list)
    #: (name of the forecast with nuisances, name without, {parameter: sigma with / sigma without})
    degradation: list[tuple[str, str, dict[str, float]]] = field(default_factory=list)

    def all_results(self) -> list[fc.ForecastResult]:
        return self.results + self.with_priors + self.with_nuisance


def independent_elements(values: np.ndarray, labels: np.ndarray, keep: np.ndarray, *, tol: float = 1e-6) -> np.ndarray:
    """Elements of ``keep`` that are not exact linear combinations of earlier ones of their statistic.

    Within each statistic, elements are taken in order and kept when the part of their
    standardised realisations orthogonal to the kept ones has more than ``tol`` of their
    norm (Gram-Schmidt). Such a dependent element (a duplicated bispectrum triangle bin,
    histogram bins that sum to a constant) adds no information and makes the covariance
    singular. Dependencies across statistics are not removed: a combination whose covariance
    is still singular is reported by the forecast.
    """
    out = keep.copy()
    x = values - values.mean(axis=0)
    norm = np.linalg.norm(x, axis=0)
    for stat in dict.fromkeys(labels["statistic"][keep]):
        basis: list[np.ndarray] = []
        for i in np.flatnonzero(keep & (labels["statistic"] == stat)):
            v = x[:, i] / norm[i]
            for b in basis:
                v = v - (b @ v) * b
            r = np.linalg.norm(v)
            if r > tol:
                basis.append(v / r)
            else:
                out[i] = False
    return out


def _combinations(spec: Sequence[Any]) -> list[list[str]]:
    return [[c] if isinstance(c, str) else list(c) for c in spec]


def run_forecast(settings: Mapping[str, Any], stacks: Mapping[str, str | Path],
                 log: Callable[[str], None] = lambda m: None) -> ForecastProducts:
    """Compute the forecast of one run.

    Parameters
    ----------
    settings : ``forecast`` (the configuration section, defaults filled), ``steps``
        (:func:`raytrace.config.forecast_steps`), ``fiducial_values`` (parameter ->
        fiducial value), ``maps`` (map labels kept), ``map_area_deg2``.
    stacks : model -> stack file, for the fiducial and every stepped model.
    log : progress messages.
    """
    fset = settings["forecast"]
    fid_model = fset["fiducial"]
    parameters = list(fset["parameters"])
    fid_values = {p: float(settings["fiducial_values"][p]) for p in parameters}
    caught: list[str] = []

    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        tables = {m: read_stack(p)[0] for m, p in stacks.items()}
        if fid_model not in tables:
            raise RaytraceError(f"forecast.fiducial: no stack file for {fid_model!r}")
        fid = tables[fid_model]
        keep = map_selection(fid.labels, settings["maps"])
        if not keep.any():
            raise RaytraceError(f"forecast.maps: no data element involves only the maps {', '.join(settings['maps'])}")
        std = fid.values.std(axis=0, ddof=1)
        constant = keep & ~(std > 0)
        if constant.any():
            stats = sorted(set(fid.labels["statistic"][constant]))
            warnings.warn(f"{int(constant.sum())} data element(s) are constant over the fiducial realisations "
                          f"and are dropped ({', '.join(stats)})", stacklevel=1)
        keep &= std > 0
        dependent = keep & ~independent_elements(fid.values, fid.labels, keep)
        if dependent.any():
            stats = sorted(set(fid.labels["statistic"][dependent]))
            warnings.warn(f"{int(dependent.sum())} data element(s) are exact linear combinations of other elements "
                          f"of their statistic over the fiducial realisations and are dropped ({', '.join(stats)})",
                          stacklevel=1)
        keep &= ~dependent
        labels = fid.labels[keep]
        sub = {m: fc.DataTable(t.values[:, keep], labels, t.seeds, name=m) for m, t in tables.items()}
        log(f"data vector: {int(keep.sum())} of {fid.n_data} elements "
            f"(maps {', '.join(settings['maps'])}); {fid.n_realizations} fiducial realisations")

        # derivatives from the realisations every stepped model shares with the fiducial
        nuisance = settings.get("nuisance") or {}
        nuisance_steps = {q: {"minus": tuple(v["minus"]), "plus": tuple(v["plus"])} for q, v in nuisance.items()}
        for q, v in nuisance_steps.items():
            for side, (table, _) in v.items():
                if table not in sub:
                    raise RaytraceError(f"forecast.nuisance.{q}: no stack file for the variant {table!r}")
        stepped = {m for s in list(settings["steps"].values()) + list(nuisance_steps.values()) for m, _ in s.values()}
        shared = sub[fid_model].seeds
        for m in stepped:
            shared = np.intersect1d(shared, sub[m].seeds)
        rows = np.isin(sub[fid_model].seeds, shared)
        deriv_tables = dict(sub)
        deriv_tables[fid_model] = fc.DataTable(sub[fid_model].values[rows], labels, sub[fid_model].seeds[rows], name=fid_model)
        steps = {p: {side: tuple(v) for side, v in s.items()} for p, s in settings["steps"].items()}
        derivs = fc.derivatives(deriv_tables, {p: steps[p] for p in parameters}, (fid_model, fid_values))
        log("derivatives: " + ", ".join(f"{p} {k} ({n} pairs)" for p, k, n in zip(derivs.parameters, derivs.kind, derivs.n_pairs)))

        summary = fc.ensemble_summary(sub[fid_model])
        n_sims = summary.n_realizations
        map_area = float(settings["map_area_deg2"])
        survey_area = fset.get("survey_area_deg2")
        common = dict(scale_cuts=fset.get("scale_cuts") or None, parameters=parameters,
                      map_area=map_area if survey_area else None, survey_area=survey_area)
        combos = _combinations(fset["combinations"])
        results = fc.forecast_combinations(derivs, summary.covariance, n_sims, labels, combos, **common)
        priors = fset.get("priors") or {}
        with_priors = []
        if priors.get("sigma") or priors.get("fisher"):
            for r, combo in zip(results, combos):
                rp = fc.forecast(derivs, summary.covariance, n_sims, labels, combo, prior_sigma=priors.get("sigma"),
                                 prior_fisher=priors.get("fisher"), **common)
                rp.name = f"{r.name} + {priors.get('label', 'prior')}"
                with_priors.append(rp)
        with_nuisance, degradation = [], []
        if nuisance:
            full_params = parameters + list(nuisance)
            derivs_full = fc.derivatives(
                deriv_tables, {**{p: steps[p] for p in parameters}, **nuisance_steps},
                (fid_model, {**fid_values, **{q: v["fiducial"] for q, v in nuisance.items()}}))
            log("nuisance derivatives: " + ", ".join(f"{q} ({n} pairs)" for q, n in zip(
                derivs_full.parameters[len(parameters):], derivs_full.n_pairs[len(parameters):])))
            nuisance_sigma = {q: v["prior_sigma"] for q, v in nuisance.items() if v.get("prior_sigma")}
            full_common = dict(common, parameters=full_params)
            variants = [(results, {}, None, "nuisances")]
            if with_priors:
                prior_f = None
                if priors.get("fisher"):
                    k = len(full_params)
                    prior_f = np.zeros((k, k))
                    prior_f[:len(parameters), :len(parameters)] = fc.load_prior_fisher(priors["fisher"], len(parameters), parameters)
                variants.append((with_priors, dict(priors.get("sigma") or {}), prior_f, "nuisances"))
            for base_list, sigma, prior_f, label in variants:
                for base, combo in zip(base_list, combos):
                    r = fc.forecast(derivs_full, summary.covariance, n_sims, labels, combo,
                                    prior_sigma={**sigma, **nuisance_sigma} or None, prior_fisher=prior_f, **full_common)
                    r.name = f"{base.name} + {label}"
                    with_nuisance.append(r)
                    degradation.append((r.name, base.name, {
                        q: float(r.marginalised[i] / base.marginalised[i]) for i, q in enumerate(parameters)}))
        diagnostics = []
        dset = fset.get("diagnostics") or {}
        for combo in combos:
            diagnostics.append(fc.stability_diagnostics(
                sub[fid_model], derivs, labels, combo, seed=int(dset.get("seed", 0)),
                tolerance=float(dset.get("tolerance", 0.1)), **common))
    for w in record:
        text = str(w.message)
        if text not in caught:
            caught.append(text)
            log(f"warning: {text}")
    for r in results + with_priors + with_nuisance:
        log(f"{r.name}: {r.n_data} elements, Hartlap {r.hartlap:.3f}; " + ", ".join(
            f"sigma({p}) = {s:.4g}" for p, s in zip(r.parameters, r.marginalised)))
    return ForecastProducts(parameters, fid_values, labels, n_sims, derivs, summary.covariance, summary.mean,
                            results, with_priors, diagnostics, caught, fc.area_ratio(common["map_area"], survey_area),
                            with_nuisance, degradation)


# ----------------------------------------------------------------------------- files
def write_products(products: ForecastProducts, *, h5_path, csv_path, html_path, diagnostics_path, png_path,
                   settings: Mapping[str, Any], inputs: Sequence[str], degradation_path=None) -> None:
    """Write every product of :func:`run_forecast` (each file atomically)."""
    from .hdf5 import atomic_h5, write_dataset
    from .plots import plot_fisher_ellipses

    p = products
    if degradation_path is not None:
        _write_degradation(degradation_path, p)
    with atomic_h5(h5_path, stage="forecast", settings=settings, inputs=inputs) as f:
        f.attrs["parameters"] = json.dumps(p.parameters)
        f.attrs["fiducial_values"] = json.dumps(p.fiducial_values)
        f.attrs["n_sims"] = p.n_sims
        f.attrs["area_factor"] = p.area_factor
        f.attrs["warnings"] = json.dumps(p.warnings)
        g = f.create_group("data")
        _write_labels(g, p.labels)
        write_dataset(g, "mean", p.mean, "1")
        write_dataset(g, "covariance", p.covariance, "1", axes="[element, element]", description="of one map")
        d = f.create_group("derivatives")
        write_dataset(d, "mean", p.derivatives.mean, "1 / parameter unit", axes="[parameter, element]")
        write_dataset(d, "scatter", p.derivatives.scatter, "1 / parameter unit", axes="[parameter, element]")
        write_dataset(d, "step", np.asarray(p.derivatives.step), "parameter unit")
        write_dataset(d, "n_pairs", np.asarray(p.derivatives.n_pairs), "1")
        d.attrs["kind"] = json.dumps(p.derivatives.kind)
        f.attrs["degradation"] = json.dumps(p.degradation)
        c = f.create_group("combinations")
        diag = {x.name: x for x in p.diagnostics}
        for r in p.all_results():
            g = c.create_group(r.name.replace("/", "_"))
            write_dataset(g, "fisher", r.fisher, "1 / (parameter unit)^2", axes="[parameter, parameter]")
            write_dataset(g, "parameter_covariance", r.covariance, "(parameter unit)^2")
            write_dataset(g, "marginalised", r.marginalised, "parameter unit")
            write_dataset(g, "conditional", r.conditional, "parameter unit")
            write_dataset(g, "marginalised_ds", r.marginalised_ds, "parameter unit")
            write_dataset(g, "conditional_ds", r.conditional_ds, "parameter unit")
            write_dataset(g, "mask", r.mask, "1", description="elements of data/ used")
            g.attrs.update(statistics=json.dumps(list(r.statistics)), n_data=r.n_data, hartlap=r.hartlap,
                           ds_marginalised=r.ds_marginalised, ds_conditional=r.ds_conditional)
            if r.name in diag:
                write_dataset(g, "half_covariance", diag[r.name].half_covariance, "parameter unit",
                              description="marginalised errors from either half of the fiducial realisations")
                write_dataset(g, "half_derivatives", diag[r.name].half_derivatives, "parameter unit",
                              description="marginalised errors from either half of the derivative pairs")
    fc.write_error_table(csv_path, p.all_results())
    _write_diagnostics(diagnostics_path, p.diagnostics)
    _write_html(html_path, p)
    scale = np.array([PARAMETER_SCALES.get(q, 1.0) for q in p.parameters])
    k = len(p.parameters)  # cosmological parameters first; nuisances marginalised over
    # the configured combinations (with priors and nuisances they are in the error table)
    plot_fisher_ellipses({r.name: r.covariance[:k, :k] * np.outer(scale, scale) for r in p.results}, p.parameters,
                         [p.fiducial_values[q] * scale[i] for i, q in enumerate(p.parameters)], png_path,
                         parameter_labels={q: PARAMETER_LABELS.get(q, q) for q in p.parameters})


def _write_labels(g, labels: np.ndarray) -> None:
    import h5py

    from .hdf5 import write_dataset

    s = h5py.string_dtype()
    g.create_dataset("statistic", data=np.asarray(labels["statistic"], dtype=object), dtype=s)
    g.create_dataset("entry", data=np.asarray(labels["entry"], dtype=object), dtype=s)
    write_dataset(g, "smoothing_arcmin", labels["smoothing_arcmin"], "arcmin")
    write_dataset(g, "center", labels["center"], "1")


def _write_diagnostics(path, diagnostics: Sequence[fc.StabilityDiagnostics]) -> None:
    from .hdf5 import atomic_file

    cols = ["combination", "parameter", "marginalised", "half_covariance_1", "half_covariance_2",
            "half_derivatives_1", "half_derivatives_2", "covariance_change", "derivative_change"]
    with atomic_file(path) as tmp, open(tmp, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(cols)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            for d in diagnostics:
                cc, dc = d.covariance_change, d.derivative_change
                for i, q in enumerate(d.parameters):
                    w.writerow([d.name, q] + [f"{x:.6g}" for x in (
                        d.full[i], d.half_covariance[0, i], d.half_covariance[1, i],
                        d.half_derivatives[0, i], d.half_derivatives[1, i], cc[i], dc[i])])


def _write_degradation(path, p: ForecastProducts) -> None:
    """sigma(with nuisances) / sigma(without) per combination and cosmological parameter, as CSV."""
    from .hdf5 import atomic_file

    with atomic_file(path) as tmp, open(tmp, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["combination", "parameter", "sigma_fixed_nuisance", "sigma_marginalised_nuisance", "degradation"])
        base = {r.name: r for r in p.all_results()}
        for name, without, ratios in p.degradation:
            for i, q in enumerate(p.parameters):
                w.writerow([without, q, f"{base[without].marginalised[i]:.6g}", f"{base[name].marginalised[i]:.6g}",
                            f"{ratios[q]:.6g}"])


def _fmt(x: float) -> str:
    return "n/a" if not math.isfinite(x) else f"{x:.3g}"


def _write_html(path, p: ForecastProducts) -> None:
    """The error table as a small self-contained HTML page (shown in the report)."""
    from .hdf5 import atomic_file

    head = "".join(f"<th>σ({html.escape(q)})</th>" for q in p.parameters)
    rows = []
    for r in p.all_results():
        cells = "".join(
            f"<td>{_fmt(m)}<br><small>DS {_fmt(md)} · cond. {_fmt(c)}</small></td>"
            for m, md, c in zip(r.marginalised, r.marginalised_ds, r.conditional))
        rows.append(f"<tr><td>{html.escape(r.name)}</td><td>{r.n_data}</td><td>{r.hartlap:.3f}</td>{cells}</tr>")
    notes = "".join(f"<li>{html.escape(w)}</li>" for w in p.warnings) or "<li>none</li>"
    degradation = ""
    if p.degradation:
        drows = "".join(
            f"<tr><td>{html.escape(without)}</td>" + "".join(f"<td>{ratios[q]:.3g}</td>" for q in p.parameters) + "</tr>"
            for _, without, ratios in p.degradation)
        degradation = (f"<h3>Degradation by the nuisance parameters</h3><p>σ(nuisances marginalised with their priors) / "
                       f"σ(nuisances fixed) per cosmological parameter.</p><table><tr><th>combination</th>{head}</tr>"
                       f"{drows}</table>")
    fid = ", ".join(f"{html.escape(q)} = {v:g}" for q, v in p.fiducial_values.items())
    page = f"""<!doctype html><html><head><meta charset="utf-8"><title>Forecast errors</title>
<style>body{{font-family:sans-serif;font-size:14px}} table{{border-collapse:collapse}}
td,th{{border:1px solid #bbb;padding:4px 8px;text-align:right}} td:first-child{{text-align:left}}</style></head>
<body><h3>Marginalised 1σ errors</h3>
<p>Fiducial {fid}; {p.n_sims} fiducial realisations; Fisher matrix scaled by the area factor {p.area_factor:.4g}.
Each cell: the marginalised error with the Hartlap-debiased precision matrix; below it, the error with the
Dodelson–Schneider factor and the conditional error (other parameters fixed).</p>
<table><tr><th>combination</th><th>elements</th><th>Hartlap</th>{head}</tr>
{''.join(rows)}</table>
{degradation}
<h4>Warnings</h4><ul>{notes}</ul></body></html>
"""
    with atomic_file(path) as tmp:
        Path(tmp).write_text(page)
