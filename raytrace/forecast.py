r"""Fisher forecasts from ensembles of simulated data vectors.

Everything here works on arrays. A data vector of one model is a 2-D array
``(n_realizations, n_data)`` together with a label table: one row per data element
with the statistic name, the entry (source bin or bin pair), the smoothing scale and
the bin centre (multipole, threshold, ...). :class:`DataTable` bundles the two, plus
the realisation seeds used to pair realisations across models.

The chain is

1. :func:`ensemble_summary` -- mean, unbiased covariance and correlation of the
   fiducial ensemble;
2. :func:`derivatives` -- finite-difference derivatives of the mean data vector with
   respect to each parameter from paired realisations of the stepped models;
3. :func:`fisher_matrix` -- Gaussian Fisher matrix with the Hartlap-debiased
   precision matrix, scale cuts, survey-area scaling and Gaussian priors;
4. :func:`parameter_errors` / :func:`forecast` / :func:`forecast_combinations` --
   marginalised and conditional errors per combination of statistics, with and
   without the Dodelson--Schneider inflation;
5. :func:`stability_diagnostics` -- the same errors from half of the realisations,
   to show whether the covariance and the derivatives have converged;
6. :func:`ellipse_parameters` and :func:`write_error_table` for plots and tables.

The only file input is a prior Fisher matrix (:func:`load_prior_fisher`).
"""

from __future__ import annotations

import csv
import math
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
import scipy.linalg

from .errors import RaytraceError

#: Columns of a label table, in order.
LABEL_FIELDS = ("statistic", "entry", "smoothing_arcmin", "center")
LABEL_DTYPE = np.dtype(
    [("statistic", "U64"), ("entry", "U64"), ("smoothing_arcmin", "f8"), ("center", "f8")]
)

#: Delta chi^2 of the 68.3 % and 95.4 % two-parameter confidence regions (common practice).
DELTA_CHI2_2D = (2.30, 6.18)

#: The Hartlap factor below which :func:`check_sample_size` warns.
MIN_HARTLAP = 0.8

#: Name of the combination that stands for every statistic.
ALL = "all"

_SCALE_CUT_KEYS = ("min", "max", "smoothing_arcmin", "entries")


# --------------------------------------------------------------------------- labels


def make_labels(
    statistic: str | Sequence[str],
    entry: str | Sequence[str],
    smoothing_arcmin: float | Sequence[float],
    center: float | Sequence[float],
) -> np.ndarray:
    """Build a label table from per-element columns (scalars are broadcast).

    Parameters
    ----------
    statistic : statistic name of each data element (e.g. ``"power_spectrum"``).
    entry : source bin or bin pair of each element (e.g. ``"z1.00"``, ``"z0.50xz1.00"``).
    smoothing_arcmin : smoothing scale of each element in arcmin (0 for none).
    center : bin centre of each element (multipole, threshold, ...).

    Returns
    -------
    labels : (n_data,) structured array with fields :data:`LABEL_FIELDS`.
    """
    cols = np.broadcast_arrays(
        np.asarray(statistic, dtype=str),
        np.asarray(entry, dtype=str),
        np.asarray(smoothing_arcmin, dtype=float),
        np.asarray(center, dtype=float),
    )
    n = cols[0].size
    out = np.empty(n, dtype=LABEL_DTYPE)
    for name, col in zip(LABEL_FIELDS, cols):
        out[name] = col.ravel()
    return out


def as_labels(labels: Any, *, source: str = "labels") -> np.ndarray:
    """Convert a label table to the structured form of :func:`make_labels`.

    Parameters
    ----------
    labels : a structured array with the fields :data:`LABEL_FIELDS`, a sequence of
        mappings with those keys, or a sequence of 4-tuples in that order.
    source : name used in error messages (config key or file name).

    Returns
    -------
    labels : (n_data,) structured array.
    """
    if isinstance(labels, np.ndarray) and labels.dtype.names is not None:
        missing = [f for f in LABEL_FIELDS if f not in labels.dtype.names]
        if missing:
            raise RaytraceError(f"{source}: label table lacks the field(s) {', '.join(missing)}")
        return make_labels(*(labels[f] for f in LABEL_FIELDS))
    rows = list(labels)
    if not rows:
        return np.empty(0, dtype=LABEL_DTYPE)
    try:
        if isinstance(rows[0], Mapping):
            cols = [[r[f] for r in rows] for f in LABEL_FIELDS]
        else:
            cols = [list(c) for c in zip(*rows, strict=True)]
            if len(cols) != len(LABEL_FIELDS):
                raise ValueError
        return make_labels(*cols)
    except (KeyError, ValueError, TypeError):
        raise RaytraceError(
            f"{source}: each label needs the fields {', '.join(LABEL_FIELDS)}"
        ) from None


def statistics_in(labels: np.ndarray) -> list[str]:
    """Statistic names present in a label table, in order of first appearance."""
    names = list(np.asarray(labels["statistic"]))
    return list(dict.fromkeys(names))


def _labels_equal(a: np.ndarray, b: np.ndarray) -> bool:
    if a.shape != b.shape:
        return False
    return bool(
        np.array_equal(a["statistic"], b["statistic"])
        and np.array_equal(a["entry"], b["entry"])
        and np.allclose(a["smoothing_arcmin"], b["smoothing_arcmin"], rtol=1e-9, atol=0.0)
        and np.allclose(a["center"], b["center"], rtol=1e-9, atol=0.0, equal_nan=True)
    )


@dataclass
class DataTable:
    """The ensemble of data vectors of one model.

    Attributes
    ----------
    values : (n_realizations, n_data) float array.
    labels : (n_data,) label table (anything :func:`as_labels` accepts).
    seeds : (n_realizations,) identifier of the initial conditions of each row, used to
        pair realisations across models; None pairs rows by position.
    name : model name or file, used in error messages.
    """

    values: np.ndarray
    labels: Any
    seeds: np.ndarray | None = None
    name: str = "data"

    def __post_init__(self) -> None:
        self.values = np.asarray(self.values, dtype=float)
        if self.values.ndim != 2:
            raise RaytraceError(
                f"{self.name}: data vectors must be a 2-D array (n_realizations, n_data), "
                f"got shape {self.values.shape}"
            )
        self.labels = as_labels(self.labels, source=self.name)
        if self.labels.shape[0] != self.values.shape[1]:
            raise RaytraceError(
                f"{self.name}: {self.labels.shape[0]} labels for {self.values.shape[1]} data elements"
            )
        if not np.all(np.isfinite(self.values)):
            bad = np.flatnonzero(~np.all(np.isfinite(self.values), axis=1))
            raise RaytraceError(
                f"{self.name}: non-finite data values in realisation row(s) {bad[:5].tolist()}"
            )
        if self.seeds is not None:
            self.seeds = np.asarray(self.seeds).ravel()
            if self.seeds.shape[0] != self.values.shape[0]:
                raise RaytraceError(
                    f"{self.name}: {self.seeds.shape[0]} seeds for {self.values.shape[0]} realisations"
                )
            if np.unique(self.seeds).size != self.seeds.size:
                raise RaytraceError(f"{self.name}: repeated realisation seeds")

    @property
    def n_realizations(self) -> int:
        return self.values.shape[0]

    @property
    def n_data(self) -> int:
        return self.values.shape[1]


# ------------------------------------------------------------------ ensemble summary


@dataclass
class EnsembleSummary:
    """Mean, covariance and correlation of an ensemble of data vectors."""

    mean: np.ndarray
    covariance: np.ndarray
    correlation: np.ndarray
    n_realizations: int
    labels: np.ndarray | None = None


