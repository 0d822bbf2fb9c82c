"""Load and validate the configuration, expand models, derive the lens-plane schedule.

The JSON Schema (``raytrace/schema.yaml``, linked as ``config/schema.yaml``) is the
single description of every key; this module adds the checks a schema cannot express
(a slab thickness that divides the box, sources inside the planes ...). Every problem
becomes a one-line :class:`~raytrace.errors.RaytraceError` naming the key.
"""

from __future__ import annotations

import copy
import os
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import yaml

from .cosmology import PARAMETER_NAMES, Cosmology
from .errors import RaytraceError


def schema() -> dict:
    """The configuration's JSON Schema."""
    return yaml.safe_load(resources.files("raytrace").joinpath("schema.yaml").read_text())


def _key_path(error) -> str:
    return ".".join(str(p) for p in error.absolute_path)


def describe_error(error) -> str:
    """One line naming the key at fault for a ``jsonschema`` validation error."""
    path = _key_path(error)
    if error.validator == "additionalProperties":
        known = set(error.schema.get("properties", {}))
        extra = sorted(set(error.instance) - known) if isinstance(error.instance, dict) else []
        key = ".".join(filter(None, [path, extra[0] if extra else "?"]))
        return f"{key}: unknown key"
    if error.validator == "required":
        missing = error.message.split("'")[1] if "'" in error.message else error.message
        return f"{'.'.join(filter(None, [path, missing]))}: required key is missing"
    if error.validator == "propertyNames":
        return f"{path}.{error.instance}: invalid name (letters, digits, '_', '.', '-' only)"
    return f"{path or '<top level>'}: {error.message}"


def _resolve(ref: str, root: Mapping) -> Mapping:
    """The part of the schema a local JSON pointer (``#/definitions/...``) names."""
    node: Any = root
    for part in ref.lstrip("#/").split("/"):
        node = node[part]
    return node


def _set_defaults(instance: Any, sch: Mapping, root: Mapping) -> None:
    """Fill defaults from the schema (what ``snakemake.utils.validate(set_default=True)`` does)."""
    if "$ref" in sch:
        sch = _resolve(sch["$ref"], root)
    for sub in sch.get("allOf", []):
        _set_defaults(instance, sub, root)
    if isinstance(instance, dict):
        for key, sub in sch.get("properties", {}).items():
            if key not in instance and "default" in sub:
                instance[key] = copy.deepcopy(sub["default"])
            if key in instance:
                _set_defaults(instance[key], sub, root)
        extra = sch.get("additionalProperties")
        if isinstance(extra, dict):
            for key, value in instance.items():
                if key not in sch.get("properties", {}):
                    _set_defaults(value, extra, root)


def validate(config: Mapping[str, Any]) -> dict:
    """Validate ``config`` against the schema and the cross-key rules; return it with defaults."""
    import jsonschema

    sch = schema()
    validator = jsonschema.Draft7Validator(sch)
    errors = sorted(validator.iter_errors(config), key=lambda e: (len(list(e.absolute_path)), _key_path(e)))
    if errors:
        raise RaytraceError(describe_error(jsonschema.exceptions.best_match(errors)))
    _check_suite_kind(config)
    cfg = copy.deepcopy(dict(config))
    _set_defaults(cfg, sch, sch)
    if cfg["suite"]["kind"] == "files":  # defaults of demo-only keys do not apply
        for key in DEMO_ONLY_KEYS:
            cfg["suite"].pop(key, None)
    _check_semantics(cfg)
    _check_geometry(cfg)
    _check_realizations(cfg)
    _check_forecast(cfg)
    return cfg


#: suite keys that only a demo suite has (a files suite reads them from the snapshot headers)
DEMO_ONLY_KEYS = ("box_mpc_h", "particles_per_side", "files_per_snapshot", "lpt_order", "snapshot_redshifts",
                  "neutrino_particles")
#: model keys that only a files suite has
FILE_MODEL_KEYS = ("snapshots", "format", "length_unit", "species")


