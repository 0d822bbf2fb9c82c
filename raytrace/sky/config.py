"""Configuration rules of the spherical branch (``maps.geometry: sphere``).

:func:`check` runs from :func:`raytrace.config.validate` for every configuration: keys of
one geometry used with the other are rejected with one line naming the key.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

from ..errors import RaytraceError

#: statistics available on the sphere
SPHERE_STATISTICS = ("power_spectrum", "pdf", "moments", "peaks", "minima")
#: parts of survey.mask available on the sphere
SPHERE_MASK_KEYS = ("file", "band", "holes")


def is_sphere(cfg: Mapping[str, Any]) -> bool:
    return cfg["maps"].get("geometry", "flat") == "sphere"


def shells_section(cfg: Mapping[str, Any]) -> dict:
    return dict(cfg.get("shells") or {})


def check(cfg: dict) -> None:
    maps = cfg["maps"]
    survey = cfg.get("survey") or {}
    mask = survey.get("mask") or {}
    stats = cfg.get("statistics") or {}
    ps = stats.get("power_spectrum") or {}
    if not is_sphere(cfg):
        for key, present in (("maps.cmb_lensing", maps.get("cmb_lensing")), ("survey.mask.band", mask.get("band")),
                             ("shells", "shells" in cfg)):
            if present:
                raise RaytraceError(f"{key}: available with maps.geometry: sphere only")
        if ps.get("mask_correction") == "master":
            raise RaytraceError("statistics.power_spectrum.mask_correction: master is available with maps.geometry: "
                                "sphere only (the flat estimator divides by the valid fraction)")
        return
    for key in mask:
        if key not in SPHERE_MASK_KEYS:
            raise RaytraceError(f"survey.mask.{key}: not available with maps.geometry: sphere "
                                f"(sphere masks: {', '.join(SPHERE_MASK_KEYS)})")
    if survey.get("systematics") is not None:
        raise RaytraceError("survey.systematics: not available with maps.geometry: sphere (shear bias, photo-z "
                            "and alignment models, and so forecast.nuisance, are built for flat maps only)")
    if cfg["suite"].get("kind", "demo") == "files" and shells_section(cfg).get("kind", "tile") == "tile":
        raise RaytraceError("shells.kind: tile reads the demo suite only; a files suite reaches the sphere "
                            "through shells.kind: lightcone or healpix")
    if (survey.get("catalog") or {}).get("enabled"):
        raise RaytraceError("survey.catalog.enabled: mock catalogs are not available with maps.geometry: sphere")
    for name in stats:
        if name not in SPHERE_STATISTICS:
            raise RaytraceError(f"statistics.{name}: not available with maps.geometry: sphere "
                                f"(available: {', '.join(SPHERE_STATISTICS)})")
    if (stats.get("moments") or {}).get("periodic"):
        raise RaytraceError("statistics.moments.periodic: has no meaning on the sphere (maps.geometry: sphere)")
    from ..config import _set_defaults, schema

    sch = schema()
    cfg.setdefault("shells", {})
    _set_defaults(cfg["shells"], sch["properties"]["shells"], sch)
    nside = int(maps["nside"])
    lmax = 3 * nside - 1
    if ps:
        hi = ps.get("ell_max") or (max(ps["ell_edges"]) if ps.get("ell_edges") else 2 * nside)
        if hi > lmax + 1:
            raise RaytraceError(f"statistics.power_spectrum.ell_max: {hi} exceeds 3 nside = {lmax + 1} (maps.nside: {nside})")
    shells = shells_section(cfg)
    kind = shells.get("kind", "tile")
    if kind in ("lightcone", "healpix") and not shells.get("files"):
        raise RaytraceError(f"shells.files: required with shells.kind: {kind}")
    if shells.get("files") and cfg["maps"]["realizations"] > 1 and "{realization" not in shells["files"]:
        raise RaytraceError("shells.files: the pattern must contain {realization} (one file per realisation)")
    if kind == "tile":
        box = float(cfg["suite"]["box_mpc_h"])
        if shells["thickness_mpc_h"] > box:
            raise RaytraceError(f"shells.thickness_mpc_h: {shells['thickness_mpc_h']} exceeds the box side "
                                f"suite.box_mpc_h = {box}")


def source_reach_z(cfg: Mapping[str, Any]) -> float:
    """Redshift the shells must reach: the farthest source, bin, or (CMB lensing) the top snapshot."""
    zs = list(cfg["maps"]["source_redshifts"])
    sources = (cfg.get("survey") or {}).get("sources")
    if sources:
        zs.append(float(sources["z_max"]))
    if cfg["maps"].get("cmb_lensing"):
        zs.append(max(float(z) for z in cfg["suite"]["snapshot_redshifts"]))
    return max(zs)


def shells_settings(cfg: Mapping[str, Any], model_parameters: Mapping[str, float]) -> dict:
    """What a shells job uses (its rule's params): the shells section and the tiling inputs."""
    shells = shells_section(cfg)
    kind = shells.get("kind", "tile")
    out = {
        "shells": {k: v for k, v in shells.items() if k != "keep"},
        "nside": int(cfg["maps"]["nside"]),
        "cosmology": dict(model_parameters),
        "seed": int(cfg["seed"]),
        "reach_z": source_reach_z(cfg),
    }
    if kind == "tile":
        out["randomize"] = bool(cfg["maps"]["randomize_planes"])
        out["snapshot_redshifts"] = sorted(float(z) for z in cfg["suite"]["snapshot_redshifts"])
        out["files_per_snapshot"] = int(cfg["suite"]["files_per_snapshot"])
    return out


def map_area_deg2() -> float:
    return 4.0 * math.pi * (180.0 / math.pi) ** 2