def ensemble_summary(table: DataTable | np.ndarray) -> EnsembleSummary:
    r"""Sample mean, unbiased sample covariance and correlation of an ensemble.

    Parameters
    ----------
    table : :class:`DataTable` or (n_realizations, n_data) array.

    Returns
    -------
    summary : :class:`EnsembleSummary` with ``mean`` (n_data,), ``covariance`` and
        ``correlation`` (n_data, n_data). Elements with zero variance get a NaN
        correlation (with a warning).

    Notes
    -----
    .. math::

        \bar d_i = \frac{1}{N}\sum_r d_i^{(r)},\qquad
        \hat C_{ij} = \frac{1}{N-1}\sum_r (d_i^{(r)}-\bar d_i)(d_j^{(r)}-\bar d_j),\qquad
        \rho_{ij} = \frac{\hat C_{ij}}{\sqrt{\hat C_{ii}\hat C_{jj}}}

    The :math:`N-1` makes :math:`\hat C` unbiased (common practice); its inverse is
    not, see :func:`hartlap_factor`.
    """
    if isinstance(table, DataTable):
        values, labels, name = table.values, table.labels, table.name
    else:
        values, labels, name = np.asarray(table, dtype=float), None, "data"
        if values.ndim != 2:
            raise RaytraceError(f"{name}: data vectors must be a 2-D array, got shape {values.shape}")
    n = values.shape[0]
    if n < 2:
        raise RaytraceError(f"{name}: a covariance needs at least 2 realisations, got {n}")
    mean = values.mean(axis=0)
    resid = values - mean
    cov = resid.T @ resid / (n - 1)
    cov = 0.5 * (cov + cov.T)
    sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    zero = sd == 0.0
    if np.any(zero):
        warnings.warn(
            f"{name}: {int(zero.sum())} data element(s) have zero variance "
            f"(indices {np.flatnonzero(zero)[:5].tolist()}); their correlation is NaN "
            "and the covariance is singular unless they are cut",
            stacklevel=2,
        )
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(sd, sd)
    corr[zero, :] = np.nan
    corr[:, zero] = np.nan
    return EnsembleSummary(mean=mean, covariance=cov, correlation=corr, n_realizations=n, labels=labels)


# ---------------------------------------------------------------------- derivatives


@dataclass
class DerivativeResult:
    """Finite-difference derivatives of the data vector, one row per parameter.

    Attributes
    ----------
    parameters : parameter names.
    mean : (n_params, n_data) derivative averaged over realisation pairs.
    scatter : (n_params, n_data) standard deviation (N-1) of the per-pair derivatives;
        NaN for a single pair.
    samples : per parameter, the (n_pairs, n_data) per-pair derivatives.
    kind : per parameter ``"central"``, ``"forward"`` or ``"backward"``.
    step : per parameter the denominator :math:`p_+ - p_-` (or against the fiducial).
    labels : label table of the data elements.
    """

    parameters: list[str]
    mean: np.ndarray
    scatter: np.ndarray
    samples: list[np.ndarray]
    kind: list[str]
    step: list[float]
    labels: np.ndarray | None = None

    @property
    def n_pairs(self) -> list[int]:
        return [s.shape[0] for s in self.samples]

    @property
    def standard_error(self) -> np.ndarray:
        """(n_params, n_data) error of the mean derivative: scatter / sqrt(n_pairs)."""
        n = np.asarray(self.n_pairs, dtype=float)[:, None]
        return self.scatter / np.sqrt(n)


def _step_spec(spec: Any, key: str) -> tuple[str, float] | None:
    if spec is None:
        return None
    if isinstance(spec, Mapping):
        try:
            model, value = spec["model"], spec["value"]
        except KeyError:
            raise RaytraceError(f"{key}: needs 'model' and 'value'") from None
    else:
        try:
            model, value = spec
        except (TypeError, ValueError):
            raise RaytraceError(f"{key}: expected (model, value) or a mapping with model/value") from None
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise RaytraceError(f"{key}.value: not a number: {value!r}") from None
    if not math.isfinite(value):
        raise RaytraceError(f"{key}.value: not finite")
    return str(model), value


def _fiducial_spec(fiducial: Any, key: str) -> tuple[str, Mapping[str, float]]:
    if isinstance(fiducial, str):
        return fiducial, {}
    if isinstance(fiducial, Mapping):
        if "model" not in fiducial:
            raise RaytraceError(f"{key}: needs 'model'")
        return str(fiducial["model"]), dict(fiducial.get("values", {}) or {})
    try:
        model, values = fiducial
    except (TypeError, ValueError):
        raise RaytraceError(f"{key}: expected a model name, (model, values) or a mapping") from None
    return str(model), dict(values or {})


def _pair_rows(tables: Sequence[DataTable], key: str) -> list[np.ndarray]:
    """Row indices, one array per table, of the realisations common to all tables."""
    if any(t.seeds is None for t in tables):
        n = {t.n_realizations for t in tables}
        if len(n) != 1:
            names = ", ".join(f"{t.name} ({t.n_realizations})" for t in tables)
            raise RaytraceError(
                f"{key}: realisations cannot be paired without seeds and the counts differ: {names}"
            )
        idx = np.arange(tables[0].n_realizations)
        return [idx for _ in tables]
    common = tables[0].seeds
    for t in tables[1:]:
        common = np.intersect1d(common, t.seeds)
    if common.size == 0:
        raise RaytraceError(f"{key}: no realisation seed is shared by {', '.join(t.name for t in tables)}")
    dropped = [t.name for t in tables if t.n_realizations != common.size]
    if dropped:
        warnings.warn(
            f"{key}: only {common.size} realisations are shared by all models; "
            f"unpaired realisations of {', '.join(dropped)} are not used",
            stacklevel=3,
        )
    out = []
    for t in tables:
        order = np.argsort(t.seeds)
        out.append(order[np.searchsorted(t.seeds, common, sorter=order)])
    return out