def _check_suite_kind(config: Mapping) -> None:
    """Keys that belong to the other kind of suite, checked before defaults are filled."""
    suite = config["suite"]
    files = suite["kind"] == "files"
    for name, model in suite["models"].items():
        for key in FILE_MODEL_KEYS:
            if not files and key in (model or {}):
                raise RaytraceError(f"suite.models.{name}.{key}: only for suite.kind: files")
        if files and "snapshots" not in (model or {}):
            raise RaytraceError(f"suite.models.{name}.snapshots: required key is missing (suite.kind: files)")
    if files:
        for key in DEMO_ONLY_KEYS:
            if key in suite:
                raise RaytraceError(
                    f"suite.{key}: only for suite.kind: demo (a files suite reads the box and redshifts from its headers)"
                )


def load(path: str | os.PathLike) -> dict:
    """Read a YAML configuration file and validate it."""
    p = Path(path)
    if not p.exists():
        raise RaytraceError(f"{p}: configuration file does not exist")
    try:
        raw = yaml.safe_load(p.read_text()) or {}
    except yaml.YAMLError as exc:
        raise RaytraceError(f"{p}: not valid YAML ({exc})") from None
    if not isinstance(raw, dict):
        raise RaytraceError(f"{p}: the configuration must be a mapping of keys")
    return validate(raw)


# ------------------------------------------------------------------------------------
def model_names(cfg: Mapping) -> list[str]:
    return list(cfg["suite"]["models"])


def model_parameters(cfg: Mapping, model: str) -> dict[str, float]:
    """The fiducial with the model's offsets applied."""
    models = cfg["suite"]["models"]
    if model not in models:
        raise RaytraceError(f"suite.models.{model}: no such model")
    params = dict(cfg["suite"]["fiducial"])
    params.update(models[model] or {})
    return {k: float(params[k]) for k in PARAMETER_NAMES}


def model_cosmology(cfg: Mapping, model: str) -> Cosmology:
    return Cosmology.from_mapping(model_parameters(cfg, model), where=f"suite.models.{model}")


def snapshot_redshifts(cfg: Mapping) -> list[float]:
    """The demo suite's snapshot redshifts, increasing (a files suite has them from its headers)."""
    return sorted(float(z) for z in cfg["suite"]["snapshot_redshifts"])


def model_species(cfg: Mapping, model: str) -> list[int]:
    """Particle species deposited for ``model``.

    A files model may set its own ``species`` (default ``planes.species``). In a demo
    suite with neutrino particles, a model with massless neutrinos has none, so species
    2 is dropped for it: its neutrinos are radiation, not matter.
    """
    species = list(cfg["planes"]["species"])
    m = cfg["suite"]["models"][model] or {}
    if cfg["suite"]["kind"] == "files":
        return list(m.get("species", species))
    from .demo import NEUTRINO_SPECIES

    if model_parameters(cfg, model)["m_nu_eV"] == 0.0 and NEUTRINO_SPECIES in species and len(species) > 1:
        species.remove(NEUTRINO_SPECIES)
    return species


@dataclass(frozen=True)
class PlaneSchedule:
    """Lens planes along the line of sight: slab k spans [chi_lo[k], chi_hi[k]] (Mpc/h)."""

    chi_lo: np.ndarray
    chi_hi: np.ndarray
    chi: np.ndarray  # slab centre
    z: np.ndarray  # redshift of the slab centre
    snapshot: np.ndarray  # index (into the sorted snapshot redshifts) of the nearest snapshot

    @property
    def n_planes(self) -> int:
        return len(self.chi)

    @property
    def thickness(self) -> np.ndarray:
        return self.chi_hi - self.chi_lo


