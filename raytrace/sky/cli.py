"""Subcommands of the full-sky branch: ``shells`` and ``trace-sphere``.

They are registered in :mod:`raytrace.cli` (same conventions: ``--settings`` JSON, batched
realisations, one-line errors, atomic outputs). ``observe`` and ``measure`` recognise sphere
files by their ``geometry`` attribute and call :mod:`raytrace.sky.survey` and
:mod:`raytrace.sky.statistics`.
"""

from __future__ import annotations

import json
from ..errors import RaytraceError


def _settings(text: str) -> dict:
    from ..cli import _settings as parse

    return parse(text)


def cmd_shells(args, log) -> None:
    import numpy as np

    from ..cosmology import Cosmology
    from ..snapshots import read_header
    from . import shells as sh

    s = _settings(args.settings)
    cosmo = Cosmology.from_mapping(s["cosmology"], where=f"suite.models.{args.model}")
    cfg = s["shells"]
    kind = cfg.get("kind", "tile")
    nside = int(s["nside"])
    chi_reach = float(cosmo.comoving_distance(float(s["reach_z"])))
    common = dict(cosmo=cosmo, kind=kind, settings=s, seed=s["seed"])
    attrs = {"geometry": "sphere", "model": args.model, "realization": int(args.realization), "omega_m": cosmo.Omega_m}
    if kind == "tile":
        if not args.snapshots:
            raise RaytraceError("--snapshots: shells.kind: tile needs the snapshot files")
        per = int(s["files_per_snapshot"])
        if len(args.snapshots) % per:
            raise RaytraceError(f"--snapshots: {len(args.snapshots)} files are not a multiple of {per} per snapshot")
        groups = [args.snapshots[i : i + per] for i in range(0, len(args.snapshots), per)]
        headers = [read_header(g, cfg.get("format", "hdf5")) for g in groups]
        zs = [h.redshift for h in headers]
        if zs != sorted(zs):
            raise RaytraceError(f"{groups[0][0]}: snapshots must be given in increasing redshift")
        box = headers[0].box_mpc_h
        for g, h in zip(groups, headers):
            if abs(h.box_mpc_h - box) > 1e-9 * box:
                raise RaytraceError(f"{g[0]}: box side {h.box_mpc_h} differs from {groups[0][0]} ({box})")
        if chi_reach > 0 and cfg["thickness_mpc_h"] > box:
            raise RaytraceError(f"shells.thickness_mpc_h: {cfg['thickness_mpc_h']} exceeds the box side {box} of {groups[0][0]}")
        schedule = sh.shell_schedule(cosmo, float(cfg["thickness_mpc_h"]), chi_reach, zs)
        choice = sh.choose_shells(schedule, box, s["seed"], args.realization, s.get("randomize", True))
        shells = sh.build_tiled(schedule, choice, groups, nside, species=cfg.get("species", [1]),
                                chunk_particles=int(cfg.get("chunk_particles", 1 << 21)),
                                blocks_per_side=int(cfg.get("blocks_per_side", 8)), log=log)
        attrs["box_mpc_h"] = box
        sh.write_shell_file(args.output, schedule, shells, nside, inputs=args.snapshots, choice=choice, attrs=attrs,
                            **common)
    elif kind == "lightcone":
        header = sh.read_lightcone_header(args.input)
        schedule = sh.shell_schedule(cosmo, float(cfg["thickness_mpc_h"]), header.chi_max, [], whole=True)
        shells = sh.build_lightcone(args.input, schedule, nside, omega_m=cosmo.Omega_m,
                                    chunk_particles=int(cfg.get("chunk_particles", 1 << 21)), log=log)
        attrs["deposited_fraction"] = header.deposited_fraction
        sh.write_shell_file(args.output, schedule, shells, nside, inputs=[args.input], attrs=attrs, **common)
    elif kind == "healpix":
        schedule, shells = sh.build_from_healpix(args.input, nside, log=log)
        sh.write_shell_file(args.output, schedule, shells, nside, inputs=[args.input], attrs=attrs, **common)
    else:
        raise RaytraceError(f"shells.kind: unknown kind {kind!r} ({', '.join(sh.KINDS)})")
    import h5py

    with h5py.File(args.output, "r") as f:
        n = f["delta"].shape[0]
        far = float(np.asarray(f["chi_hi_mpc_h"])[-1])
    log(f"{n} shells ({kind}) to {far:.0f} Mpc/h at nside {nside} written to {args.output}")