def derivatives(
    tables_by_model: Mapping[str, DataTable],
    parameter_steps: Mapping[str, Mapping[str, Any]],
    fiducial: Any,
    *,
    key: str = "forecast.derivatives",
) -> DerivativeResult:
    r"""Finite-difference derivatives of the data vector from paired realisations.

    Parameters
    ----------
    tables_by_model : model name -> :class:`DataTable` of that model's realisations.
    parameter_steps : parameter -> ``{"plus": (model, value), "minus": (model, value)}``;
        either side may be missing or None. ``(model, value)`` may also be given as
        ``{"model": ..., "value": ...}``.
    fiducial : the fiducial model: ``(model, {parameter: value})``, a mapping
        ``{"model": ..., "values": {...}}`` or just the model name (then one-sided
        steps are impossible). The fiducial values are needed only for one-sided steps.
    key : config key named in error messages.

    Returns
    -------
    result : :class:`DerivativeResult`.

    Notes
    -----
    With both steps available the central difference is used,

    .. math:: \frac{\partial d}{\partial p} \approx \frac{d(p_+)-d(p_-)}{p_+-p_-},

    accurate to :math:`O(h^2)` and exact for a data vector quadratic in :math:`p`
    (e.g. Press et al. 2007, Sec. 5.7). With one step only, the one-sided difference
    against the fiducial, :math:`[d(p_\pm)-d(p_0)]/(p_\pm-p_0)`, is used, accurate to
    :math:`O(h)` only, and a warning is issued.

    The models share the seeds of their initial conditions, so the difference is
    taken per realisation :math:`r` before averaging,
    :math:`\partial_p d = \frac{1}{n}\sum_r \partial_p d^{(r)}`: the cosmic variance
    common to the pair cancels, and the scatter of :math:`\partial_p d^{(r)}` over
    :math:`r` measures the remaining noise of the derivative.

    References
    ----------
    Press W. H., Teukolsky S. A., Vetterling W. T., Flannery B. P., 2007, Numerical
    Recipes, 3rd ed., Cambridge University Press.
    """
    fid_model, fid_values = _fiducial_spec(fiducial, f"{key}.fiducial")
    if fid_model not in tables_by_model:
        raise RaytraceError(f"{key}.fiducial: no data for the fiducial model {fid_model!r}")
    fid_table = tables_by_model[fid_model]
    if not parameter_steps:
        raise RaytraceError(f"{key}: no parameters to differentiate")

    params, means, scatters, samples, kinds, steps = [], [], [], [], [], []
    for param, spec in parameter_steps.items():
        pkey = f"{key}.{param}"
        if not isinstance(spec, Mapping):
            raise RaytraceError(f"{pkey}: expected a mapping with 'plus' and/or 'minus'")
        unknown = set(spec) - {"plus", "minus"}
        if unknown:
            raise RaytraceError(f"{pkey}: unknown key(s) {', '.join(sorted(map(str, unknown)))}")
        plus = _step_spec(spec.get("plus"), f"{pkey}.plus")
        minus = _step_spec(spec.get("minus"), f"{pkey}.minus")
        for side, s in (("plus", plus), ("minus", minus)):
            if s is not None and s[0] not in tables_by_model:
                raise RaytraceError(f"{pkey}.{side}: no data for model {s[0]!r}")

        if plus is not None and minus is not None:
            kind = "central"
            hi, lo = tables_by_model[plus[0]], tables_by_model[minus[0]]
            h = plus[1] - minus[1]
        elif plus is None and minus is None:
            raise RaytraceError(f"{pkey}: neither a plus nor a minus step is given")
        else:
            if param not in fid_values:
                raise RaytraceError(
                    f"{key}.fiducial.values.{param}: needed for the one-sided derivative"
                )
            p0 = float(fid_values[param])
            if plus is not None:
                kind, hi, lo, h = "forward", tables_by_model[plus[0]], fid_table, plus[1] - p0
            else:
                kind, hi, lo, h = "backward", fid_table, tables_by_model[minus[0]], p0 - minus[1]
            warnings.warn(
                f"{pkey}: only the {'plus' if plus is not None else 'minus'} step exists; "
                "using a one-sided difference against the fiducial (first-order accurate)",
                stacklevel=2,
            )
        if not h > 0:
            raise RaytraceError(
                f"{pkey}: the plus value must exceed the minus (or fiducial) value, got a step of {h}"
            )
        for t in (hi, lo):
            if not _labels_equal(t.labels, fid_table.labels):
                raise RaytraceError(
                    f"{pkey}: the data elements of {t.name!r} differ from those of the fiducial {fid_table.name!r}"
                )
        i_hi, i_lo = _pair_rows([hi, lo], pkey)
        per_pair = (hi.values[i_hi] - lo.values[i_lo]) / h
        n_pairs = per_pair.shape[0]
        params.append(str(param))
        means.append(per_pair.mean(axis=0))
        scatters.append(
            per_pair.std(axis=0, ddof=1) if n_pairs > 1 else np.full(per_pair.shape[1], np.nan)
        )
        samples.append(per_pair)
        kinds.append(kind)
        steps.append(float(h))
    return DerivativeResult(
        parameters=params,
        mean=np.array(means),
        scatter=np.array(scatters),
        samples=samples,
        kind=kinds,
        step=steps,
        labels=fid_table.labels,
    )


# ----------------------------------------------------------- finite-sample factors


def hartlap_factor(n_sims: int, n_data: int) -> float:
    r"""Debiasing factor of the inverse of a sample covariance matrix.

    Parameters
    ----------
    n_sims : number of independent realisations :math:`N` behind the covariance.
    n_data : length :math:`p` of the data vector.

    Returns
    -------
    h : the factor multiplying :math:`\hat C^{-1}`.

    Raises
    ------
    RaytraceError
        When :math:`N \le p + 2`, where the inverse is undefined or its mean diverges.

    Notes
    -----
    For Gaussian data :math:`(N-1)\hat C` is Wishart distributed and
    :math:`\langle \hat C^{-1}\rangle = \frac{N-1}{N-p-2}\,C^{-1}`, so the unbiased
    precision matrix is (Hartlap, Simon & Schneider 2007)

    .. math:: \hat\Psi = \frac{N-p-2}{N-1}\,\hat C^{-1}.

    References
    ----------
    Hartlap J., Simon P., Schneider P., 2007, A&A, 464, 399.
    """
    n, p = int(n_sims), int(n_data)
    if n <= p + 2:
        raise RaytraceError(
            f"n_sims={n}: the inverse covariance of {p} data elements needs more than "
            f"{p + 2} realisations (Hartlap factor (N-p-2)/(N-1) <= 0); cut the data vector or add simulations"
        )
    return (n - p - 2) / (n - 1)


def dodelson_schneider_factor(n_sims: int, n_data: int, n_params: int) -> float:
    r"""Inflation of the parameter variance caused by a simulated covariance.

    Parameters
    ----------
    n_sims : number of realisations :math:`N_s` behind the covariance.
    n_data : length :math:`N_b` of the data vector.
    n_params : number of parameters :math:`N_p` varied in the fit.

    Returns
    -------
    factor : multiplies the parameter variances (the errors by its square root).

    Raises
    ------
    RaytraceError
        When :math:`N_s \le N_b + 4`, where :math:`B` is undefined or negative.

    Notes
    -----
    Dodelson & Schneider (2013) show that the noise of a covariance estimated from
    :math:`N_s` simulations (with the Hartlap-debiased inverse) adds scatter to the
    best-fitting parameters, so the true parameter covariance is the Fisher
    prediction times

    .. math::

        1 + B\,(N_b - N_p),\qquad
        B = \frac{N_s - N_b - 2}{(N_s - N_b - 1)(N_s - N_b - 4)},

    i.e. roughly :math:`1 + N_b/N_s` for :math:`N_s \gg N_b` (their abstract). The
    expressions are written here from memory of the paper's main result (equation
    numbers not checked) and agree with its abstract's :math:`1 + N_b/N_s` scaling; the derivation assumes Gaussian
    data and no priors.

    References
    ----------
    Dodelson S., Schneider M. D., 2013, Phys. Rev. D, 88, 063537 (arXiv:1304.2593).
    """
    n, p, k = int(n_sims), int(n_data), int(n_params)
    if n <= p + 4:
        raise RaytraceError(
            f"n_sims={n}: the Dodelson-Schneider factor for {p} data elements needs more than {p + 4} realisations"
        )
    if k < 1:
        raise RaytraceError(f"n_params={k}: at least one parameter is needed")
    b = (n - p - 2) / ((n - p - 1) * (n - p - 4))
    return 1.0 + b * (p - k)