def plane_schedule(cosmo: Cosmology, thickness_mpc_h: float, z_max: float, snapshot_z: list[float]) -> PlaneSchedule:
    """Slabs of equal comoving thickness from the observer out to redshift ``z_max``.

    Each slab takes the snapshot nearest in redshift to its centre.
    """
    chi_max = float(cosmo.comoving_distance(z_max))
    n = max(1, int(np.ceil(chi_max / thickness_mpc_h - 1e-9)))
    chi_lo = np.arange(n) * thickness_mpc_h
    chi_hi = chi_lo + thickness_mpc_h
    chi = 0.5 * (chi_lo + chi_hi)
    z = cosmo.redshift_at(chi)
    snaps = np.asarray(snapshot_z)
    nearest = np.argmin(np.abs(z[:, None] - snaps[None, :]), axis=1)
    return PlaneSchedule(chi_lo, chi_hi, chi, z, nearest)


def check_sources_within_planes(source_redshifts, snapshot_z) -> None:
    """Planes are cut from snapshots: a source beyond the highest snapshot has no planes."""
    z_last = max(snapshot_z)
    for z in source_redshifts:
        if z > z_last + 1e-9:
            raise RaytraceError(
                f"maps.source_redshifts: source at z = {z} lies beyond the last lens plane "
                f"(planes end at the highest snapshot redshift, z = {z_last:g})"
            )


def check_source_range(cfg: dict, z_top: float) -> None:
    """Sources and the n(z) grid end at the highest snapshot redshift; fills ``survey.sources.z_max``.

    On the sphere, user light cones and HEALPix shells are checked against their own depth by the
    trace stage, so only tiled shells bound ``maps.source_redshifts`` here.
    """
    sphere = cfg["maps"]["geometry"] == "sphere"
    if not sphere or (cfg.get("shells") or {}).get("kind", "tile") == "tile":
        check_sources_within_planes(cfg["maps"]["source_redshifts"], [z_top])
    sources = cfg.get("survey", {}).get("sources")
    if sources is not None:
        sources.setdefault("z_max", z_top)
        if sources["z_max"] > z_top + 1e-9:
            raise RaytraceError(
                f"survey.sources.z_max: {sources['z_max']} lies beyond the last lens plane "
                f"(the highest snapshot redshift, z = {z_top:g})"
            )


def _check_semantics(cfg: dict) -> None:
    suite = cfg["suite"]
    for name, offsets in suite["models"].items():
        for key in offsets or {}:
            if key not in PARAMETER_NAMES and key not in FILE_MODEL_KEYS:
                raise RaytraceError(f"suite.models.{name}.{key}: unknown parameter")
    srcs = cfg["maps"]["source_redshifts"]
    if sorted(srcs) != list(srcs) or len(set(srcs)) != len(srcs):
        raise RaytraceError("maps.source_redshifts: must be distinct and increasing")
    for name in suite["models"]:
        model_cosmology(cfg, name)  # rejects impossible parameter combinations
    if suite["kind"] == "demo":
        if "snapshot_redshifts" not in suite:
            raise RaytraceError("suite.snapshot_redshifts: required key is missing")
        zs = suite["snapshot_redshifts"]
        if len(set(zs)) != len(zs):
            raise RaytraceError("suite.snapshot_redshifts: redshifts must be distinct")
        box, t = float(suite["box_mpc_h"]), float(cfg["planes"]["thickness_mpc_h"])
        n_slabs = box / t
        sphere = cfg["maps"]["geometry"] == "sphere"  # shells have their own thickness
        if not sphere and (abs(n_slabs - round(n_slabs)) > 1e-6 or round(n_slabs) < 1):
            raise RaytraceError(f"planes.thickness_mpc_h: {t} does not divide suite.box_mpc_h = {box}")
        from .demo import NEUTRINO_SPECIES

        if not suite["neutrino_particles"] and any(t != 1 for t in cfg["planes"]["species"]):
            raise RaytraceError(
                f"planes.species: the demo suite writes species 1 only"
                f" (species {NEUTRINO_SPECIES}, neutrinos, with suite.neutrino_particles: true)"
            )
        if suite["neutrino_particles"] and any(t not in (1, NEUTRINO_SPECIES) for t in cfg["planes"]["species"]):
            raise RaytraceError(f"planes.species: the demo suite writes species 1 and {NEUTRINO_SPECIES} only")
        # a files suite checks these once its headers are read (raytrace.filesuite)
        check_source_range(cfg, max(snapshot_redshifts(cfg)))
    sources = cfg.get("survey", {}).get("sources")
    if sources is not None:
        bins = sources.get("bins") or {}
        if "edges" in bins and "n_bins" in bins:
            raise RaytraceError("survey.sources.bins: give edges or n_bins, not both")
        edges = bins.get("edges")
        if edges is not None and list(edges) != sorted(set(edges)):
            raise RaytraceError("survey.sources.bins.edges: must be strictly increasing")
    _check_systematics(cfg)
    ps = cfg.get("statistics", {}).get("power_spectrum")
    if ps and ps.get("ell_min") and ps.get("ell_max") and ps["ell_min"] >= ps["ell_max"]:
        raise RaytraceError("statistics.power_spectrum.ell_max: must exceed ell_min")
    if ps and ps.get("ell_edges") is not None and list(ps["ell_edges"]) != sorted(set(ps["ell_edges"])):
        raise RaytraceError("statistics.power_spectrum.ell_edges: must be strictly increasing")