_REMAINDER_CACHE: dict = {}


def cmd_trace_sphere(args, log) -> None:
    import healpy as hp
    import numpy as np

    from ..cli import _source_bins
    from ..config import PlaneSchedule
    from ..cosmology import Cosmology
    from ..hdf5 import atomic_h5, write_dataset
    from . import cmb as cm
    from . import tracing as tr
    from .shells import ShellFile

    s = _settings(args.settings)
    cosmo = Cosmology.from_mapping(s["cosmology"], where=f"suite.models.{args.model}")
    m = s["maps"]
    nside = int(m["nside"])
    bins, source_bins = _source_bins(s.get("sources"))
    with ShellFile(args.shells) as sf:
        chi = 0.5 * (sf.chi_lo + sf.chi_hi)
        schedule = PlaneSchedule(sf.chi_lo, sf.chi_hi, chi, cosmo.redshift_at(chi), np.zeros(len(chi), dtype=int))
        chi_src = [float(c) for c in cosmo.comoving_distance(np.asarray(m["source_redshifts"], dtype=float))]
        tr.check_reach(schedule, chi_src, f"{args.shells}: maps.source_redshifts")
        for b in source_bins:
            reach = float(cosmo.comoving_distance(b.z[b.weights > 0].max()))
            tr.check_reach(schedule, [reach], f"{args.shells}: survey.sources")
        n_src = len(chi_src)
        completions, last, cl_rest = [], None, None
        lmax = tr.default_lmax(nside)
        if m.get("cmb_lensing"):
            last = cm.last_scattering(cosmo)
            chi_end = float(schedule.chi_hi[-1])
            key = (tuple(sorted(s["cosmology"].items())), round(chi_end, 6), lmax)
            if key not in _REMAINDER_CACHE:
                _REMAINDER_CACHE.clear()
                _REMAINDER_CACHE[key] = cm.remainder_power(cosmo, chi_end, lmax)
                log(f"CMB lensing: Gaussian completion from {chi_end:.0f} to {last.chi_mpc_h:.0f} Mpc/h (camb, Limber)")
            cl_rest = _REMAINDER_CACHE[key]
            from .pixels import pixel_window

            # pixel-averaged like the shells' part of the map (raytrace.sky.cmb)
            alm_g = hp.almxfl(cm.gaussian_alm(cl_rest, s["seed"], args.realization), pixel_window(nside, lmax))
            completions.append(tr.Completion(n_src, alm_g, lmax))
            chi_src.append(last.chi_mpc_h)
        method = m.get("method", "multi-plane")
        run = {"born": tr.born, "multi-plane": tr.multi_plane}.get(method)
        if run is None:
            raise RaytraceError(f"maps.method: unknown method {method!r} (multi-plane | born)")
        maps = run(cosmo, schedule, lambda k: sf.delta(k, nside), nside, chi_sources=chi_src,
                   source_bins=source_bins, completions=completions, lmax=lmax, log=log)
        shell_attrs = dict(sf.attrs)
    n_cmb = 1 if last is not None else 0
    labels = [f"z{float(z):.2f}" for z in m["source_redshifts"]] + [f"bin{i}" for i in range(len(source_bins))]
    labels += [cm.CMB_LABEL] * n_cmb
    order = list(range(n_src)) + list(range(n_src + n_cmb, n_src + n_cmb + len(source_bins))) + list(range(n_src, n_src + n_cmb))
    consistency = {}
    for label, i in zip(labels, order):
        consistency[label] = tr.shear_consistency(maps["kappa"][i], maps["gamma1"][i], maps["gamma2"][i])
        c = consistency[label]
        log(f"{label}: traced shear vs spin-2 transform of kappa: relative rms {c['relative_rms']:.2e} (pixels), "
            f"E mismatch {c['e_mismatch']:.2e}, B/E power {c['b_over_e']:.2e} (ell {c['ell_min']}-{c['ell_max']})")
    with atomic_h5(args.output, stage="trace", settings=s, inputs=[args.shells], seed=s["seed"]) as f:
        for key, value in maps.items():
            write_dataset(f, key, value[:n_src].astype(np.float32), "1", axes="[source, pixel]")
        if bins is not None:
            g = f.create_group("bins")
            for key, value in maps.items():
                write_dataset(g, key, value[n_src + n_cmb :].astype(np.float32), "1", axes="[bin, pixel]")
            write_dataset(g, "z", bins.z, "1")
            write_dataset(g, "nz", bins.nz, "1", axes="[bin, z]", description="true-redshift n(z) of each bin")
            write_dataset(g, "fraction", bins.fractions, "1", description="share of the galaxy sample")
            write_dataset(g, "edges", np.asarray(bins.edges, dtype=float), "1", description="photometric bin edges")
        if last is not None:
            g = f.create_group("cmb")
            for key, value in maps.items():
                write_dataset(g, key, value[n_src : n_src + 1].astype(np.float32), "1", axes="[1, pixel]")
            write_dataset(g, "completion_cl", cl_rest, "sr",
                          description="C_ell of the Gaussian completion beyond the shells")
            g.attrs["z_source"] = last.z
            g.attrs["chi_source_mpc_h"] = last.chi_mpc_h
            g.attrs["chi_end_mpc_h"] = float(schedule.chi_hi[-1])
        g = f.create_group("shells")
        write_dataset(g, "chi_lo_mpc_h", schedule.chi_lo, "Mpc/h")
        write_dataset(g, "chi_hi_mpc_h", schedule.chi_hi, "Mpc/h")
        write_dataset(g, "redshift", schedule.z, "1")
        f.attrs["geometry"] = "sphere"
        f.attrs["nside"] = nside
        f.attrs["ordering"] = "RING"
        f.attrs["source_redshifts"] = np.asarray(m["source_redshifts"], dtype=float)
        f.attrs["method"] = method
        f.attrs["model"] = args.model
        f.attrs["realization"] = int(args.realization)
        f.attrs["map_labels"] = json.dumps(labels)
        f.attrs["shell_kind"] = str(shell_attrs.get("kind", ""))
        f.attrs["shear_consistency"] = json.dumps(consistency)
    log(f"{len(labels)} maps at nside {nside} ({method}) written to {args.output}")


def add_parsers(sub) -> None:
    sh = sub.add_parser("shells", help="build the density shells of one realisation (full sky)")
    sh.add_argument("--model", required=True)
    sh.add_argument("--realization", type=int, nargs="+", required=True)
    sh.add_argument("--settings", required=True)
    sh.add_argument("--snapshots", nargs="+", help="shells.kind tile: every snapshot file, in increasing redshift")
    sh.add_argument("--input", nargs="+", help="shells.kind lightcone | healpix: one file per realisation")
    sh.add_argument("--output", nargs="+", required=True, help="one shell file per realisation")

    ts = sub.add_parser("trace-sphere", help="full-sky Born or multi-plane maps of one realisation")
    ts.add_argument("--model", required=True)
    ts.add_argument("--realization", type=int, nargs="+", required=True)
    ts.add_argument("--settings", required=True)
    ts.add_argument("--shells", nargs="+", required=True, help="one shell file per realisation")
    ts.add_argument("--output", nargs="+", required=True, help="one map file per realisation")


COMMANDS = {"shells": cmd_shells, "trace-sphere": cmd_trace_sphere}
BATCHED = {"shells": ("realization", "input", "output"), "trace-sphere": ("realization", "shells", "output")}