def check_sample_size(
    n_sims: int, n_data: int, *, min_hartlap: float = MIN_HARTLAP, context: str = ""
) -> float:
    r"""Hartlap factor of ``(n_sims, n_data)``, warning when it is small.

    Parameters
    ----------
    n_sims, n_data : number of realisations and of data elements.
    min_hartlap : warn when the Hartlap factor is below this (default 0.8, i.e. when
        the raw inverse covariance overestimates the information by more than 25 %).
    context : prefix of the messages (e.g. the combination name).

    Returns
    -------
    h : :func:`hartlap_factor` ``(n_sims, n_data)``.

    Notes
    -----
    :math:`N \le p+2` is fatal (:func:`hartlap_factor` raises). Below
    :math:`h = 0.8` the debiased Fisher matrix is unbiased on average but noisy: its
    fractional scatter is about :math:`\sqrt{2/(N-p-4)}` (Taylor, Joachimi & Kitching
    2013), and the threshold is a choice of this package.

    References
    ----------
    Taylor A., Joachimi B., Kitching T., 2013, MNRAS, 432, 1928.
    """
    prefix = f"{context}: " if context else ""
    try:
        h = hartlap_factor(n_sims, n_data)
    except RaytraceError as exc:
        raise RaytraceError(f"{prefix}{exc}") from None
    if h < min_hartlap:
        warnings.warn(
            f"{prefix}{n_sims} realisations for {n_data} data elements give a Hartlap factor "
            f"of {h:.3f} < {min_hartlap}; the forecast is dominated by covariance noise "
            "(use more simulations or stronger scale cuts)",
            stacklevel=2,
        )
    return h


# ------------------------------------------------------------------ selections


def scale_cut_mask(labels: Any, scale_cuts: Mapping[str, Mapping[str, Any]] | None) -> np.ndarray:
    """Boolean mask of the data elements that pass the scale cuts.

    Parameters
    ----------
    labels : label table.
    scale_cuts : statistic -> cuts, each optional: ``min``/``max`` (inclusive range of
        the bin centre: multipole for a power spectrum, threshold for peaks ...),
        ``smoothing_arcmin`` (list of smoothing scales kept) and ``entries`` (list of
        entries kept). Statistics without cuts keep all their elements. None: no cuts.

    Returns
    -------
    keep : (n_data,) bool.
    """
    labels = as_labels(labels)
    keep = np.ones(labels.shape[0], dtype=bool)
    if not scale_cuts:
        return keep
    present = set(statistics_in(labels))
    for stat, cuts in scale_cuts.items():
        key = f"forecast.scale_cuts.{stat}"
        if stat not in present:
            warnings.warn(f"{key}: no data elements of this statistic; the cut does nothing", stacklevel=2)
            continue
        if not isinstance(cuts, Mapping):
            raise RaytraceError(f"{key}: expected a mapping with keys {', '.join(_SCALE_CUT_KEYS)}")
        unknown = set(cuts) - set(_SCALE_CUT_KEYS)
        if unknown:
            raise RaytraceError(f"{key}: unknown key(s) {', '.join(sorted(map(str, unknown)))}")
        this = labels["statistic"] == stat
        ok = np.ones_like(this)
        lo, hi = cuts.get("min"), cuts.get("max")
        try:
            lo = -np.inf if lo is None else float(lo)
            hi = np.inf if hi is None else float(hi)
        except (TypeError, ValueError):
            raise RaytraceError(f"{key}: min and max must be numbers") from None
        if lo > hi:
            raise RaytraceError(f"{key}: min ({lo}) exceeds max ({hi})")
        ok &= (labels["center"] >= lo) & (labels["center"] <= hi)
        if cuts.get("smoothing_arcmin") is not None:
            scales = np.atleast_1d(np.asarray(cuts["smoothing_arcmin"], dtype=float))
            ok &= np.isclose(labels["smoothing_arcmin"][:, None], scales[None, :], rtol=1e-6, atol=1e-9).any(axis=1)
        if cuts.get("entries") is not None:
            ok &= np.isin(labels["entry"], np.atleast_1d(np.asarray(cuts["entries"], dtype=str)))
        keep &= ~this | ok
        if not np.any(this & keep):
            warnings.warn(f"{key}: the cuts remove every element of {stat!r}", stacklevel=2)
    return keep


def combination_statistics(combination: str | Sequence[str], labels: Any) -> tuple[str, ...]:
    """Statistic names of one combination; ``"all"`` expands to every statistic.

    Parameters
    ----------
    combination : a statistic name, names joined with ``+``, ``"all"``, or a sequence
        of names (which may contain ``"all"``).
    labels : label table, to expand ``all`` and check the names.

    Returns
    -------
    names : statistic names, in the order of the label table.
    """
    labels = as_labels(labels)
    known = statistics_in(labels)
    names = combination.split("+") if isinstance(combination, str) else [str(c) for c in combination]
    names = [n.strip() for n in names if n.strip()]
    if not names:
        raise RaytraceError("forecast.combinations: empty combination")
    if ALL in names:
        return tuple(known)
    unknown = [n for n in names if n not in known]
    if unknown:
        raise RaytraceError(
            f"forecast.combinations: unknown statistic(s) {', '.join(unknown)} (known: {', '.join(known)})"
        )
    return tuple(k for k in known if k in names)


def combination_name(combination: str | Sequence[str]) -> str:
    """Name of a combination in tables and plots: the names joined with ``+``."""
    if isinstance(combination, str):
        return combination
    return "+".join(str(c) for c in combination)


def select_combination(labels: Any, combination: str | Sequence[str]) -> np.ndarray:
    """Boolean mask of the data elements belonging to the statistics of a combination."""
    labels = as_labels(labels)
    return np.isin(labels["statistic"], combination_statistics(combination, labels))


# ------------------------------------------------------------------------- priors


def _is_number_row(tokens: Sequence[str]) -> bool:
    try:
        [float(t) for t in tokens]
    except ValueError:
        return False
    return True


def load_prior_fisher(
    path: str | os.PathLike, n_params: int, parameters: Sequence[str] | None = None
) -> np.ndarray:
    """Read a prior Fisher matrix from ``.npy``, ``.txt``/``.dat`` or ``.csv``.

    Parameters
    ----------
    path : the file. Text files are whitespace (``.txt``, ``.dat``) or comma (``.csv``)
        separated, ``#`` starts a comment. A first row of names is a header giving the
        parameter order of the rows and columns; it is then reordered to ``parameters``.
    n_params : expected size.
    parameters : parameter names of the forecast, needed to reorder a file with a header.

    Returns
    -------
    prior : (n_params, n_params) symmetric positive semi-definite array.
    """
    p = Path(path)
    if not p.is_file():
        raise RaytraceError(f"{p}: prior Fisher file not found")
    suffix = p.suffix.lower()
    header = None
    try:
        if suffix == ".npy":
            arr = np.load(p, allow_pickle=False)
        elif suffix in (".txt", ".dat", ".csv"):
            delim = "," if suffix == ".csv" else None
            lines = [ln.split("#", 1)[0].strip() for ln in p.read_text().splitlines()]
            lines = [ln for ln in lines if ln]
            rows = [[t.strip() for t in ln.split(delim)] for ln in lines]
            if rows and not _is_number_row(rows[0]):
                header, rows = rows[0], rows[1:]
            arr = np.array([[float(t) for t in r] for r in rows], dtype=float)
        else:
            raise RaytraceError(f"{p}: prior Fisher file must be .npy, .txt, .dat or .csv")
    except RaytraceError:
        raise
    except (ValueError, OSError, UnicodeDecodeError) as exc:
        raise RaytraceError(f"{p}: cannot read the prior Fisher matrix ({exc})") from None
    try:
        arr = np.asarray(arr, dtype=float)
    except (TypeError, ValueError):
        raise RaytraceError(f"{p}: prior Fisher matrix is not a numeric array") from None
    if arr.ndim != 2 or arr.shape != (n_params, n_params):
        raise RaytraceError(
            f"{p}: prior Fisher matrix has shape {arr.shape}, expected ({n_params}, {n_params})"
        )
    if header is not None:
        if len(header) != n_params or len(set(header)) != n_params:
            raise RaytraceError(f"{p}: the header must name the {n_params} parameters once each")
        if parameters is None:
            raise RaytraceError(f"{p}: the file has a header but the parameter names are not known")
        missing = [q for q in parameters if q not in header]
        if missing:
            raise RaytraceError(f"{p}: header lacks parameter(s) {', '.join(missing)}")
        order = [header.index(q) for q in parameters]
        arr = arr[np.ix_(order, order)]
    return _check_prior(arr, str(p))