def _check_geometry(cfg: dict) -> None:
    """Keys of the full-sky branch and of the flat one used with the other geometry."""
    from .sky.config import check

    check(cfg)


def configured_bin_count(sources: Mapping | None) -> int:
    """Number of tomographic bins ``survey.sources`` defines (0 without sources)."""
    if sources is None:
        return 0
    bins = sources.get("bins") or {}
    if bins.get("n_bins") is not None:
        return int(bins["n_bins"])
    if bins.get("edges") is not None:
        return len(bins["edges"]) - 1
    return 1


def _check_systematics(cfg: dict) -> None:
    from .systematics import KEY, check_settings

    survey = cfg.get("survey", {})
    systematics = survey.get("systematics")
    if systematics is None:
        return
    sources = survey.get("sources")
    check_settings(systematics, configured_bin_count(sources), has_sources=sources is not None)
    for name in systematics.get("variant_models") or []:
        if name not in cfg["suite"]["models"]:
            raise RaytraceError(f"{KEY}.variant_models: {name!r} is not one of suite.models")


# ------------------------------------------------------------ realisations, forecast
def map_labels(cfg: Mapping) -> list[str]:
    """Labels of the maps of a run: ``z0.50`` ... per source redshift, then ``bin0`` ..."""
    labels = [f"z{float(z):.2f}" for z in cfg["maps"]["source_redshifts"]]
    sources = cfg.get("survey", {}).get("sources")
    if sources:
        bins = sources.get("bins") or {}
        n_bins = len(bins["edges"]) - 1 if "edges" in bins else int(bins.get("n_bins", 1))
        labels += [f"bin{i}" for i in range(n_bins)]
    if cfg["maps"].get("cmb_lensing"):
        labels.append("cmb")  # the full-sky branch's CMB-lensing map (raytrace.sky.cmb)
    return labels


def map_pixel_count(cfg: Mapping) -> int:
    """Pixels of one map: pixels^2 on the flat sky, 12 nside^2 on the sphere."""
    if cfg["maps"].get("geometry", "flat") == "sphere":
        return 12 * int(cfg["maps"]["nside"]) ** 2
    return int(cfg["maps"]["pixels"]) ** 2


def map_area_deg2(cfg: Mapping) -> float:
    """Area of one map before masking: the flat field, or the whole sky."""
    if cfg["maps"].get("geometry", "flat") == "sphere":
        return 4.0 * np.pi * (180.0 / np.pi) ** 2
    return float(cfg["maps"]["field_deg"]) ** 2


def fiducial_model(cfg: Mapping) -> str:
    """The model at the centre of the forecast (and of the report's ratios)."""
    fc = cfg.get("forecast")
    if fc:
        return fc["fiducial"]
    return "fiducial" if "fiducial" in cfg["suite"]["models"] else model_names(cfg)[0]