def _check_prior(arr: np.ndarray, source: str) -> np.ndarray:
    if not np.all(np.isfinite(arr)):
        raise RaytraceError(f"{source}: prior Fisher matrix has non-finite entries")
    scale = max(float(np.max(np.abs(arr))), np.finfo(float).tiny)
    if not np.allclose(arr, arr.T, rtol=1e-8, atol=1e-10 * scale):
        raise RaytraceError(f"{source}: prior Fisher matrix is not symmetric")
    arr = 0.5 * (arr + arr.T)
    if np.min(np.linalg.eigvalsh(arr)) < -1e-10 * scale:
        raise RaytraceError(f"{source}: prior Fisher matrix is not positive semi-definite")
    return arr


def prior_matrix(
    n_params: int,
    *,
    prior_sigma: Mapping[str, float] | Sequence[float | None] | None = None,
    prior_fisher: np.ndarray | str | os.PathLike | None = None,
    parameters: Sequence[str] | None = None,
) -> np.ndarray:
    r"""Fisher matrix of Gaussian priors, per parameter and/or as a full matrix.

    Parameters
    ----------
    n_params : number of parameters.
    prior_sigma : Gaussian prior width per parameter: a mapping name -> sigma (needs
        ``parameters``) or a sequence of length ``n_params`` with None or ``inf`` for
        no prior.
    prior_fisher : a prior Fisher matrix, as an array or a file for
        :func:`load_prior_fisher`.
    parameters : parameter names, in the order of the Fisher matrix.

    Returns
    -------
    prior : (n_params, n_params) array, zero where there is no prior.

    Notes
    -----
    Independent Gaussian information adds (e.g. Coe 2009, Sec. 5):
    :math:`F_{\rm tot} = F + F_{\rm prior}`, with
    :math:`F_{\rm prior} = {\rm diag}(\sigma_i^{-2})` for independent priors.

    References
    ----------
    Coe D., 2009, arXiv:0906.4123, "Fisher Matrices and Confidence Ellipses: A Quick-Start Guide".
    """
    out = np.zeros((n_params, n_params))
    if prior_sigma is not None:
        if isinstance(prior_sigma, Mapping):
            if parameters is None:
                raise RaytraceError("forecast.priors.sigma: parameter names are needed for priors by name")
            sig = [None] * n_params
            for name, s in prior_sigma.items():
                if name not in parameters:
                    raise RaytraceError(
                        f"forecast.priors.sigma.{name}: not a forecast parameter (known: {', '.join(parameters)})"
                    )
                sig[list(parameters).index(name)] = s
        else:
            sig = list(prior_sigma)
            if len(sig) != n_params:
                raise RaytraceError(f"forecast.priors.sigma: {len(sig)} values for {n_params} parameters")
        for i, s in enumerate(sig):
            if s is None:
                continue
            name = parameters[i] if parameters is not None else str(i)
            try:
                s = float(s)
            except (TypeError, ValueError):
                raise RaytraceError(f"forecast.priors.sigma.{name}: not a number: {s!r}") from None
            if math.isinf(s):
                continue
            if not s > 0:
                raise RaytraceError(f"forecast.priors.sigma.{name}: must be positive, got {s}")
            out[i, i] += 1.0 / s**2
    if prior_fisher is not None:
        if isinstance(prior_fisher, (str, os.PathLike)):
            out += load_prior_fisher(prior_fisher, n_params, parameters)
        else:
            arr = np.asarray(prior_fisher, dtype=float)
            if arr.shape != (n_params, n_params):
                raise RaytraceError(
                    f"forecast.priors.fisher: shape {arr.shape}, expected ({n_params}, {n_params})"
                )
            out += _check_prior(arr, "forecast.priors.fisher")
    return out


# ------------------------------------------------------------------ Fisher matrix


def precision_matrix(cov: np.ndarray, n_sims: int | None, *, hartlap: bool = True) -> np.ndarray:
    r"""Inverse covariance, multiplied by the Hartlap factor when ``n_sims`` is given.

    Parameters
    ----------
    cov : (p, p) covariance.
    n_sims : realisations behind ``cov``; None for an exactly known covariance.
    hartlap : apply :func:`hartlap_factor` (only with ``n_sims``).

    Returns
    -------
    psi : (p, p) precision matrix :math:`\frac{N-p-2}{N-1}\hat C^{-1}`.
    """
    cov = np.asarray(cov, dtype=float)
    p = cov.shape[0]
    factor = hartlap_factor(n_sims, p) if (hartlap and n_sims is not None) else 1.0
    return factor * _inverse_spd(cov)


def _cho(cov: np.ndarray):
    try:
        return scipy.linalg.cho_factor(cov, lower=True, check_finite=True)
    except (np.linalg.LinAlgError, ValueError):
        raise RaytraceError(
            f"covariance of the {cov.shape[0]} selected data elements is not positive definite; "
            "remove constant or duplicated elements with forecast.scale_cuts or add simulations"
        ) from None


def _inverse_spd(cov: np.ndarray) -> np.ndarray:
    c = _cho(cov)
    inv = scipy.linalg.cho_solve(c, np.eye(cov.shape[0]))
    return 0.5 * (inv + inv.T)


def _derivative_array(derivs: DerivativeResult | np.ndarray) -> tuple[np.ndarray, list[str] | None]:
    if isinstance(derivs, DerivativeResult):
        return np.asarray(derivs.mean, dtype=float), list(derivs.parameters)
    d = np.asarray(derivs, dtype=float)
    if d.ndim == 1:
        d = d[None, :]
    if d.ndim != 2:
        raise RaytraceError(f"derivatives must be (n_params, n_data), got shape {d.shape}")
    return d, None


def area_ratio(map_area: float | None, survey_area: float | None) -> float:
    r"""Factor :math:`A_{\rm survey}/A_{\rm map}` multiplying the Fisher matrix.

    Notes
    -----
    The covariance of a statistic averaged over a field scales inversely with the
    area, :math:`C_{\rm survey} = C_{\rm map}\,A_{\rm map}/A_{\rm survey}` (common
    practice; exact for a survey made of independent patches of the map size, and
    neglecting super-sample covariance and survey-geometry effects otherwise). The
    Fisher matrix therefore scales by :math:`A_{\rm survey}/A_{\rm map}`. Both areas in
    the same unit; neither given: factor 1.
    """
    if map_area is None and survey_area is None:
        return 1.0
    if map_area is None or survey_area is None:
        raise RaytraceError("forecast.survey_area and forecast.map_area must be given together")
    for key, a in (("forecast.map_area", map_area), ("forecast.survey_area", survey_area)):
        if not (isinstance(a, (int, float, np.floating, np.integer)) and math.isfinite(a) and a > 0):
            raise RaytraceError(f"{key}: must be a positive number, got {a!r}")
    return float(survey_area) / float(map_area)


def fisher_matrix(
    derivs: DerivativeResult | np.ndarray,
    cov: np.ndarray,
    n_sims: int | None,
    *,
    mask: np.ndarray | None = None,
    map_area: float | None = None,
    survey_area: float | None = None,
    hartlap: bool = True,
    prior_sigma: Mapping[str, float] | Sequence[float | None] | None = None,
    prior_fisher: np.ndarray | str | os.PathLike | None = None,
    parameters: Sequence[str] | None = None,
    min_hartlap: float = MIN_HARTLAP,
    context: str = "",
) -> np.ndarray:
    r"""Gaussian Fisher matrix of the mean data vector.

    Parameters
    ----------
    derivs : :class:`DerivativeResult` or (n_params, n_data) derivatives
        :math:`\partial \bar d/\partial \theta_\alpha`.
    cov : (n_data, n_data) covariance of one map (or of whatever ``map_area`` is).
    n_sims : realisations behind ``cov``; None when the covariance is known exactly
        (no Hartlap factor, no sample-size check).
    mask : (n_data,) bool selecting the data elements used (scale cuts, combination).
    map_area, survey_area : area of one map and of the survey, same units; the
        covariance is scaled by ``map_area / survey_area`` (see :func:`area_ratio`).
    hartlap : debias the inverse covariance with :func:`hartlap_factor`.
    prior_sigma, prior_fisher : Gaussian priors, see :func:`prior_matrix`.
    parameters : parameter names (taken from ``derivs`` when it is a
        :class:`DerivativeResult`), needed for priors by name.
    min_hartlap : threshold of the small-sample warning of :func:`check_sample_size`.
    context : prefix of warnings and errors (e.g. the combination name).

    Returns
    -------
    fisher : (n_params, n_params) symmetric array.

    Notes
    -----
    For a Gaussian likelihood whose covariance does not depend on the parameters
    (Tegmark, Taylor & Heavens 1997, Eq. 15, mean term only),

    .. math::

        F_{\alpha\beta} = \frac{A_{\rm survey}}{A_{\rm map}}\,
        \frac{N-p-2}{N-1}\,
        \frac{\partial \bar d}{\partial\theta_\alpha}^{\!T} \hat C^{-1}
        \frac{\partial \bar d}{\partial\theta_\beta} + F^{\rm prior}_{\alpha\beta},

    where :math:`p` counts the selected elements only, and the middle factor is the
    Hartlap et al. (2007) correction.

    References
    ----------
    Tegmark M., Taylor A. N., Heavens A. F., 1997, ApJ, 480, 22.
    Hartlap J., Simon P., Schneider P., 2007, A&A, 464, 399.
    """
    d, names = _derivative_array(derivs)
    if names is not None:
        if parameters is not None and list(parameters) != names:
            raise RaytraceError("forecast.parameters: the names differ from those of the derivatives")
        parameters = names
    cov = np.asarray(cov, dtype=float)
    n_data = d.shape[1]
    if cov.shape != (n_data, n_data):
        raise RaytraceError(f"covariance has shape {cov.shape}, expected ({n_data}, {n_data}) from the derivatives")
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != (n_data,):
            raise RaytraceError(f"data selection mask has shape {mask.shape}, expected ({n_data},)")
        d = d[:, mask]
        cov = cov[np.ix_(mask, mask)]
    prefix = f"{context}: " if context else ""
    p = d.shape[1]
    if p == 0:
        raise RaytraceError(f"{prefix}no data elements are left after the scale cuts")
    if not np.all(np.isfinite(d)):
        raise RaytraceError(f"{prefix}derivatives contain non-finite values")
    h = 1.0
    if n_sims is not None and hartlap:
        h = check_sample_size(n_sims, p, min_hartlap=min_hartlap, context=context)
    c = _cho(cov)
    fisher = h * area_ratio(map_area, survey_area) * (d @ scipy.linalg.cho_solve(c, d.T))
    fisher = 0.5 * (fisher + fisher.T)
    if prior_sigma is not None or prior_fisher is not None:
        fisher = fisher + prior_matrix(
            fisher.shape[0], prior_sigma=prior_sigma, prior_fisher=prior_fisher, parameters=parameters
        )
    return fisher


# ------------------------------------------------------------------------ errors


def parameter_covariance(fisher: np.ndarray, parameters: Sequence[str] | None = None) -> np.ndarray:
    r"""Marginalised parameter covariance :math:`F^{-1}`.

    Raises
    ------
    RaytraceError
        If the Fisher matrix is not positive definite (a parameter or a direction in
        parameter space is not constrained); the message names the worst parameters.
    """
    f = np.asarray(fisher, dtype=float)
    if f.ndim != 2 or f.shape[0] != f.shape[1]:
        raise RaytraceError(f"Fisher matrix must be square, got shape {f.shape}")
    diag = np.diag(f)
    if np.any(~np.isfinite(f)) or np.any(diag <= 0):
        bad = np.flatnonzero(~(diag > 0))
        names = [parameters[i] if parameters is not None else str(i) for i in bad]
        raise RaytraceError(
            f"Fisher matrix has no information on parameter(s) {', '.join(names) or '?'}; add priors (forecast.priors)"
        )
    # Invert the correlation form: better conditioned when the parameters differ in scale.
    s = 1.0 / np.sqrt(diag)
    r = f * np.outer(s, s)
    w, v = np.linalg.eigh(r)
    if w[0] <= 1e-12 * w[-1]:
        worst = np.argsort(-np.abs(v[:, 0]))[:2]
        names = [parameters[i] if parameters is not None else str(i) for i in worst]
        raise RaytraceError(
            f"Fisher matrix is singular: the data cannot separate {' and '.join(names)}; add priors (forecast.priors)"
        )
    rinv = (v / w) @ v.T
    cov = rinv * np.outer(s, s)
    return 0.5 * (cov + cov.T)


def parameter_errors(
    fisher: np.ndarray, parameters: Sequence[str] | None = None
) -> tuple[np.ndarray, np.ndarray]:
    r"""Marginalised and conditional 1-sigma errors from a Fisher matrix.

    Parameters
    ----------
    fisher : (n, n) Fisher matrix.
    parameters : names, used in error messages.

    Returns
    -------
    marginalised : (n,) :math:`\sqrt{(F^{-1})_{\alpha\alpha}}`, other parameters free.
    conditional : (n,) :math:`1/\sqrt{F_{\alpha\alpha}}`, other parameters fixed.

    Notes
    -----
    Cramér--Rao bounds of an unbiased estimator (e.g. Tegmark, Taylor & Heavens 1997,
    Sec. 2.1); always :math:`\sigma_{\rm cond} \le \sigma_{\rm marg}`.

    References
    ----------
    Tegmark M., Taylor A. N., Heavens A. F., 1997, ApJ, 480, 22.
    """
    cov = parameter_covariance(fisher, parameters)
    marg = np.sqrt(np.diag(cov))
    cond = 1.0 / np.sqrt(np.diag(np.asarray(fisher, dtype=float)))
    return marg, cond


@dataclass
class ForecastResult:
    """Fisher forecast of one combination of statistics.

    Attributes
    ----------
    name : combination name (statistics joined by ``+``).
    statistics : the statistics used.
    parameters : parameter names.
    n_data : number of data elements after cuts.
    n_sims : realisations behind the covariance (None: exact covariance).
    hartlap : Hartlap factor applied (1 without).
    fisher : (n_params, n_params) Fisher matrix including priors.
    covariance : (n_params, n_params) marginalised parameter covariance :math:`F^{-1}`.
    marginalised, conditional : (n_params,) errors without the Dodelson-Schneider factor.
    ds_marginalised, ds_conditional : variance factors applied to the marginalised
        errors (with ``n_params`` parameters) and to the conditional errors (one
        parameter, the others fixed); 1 with an exact covariance, NaN when undefined.
    mask : (n_data_total,) bool selection of the data elements.
    """

    name: str
    statistics: tuple[str, ...]
    parameters: list[str]
    n_data: int
    n_sims: int | None
    hartlap: float
    fisher: np.ndarray
    covariance: np.ndarray
    marginalised: np.ndarray
    conditional: np.ndarray
    ds_marginalised: float
    ds_conditional: float
    mask: np.ndarray = field(repr=False, default_factory=lambda: np.zeros(0, bool))

    @property
    def marginalised_ds(self) -> np.ndarray:
        """Marginalised errors times the square root of the Dodelson-Schneider factor."""
        return self.marginalised * math.sqrt(self.ds_marginalised)

    @property
    def conditional_ds(self) -> np.ndarray:
        """Conditional errors times the square root of the one-parameter DS factor."""
        return self.conditional * math.sqrt(self.ds_conditional)