def realization_counts(cfg: Mapping) -> dict[str, int]:
    """Realisations per model: ``maps.realizations``, the fiducial possibly more."""
    n = int(cfg["maps"]["realizations"])
    counts = {m: n for m in model_names(cfg)}
    fc = cfg.get("forecast")
    if fc and fc.get("covariance_realizations"):
        counts[fc["fiducial"]] = max(n, int(fc["covariance_realizations"]))
    return counts


def realizations_per_job(cfg: Mapping) -> int:
    """Realisations handled by one trace, observe or measure job (1, 10 or 100)."""
    value = cfg["maps"].get("realizations_per_job", "auto")
    if value == "auto":
        return 10 if all(c % 10 == 0 for c in realization_counts(cfg).values()) else 1
    return int(value)


def _check_realizations(cfg: dict) -> None:
    per_job = realizations_per_job(cfg)
    for model, count in realization_counts(cfg).items():
        if count % per_job:
            key = "forecast.covariance_realizations" if count != cfg["maps"]["realizations"] else "maps.realizations"
            raise RaytraceError(
                f"{key}: {count} realisations of {model} are not a multiple of maps.realizations_per_job "
                f"({per_job}); change the count or set realizations_per_job: 1"
            )


def forecast_steps(cfg: Mapping) -> dict[str, dict[str, tuple[str, float]]]:
    """Finite-difference steps of ``forecast.parameters``: parameter -> {"minus"/"plus": (model, value)}."""
    fc = cfg["forecast"]
    fid = model_parameters(cfg, fc["fiducial"])
    steps = {}
    for param, models in fc["parameters"].items():
        key = f"forecast.parameters.{param}"
        if param not in PARAMETER_NAMES:
            raise RaytraceError(f"{key}: unknown parameter (known: {', '.join(PARAMETER_NAMES)})")
        if len(set(models)) != len(models):
            raise RaytraceError(f"{key}: the same model is given twice")
        spec = {}
        for model in models:
            if model not in cfg["suite"]["models"]:
                raise RaytraceError(f"{key}: no model {model!r} in suite.models")
            values = model_parameters(cfg, model)
            others = [q for q in PARAMETER_NAMES if q != param and not np.isclose(values[q], fid[q], rtol=1e-12, atol=0)]
            if others:
                raise RaytraceError(
                    f"{key}: model {model!r} also differs from the fiducial in {', '.join(others)}; "
                    "derivatives need one-at-a-time variations"
                )
            if values[param] == fid[param]:
                raise RaytraceError(f"{key}: model {model!r} has the fiducial value of {param}")
            side = "plus" if values[param] > fid[param] else "minus"
            if side in spec:
                raise RaytraceError(f"{key}: both models lie on the same side of the fiducial")
            spec[side] = (model, values[param])
        steps[param] = spec
    return steps


def _check_forecast(cfg: dict) -> None:
    fc = cfg.get("forecast")
    report = cfg.get("report", {})
    labels = map_labels(cfg)
    models = cfg["suite"]["models"]
    if report.get("reference") is not None and report["reference"] not in models:
        raise RaytraceError(f"report.reference: no model {report['reference']!r} in suite.models")
    if report.get("map") is not None and report["map"] not in labels:
        raise RaytraceError(f"report.map: no map {report['map']!r} (maps: {', '.join(labels)})")
    if not fc:
        return
    if fc["fiducial"] not in models:
        raise RaytraceError(f"forecast.fiducial: no model {fc['fiducial']!r} in suite.models")
    forecast_steps(cfg)
    known = set(cfg.get("statistics", {}))
    for i, combo in enumerate(fc["combinations"]):
        names = [combo] if isinstance(combo, str) else list(combo)
        for name in names:
            if name != "all" and name not in known:
                raise RaytraceError(
                    f"forecast.combinations[{i}]: {name!r} is not a configured statistic (statistics: {', '.join(sorted(known))})"
                )
    for label in fc.get("maps") or []:
        if label not in labels:
            raise RaytraceError(f"forecast.maps: no map {label!r} (maps: {', '.join(labels)})")
    for name in fc.get("scale_cuts") or {}:
        if name not in known:
            raise RaytraceError(f"forecast.scale_cuts.{name}: not a configured statistic")
    priors = fc.get("priors") or {}
    for name in priors.get("sigma") or {}:
        if name not in fc["parameters"]:
            raise RaytraceError(f"forecast.priors.sigma.{name}: not a forecast parameter")
    if priors.get("fisher") is not None and not Path(priors["fisher"]).is_file():
        raise RaytraceError(f"forecast.priors.fisher: {priors['fisher']}: file not found")
    nuisance_parameters(cfg)