def _ds_or_nan(n_sims: int | None, p: int, k: int, context: str) -> float:
    if n_sims is None:
        return 1.0
    try:
        return dodelson_schneider_factor(n_sims, p, k)
    except RaytraceError as exc:
        warnings.warn(f"{context}: {exc}; the errors with the factor are NaN", stacklevel=3)
        return float("nan")


def forecast(
    derivs: DerivativeResult | np.ndarray,
    cov: np.ndarray,
    n_sims: int | None,
    labels: Any,
    combination: str | Sequence[str] = ALL,
    *,
    scale_cuts: Mapping[str, Mapping[str, Any]] | None = None,
    parameters: Sequence[str] | None = None,
    hartlap: bool = True,
    **fisher_kwargs: Any,
) -> ForecastResult:
    r"""Fisher matrix and errors of one combination of statistics.

    Parameters
    ----------
    derivs, cov, n_sims : as for :func:`fisher_matrix`.
    labels : label table of the data elements.
    combination : statistics to combine (see :func:`combination_statistics`).
    scale_cuts : see :func:`scale_cut_mask`.
    parameters : parameter names (default: from ``derivs``, else ``p0, p1, ...``).
    hartlap : debias the inverse covariance.
    **fisher_kwargs : ``map_area``, ``survey_area``, ``prior_sigma``,
        ``prior_fisher``, ``min_hartlap`` of :func:`fisher_matrix`.

    Returns
    -------
    result : :class:`ForecastResult`.

    Notes
    -----
    The errors "with DS" are :math:`\sigma\sqrt{1 + B(p - n_\theta)}` of
    :func:`dodelson_schneider_factor`, with :math:`n_\theta` the number of parameters
    for the marginalised errors and :math:`n_\theta = 1` for the conditional ones
    (a one-parameter fit). With priors the factor is an approximation: Dodelson &
    Schneider (2013) derive it without priors.

    References
    ----------
    Dodelson S., Schneider M. D., 2013, Phys. Rev. D, 88, 063537.
    """
    labels = as_labels(labels)
    d, names = _derivative_array(derivs)
    if parameters is None:
        parameters = names if names is not None else [f"p{i}" for i in range(d.shape[0])]
    parameters = list(parameters)
    if len(parameters) != d.shape[0]:
        raise RaytraceError(f"forecast.parameters: {len(parameters)} names for {d.shape[0]} derivatives")
    if labels.shape[0] != d.shape[1]:
        raise RaytraceError(f"labels: {labels.shape[0]} labels for {d.shape[1]} data elements")
    stats = combination_statistics(combination, labels)
    name = combination_name(combination)
    mask = np.isin(labels["statistic"], stats) & scale_cut_mask(labels, scale_cuts)
    p = int(mask.sum())
    if p == 0:
        raise RaytraceError(f"forecast.combinations: {name}: no data elements left after forecast.scale_cuts")
    fisher = fisher_matrix(
        d, cov, n_sims, mask=mask, hartlap=hartlap, parameters=parameters, context=name, **fisher_kwargs
    )
    cov_p = parameter_covariance(fisher, parameters)
    marg = np.sqrt(np.diag(cov_p))
    cond = 1.0 / np.sqrt(np.diag(fisher))
    use_n = n_sims if hartlap else None
    return ForecastResult(
        name=name,
        statistics=stats,
        parameters=parameters,
        n_data=p,
        n_sims=n_sims,
        hartlap=hartlap_factor(n_sims, p) if use_n is not None else 1.0,
        fisher=fisher,
        covariance=cov_p,
        marginalised=marg,
        conditional=cond,
        ds_marginalised=_ds_or_nan(n_sims, p, len(parameters), name),
        ds_conditional=_ds_or_nan(n_sims, p, 1, name),
        mask=mask,
    )


def forecast_combinations(
    derivs: DerivativeResult | np.ndarray,
    cov: np.ndarray,
    n_sims: int | None,
    labels: Any,
    combinations: Iterable[str | Sequence[str]],
    **kwargs: Any,
) -> list[ForecastResult]:
    """:func:`forecast` for each combination of statistics.

    Parameters
    ----------
    derivs, cov, n_sims, labels : as for :func:`forecast`.
    combinations : list of combinations, each a statistic name, ``"all"``, names
        joined with ``+`` or a list of names.
    **kwargs : passed to :func:`forecast`.

    Returns
    -------
    results : one :class:`ForecastResult` per combination, in order.
    """
    combos = list(combinations)
    if not combos:
        raise RaytraceError("forecast.combinations: no combination given")
    results = [forecast(derivs, cov, n_sims, labels, c, **kwargs) for c in combos]
    names = [r.name for r in results]
    if len(set(names)) != len(names):
        raise RaytraceError(f"forecast.combinations: repeated combination in {', '.join(names)}")
    return results


# -------------------------------------------------------------------- diagnostics


@dataclass
class StabilityDiagnostics:
    """Marginalised errors recomputed from halves of the realisations.

    Attributes
    ----------
    parameters : parameter names.
    full : (n_params,) marginalised errors from everything.
    half_covariance : (2, n_params) errors with the covariance from either half of
        the fiducial realisations (NaN where a half is too small).
    half_derivatives : (2, n_params) errors with the derivatives from either half of
        the realisation pairs.
    """

    name: str
    parameters: list[str]
    full: np.ndarray
    half_covariance: np.ndarray
    half_derivatives: np.ndarray

    @property
    def covariance_change(self) -> np.ndarray:
        """(n_params,) largest relative change of an error when halving the covariance sims."""
        return np.nanmax(np.abs(self.half_covariance / self.full - 1.0), axis=0)

    @property
    def derivative_change(self) -> np.ndarray:
        """(n_params,) largest relative change of an error when halving the derivative pairs."""
        return np.nanmax(np.abs(self.half_derivatives / self.full - 1.0), axis=0)