# ------------------------------------------------------------------ nuisance parameters
def nuisance_parameters(cfg: Mapping) -> dict[str, dict]:
    """Nuisance parameters of ``forecast.nuisance``, each with its two observe variants.

    Returns name -> ``{"fiducial": value, "prior_sigma": sigma or None,
    "minus": (variant, value), "plus": (variant, value), "variants": {variant: nuisance values}}``.
    Names: ``m_bin<i>`` (multiplicative shear bias of bin i), ``dz_bin<i>`` (mean redshift
    shift of bin i; the step is ``survey.systematics.photoz.derivative_step``, which the
    trace stage traces), ``A_IA`` (alignment amplitude). The variants change one value and
    keep every other nuisance value nominal, so the derivatives are one at a time.
    """
    from .systematics import KEY, per_bin

    fc = cfg.get("forecast") or {}
    spec = fc.get("nuisance") or {}
    if not spec:
        return {}
    systematics = cfg.get("survey", {}).get("systematics")
    if systematics is None:
        raise RaytraceError("forecast.nuisance: needs survey.systematics (the nominal nuisance values)")
    n_bins = configured_bin_count(cfg.get("survey", {}).get("sources"))
    out: dict[str, dict] = {}

    def add(name, fiducial, step, values_of, prior):
        lo, hi = f"nuisance_{name}_minus", f"nuisance_{name}_plus"
        out[name] = {"fiducial": float(fiducial), "prior_sigma": prior,
                     "minus": (lo, float(fiducial - step)), "plus": (hi, float(fiducial + step)),
                     "variants": {lo: values_of(-step), hi: values_of(+step)}}

    if "shear_bias" in spec:
        s = spec["shear_bias"]
        m0 = per_bin((systematics.get("shear_bias") or {}).get("m"), n_bins, f"{KEY}.shear_bias.m", default=0.0)
        for i in range(n_bins):
            def m_values(d, i=i):
                m = [float(x) for x in m0]
                m[i] += d
                return {"shear_bias": {"m": m}}
            add(f"m_bin{i}", m0[i], float(s["step"]), m_values, s.get("prior_sigma"))
    if "photoz_shift" in spec:
        s = spec["photoz_shift"]
        pz = systematics.get("photoz") or {}
        step = pz.get("derivative_step")
        if step is None:
            raise RaytraceError("forecast.nuisance.photoz_shift: needs survey.systematics.photoz.derivative_step "
                                "(the trace stage traces the shifted bins)")
        shift0 = per_bin(pz.get("shift"), n_bins, f"{KEY}.photoz.shift", default=0.0)
        off0 = per_bin(pz.get("offset"), n_bins, f"{KEY}.photoz.offset", default=0.0)
        if np.any(off0 != 0):
            raise RaytraceError("forecast.nuisance.photoz_shift: the nominal survey.systematics.photoz.offset must be 0")
        for i in range(n_bins):
            def dz_values(d, i=i):
                off = [0.0] * n_bins
                off[i] = d
                return {"photoz": {"offset": off}}
            add(f"dz_bin{i}", shift0[i], float(step), dz_values, s.get("prior_sigma"))
    if "alignment" in spec:
        s = spec["alignment"]
        ia = systematics.get("intrinsic_alignment")
        if ia is None:
            raise RaytraceError("forecast.nuisance.alignment: needs a survey.systematics.intrinsic_alignment section")
        a0 = float(ia.get("amplitude", 0.0))
        add("A_IA", a0, float(s["step"]),
            lambda d: {"intrinsic_alignment": {"amplitude": a0 + d}}, s.get("prior_sigma"))
    return out