def _halves(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    perm = rng.permutation(n)
    return np.sort(perm[: n // 2]), np.sort(perm[n // 2 : 2 * (n // 2)])


def stability_diagnostics(
    fiducial_values: np.ndarray | DataTable,
    derivs: DerivativeResult,
    labels: Any,
    combination: str | Sequence[str] = ALL,
    *,
    seed: int = 0,
    tolerance: float = 0.1,
    **forecast_kwargs: Any,
) -> StabilityDiagnostics:
    r"""Convergence check: errors from half of the covariance sims or derivative pairs.

    Parameters
    ----------
    fiducial_values : (n_realizations, n_data) fiducial ensemble behind the covariance.
    derivs : :class:`DerivativeResult` with the per-pair ``samples``.
    labels : label table.
    combination : combination of statistics to check.
    seed : seed of the random split into halves.
    tolerance : warn when an error changes by more than this fraction (default 10 %).
    **forecast_kwargs : ``scale_cuts``, ``map_area``, ``survey_area``, priors ... of
        :func:`forecast`.

    Returns
    -------
    diagnostics : :class:`StabilityDiagnostics`.

    Notes
    -----
    With the Hartlap-debiased precision matrix the Fisher matrix from :math:`N/2`
    realisations is unbiased too, so halving the covariance sims should change the
    errors only by the expected noise, :math:`\sim\sqrt{2/(N/2-p)}` (Taylor et al.
    2013). Noise in the derivatives adds a positive term to the Fisher matrix, so
    errors that shrink markedly with half of the pairs show unconverged derivatives
    (common practice).
    """
    values = fiducial_values.values if isinstance(fiducial_values, DataTable) else np.asarray(fiducial_values, float)
    rng = np.random.default_rng(seed)
    n = values.shape[0]
    base = ensemble_summary(values)
    forecast_kwargs = dict(forecast_kwargs)
    forecast_kwargs.setdefault("parameters", list(derivs.parameters))
    full = forecast(derivs, base.covariance, n, labels, combination, **forecast_kwargs)
    k = len(full.parameters)

    half_cov = np.full((2, k), np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i, rows in enumerate(_halves(n, rng)):
            if rows.size > full.n_data + 2:
                c = ensemble_summary(values[rows]).covariance
                try:
                    half_cov[i] = forecast(derivs, c, rows.size, labels, combination, **forecast_kwargs).marginalised
                except RaytraceError:
                    pass
    if np.all(np.isnan(half_cov)):
        warnings.warn(
            f"{full.name}: half of the {n} realisations is too few for {full.n_data} data elements; "
            "no half-covariance check",
            stacklevel=2,
        )

    half_der = np.full((2, k), np.nan)
    if min(derivs.n_pairs) >= 2:
        splits = [_halves(s.shape[0], rng) for s in derivs.samples]
        for i in range(2):
            mean = np.array([s[sp[i]].mean(axis=0) for s, sp in zip(derivs.samples, splits)])
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                try:
                    half_der[i] = forecast(mean, base.covariance, n, labels, combination, **forecast_kwargs).marginalised
                except RaytraceError:
                    pass
    else:
        warnings.warn(f"{full.name}: fewer than 2 derivative pairs; no half-derivative check", stacklevel=2)

    diag = StabilityDiagnostics(full.name, full.parameters, full.marginalised, half_cov, half_der)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns
        for what, change in (("covariance realisations", diag.covariance_change),
                             ("derivative pairs", diag.derivative_change)):
            bad = [f"{q} ({c:.0%})" for q, c in zip(full.parameters, change) if np.isfinite(c) and c > tolerance]
            if bad:
                warnings.warn(
                    f"{full.name}: errors change by more than {tolerance:.0%} with half of the {what}: "
                    f"{', '.join(bad)}; the forecast is not converged",
                    stacklevel=2,
                )
    return diag


# ----------------------------------------------------------------------- ellipses


@dataclass(frozen=True)
class Ellipse:
    """A confidence ellipse: semi-axes, orientation and its Delta chi^2 level."""

    semi_major: float
    semi_minor: float
    angle: float  #: radians, anticlockwise from the first parameter's axis to the major axis
    delta_chi2: float


def pair_covariance(param_cov: np.ndarray, i: int, j: int) -> np.ndarray:
    """The 2x2 marginalised covariance of parameters ``i`` and ``j`` from :math:`F^{-1}`."""
    c = np.asarray(param_cov, dtype=float)
    return c[np.ix_([i, j], [i, j])]


def ellipse_parameters(cov2: np.ndarray, levels: Sequence[float] = DELTA_CHI2_2D) -> list[Ellipse]:
    r"""Confidence ellipses of a two-parameter Gaussian.

    Parameters
    ----------
    cov2 : (2, 2) marginalised covariance of the pair (:func:`pair_covariance`).
    levels : :math:`\Delta\chi^2` of each contour; default 2.30 and 6.18, the 68.3 %
        and 95.4 % regions of two parameters (common practice; e.g. Press et al. 2007,
        Sec. 15.6).

    Returns
    -------
    ellipses : one :class:`Ellipse` per level.

    Notes
    -----
    The contour :math:`\delta\theta^T C^{-1}\delta\theta = \Delta\chi^2` has semi-axes
    :math:`\sqrt{\Delta\chi^2\,\lambda_\pm}` with :math:`\lambda_\pm` the eigenvalues of
    :math:`C`,

    .. math::

        \lambda_\pm = \frac{C_{xx}+C_{yy}}{2}
        \pm\sqrt{\frac{(C_{xx}-C_{yy})^2}{4}+C_{xy}^2},\qquad
        \tan 2\phi = \frac{2C_{xy}}{C_{xx}-C_{yy}},

    and the major axis at angle :math:`\phi` from the :math:`x` axis (Coe 2009; the
    expressions are standard and written here from memory).

    References
    ----------
    Coe D., 2009, arXiv:0906.4123.
    Press W. H. et al., 2007, Numerical Recipes, 3rd ed.
    """
    c = np.asarray(cov2, dtype=float)
    if c.shape != (2, 2) or not np.all(np.isfinite(c)):
        raise RaytraceError(f"ellipse: need a finite 2x2 covariance, got shape {c.shape}")
    cxx, cyy, cxy = c[0, 0], c[1, 1], 0.5 * (c[0, 1] + c[1, 0])
    half_sum = 0.5 * (cxx + cyy)
    root = math.hypot(0.5 * (cxx - cyy), cxy)
    lam_max, lam_min = half_sum + root, half_sum - root
    if lam_min <= 0:
        raise RaytraceError("ellipse: the 2x2 parameter covariance is not positive definite")
    angle = 0.5 * math.atan2(2.0 * cxy, cxx - cyy)
    out = []
    for lev in levels:
        lev = float(lev)
        if not lev > 0:
            raise RaytraceError(f"ellipse: Delta chi^2 levels must be positive, got {lev}")
        out.append(Ellipse(math.sqrt(lev * lam_max), math.sqrt(lev * lam_min), angle, lev))
    return out


# ------------------------------------------------------------------------ tables

ERROR_TABLE_COLUMNS = (
    "parameter",
    "combination",
    "n_data",
    "n_sims",
    "marginalised",
    "conditional",
    "marginalised_ds",
    "conditional_ds",
)


def error_table_rows(results: Iterable[ForecastResult]) -> list[dict[str, Any]]:
    """One row per (combination, parameter) with the columns of :data:`ERROR_TABLE_COLUMNS`."""
    rows = []
    for r in results:
        for i, q in enumerate(r.parameters):
            rows.append(
                {
                    "parameter": q,
                    "combination": r.name,
                    "n_data": r.n_data,
                    "n_sims": "" if r.n_sims is None else r.n_sims,
                    "marginalised": float(r.marginalised[i]),
                    "conditional": float(r.conditional[i]),
                    "marginalised_ds": float(r.marginalised_ds[i]),
                    "conditional_ds": float(r.conditional_ds[i]),
                }
            )
    return rows


def write_error_table(path: str | os.PathLike, results: Iterable[ForecastResult]) -> Path:
    """Write the error table of :func:`error_table_rows` as CSV (atomically).

    Returns
    -------
    path : the file written.
    """
    from .hdf5 import atomic_file

    rows = error_table_rows(results)
    final = Path(path)
    try:
        with atomic_file(final) as tmp:
            with open(tmp, "w", newline="") as f:
                w = csv.DictWriter(f, fieldnames=ERROR_TABLE_COLUMNS)
                w.writeheader()
                for row in rows:
                    w.writerow({k: (f"{v:.8g}" if isinstance(v, float) else v) for k, v in row.items()})
    except OSError as exc:
        raise RaytraceError(f"{final}: cannot write the error table ({exc.strerror or exc})") from None
    return final
