"""Command-line interface: one subcommand per workflow stage.

Each Snakemake rule calls exactly one subcommand and passes it the configuration
section it depends on as JSON (``--settings``), so a rule's params are exactly what
the job used. Errors a user can cause are printed as one line and exit with status 2;
outputs are only ever renamed into place when complete.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import sys
import time
from pathlib import Path
from typing import Any, Callable, Sequence

from .errors import RaytraceError


class Log:
    """Progress and timing lines to stderr (Snakemake sends them to the rule's log)."""

    def __init__(self, stage: str):
        self.stage = stage
        self.t0 = time.perf_counter()

    def __call__(self, message: str) -> None:
        print(f"[{self.stage} {time.perf_counter() - self.t0:7.1f} s] {message}", file=sys.stderr, flush=True)

    def finish(self) -> None:
        peak_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        self(f"done: wall time {time.perf_counter() - self.t0:.2f} s, peak memory {peak_kb / 1024:.1f} MiB")


def _settings(text: str) -> dict:
    try:
        value = json.loads(text)
    except json.JSONDecodeError as exc:
        raise RaytraceError(f"--settings: not valid JSON ({exc})") from None
    if not isinstance(value, dict):
        raise RaytraceError("--settings: must be a JSON object")
    return value


def _workers() -> int:
    return max(1, int(os.environ.get("RAYTRACE_THREADS", "1")))


# ------------------------------------------------------------------------------------
def cmd_validate(args) -> None:
    from . import config

    cfg = config.load(args.config)
    print(json.dumps(cfg, indent=1) if args.show else f"{args.config}: valid")


def cmd_simulate(args, log: Log) -> None:
    from .cosmology import Cosmology
    from .demo import generate_model

    s = _settings(args.settings)
    cosmo = Cosmology.from_mapping(s["cosmology"], where=f"suite.models.{args.model}")
    generate_model(
        cosmo, box_mpc_h=s["box_mpc_h"], particles_per_side=s["particles_per_side"],
        snapshot_redshifts=s["snapshot_redshifts"], seed=s["seed"], directory=args.outdir,
        files_per_snapshot=s["files_per_snapshot"], lpt_order=s["lpt_order"], workers=_workers(), log=log,
    )


def cmd_slice(args, log: Log) -> None:
    from .hdf5 import atomic_h5
    from .planes import slice_snapshot, write_planes
    from .snapshots import read_header

    s = _settings(args.settings)
    header = read_header(args.snapshot, s.get("format", "hdf5"), s.get("length_unit"))
    log(f"snapshot z = {header.redshift:g}, box {header.box_mpc_h:g} Mpc/h, particles {header.n_total}")
    planes = slice_snapshot(
        header, grid=s["grid"], thickness_mpc_h=s["thickness_mpc_h"], species=s["species"],
        assignment=s["assignment"], fmt=s.get("format", "hdf5"), chunk_particles=s["chunk_particles"],
        workers=_workers(), log=log,
    )
    with atomic_h5(args.output, stage="slice", settings=s, inputs=args.snapshot) as f:
        write_planes(f, planes)
    log(f"{planes.n_slabs} slabs x 3 axes of {planes.grid}^2 written to {args.output}")


def cmd_trace(args, log: Log) -> None:
    import numpy as np

    from .config import check_sources_within_planes, plane_schedule
    from .cosmology import Cosmology
    from .hdf5 import atomic_h5, write_dataset
    from .tracing import PlaneFiles, choose_planes, trace

    s = _settings(args.settings)
    cosmo = Cosmology.from_mapping(s["cosmology"], where=f"suite.models.{args.model}")
    m = s["maps"]
    with PlaneFiles(args.planes) as planes:
        zs = [float(a["redshift"]) for a in planes.attrs]
        if zs != sorted(zs):
            raise RaytraceError(f"{args.planes[0]}: plane files must be given in increasing snapshot redshift")
        check_sources_within_planes(m["source_redshifts"], zs)
        thickness = float(planes.attrs[0]["thickness_mpc_h"])
        z_max = max(m["source_redshifts"])
        schedule = plane_schedule(cosmo, thickness, z_max, zs)
        _warn_geometry(cosmo, schedule, m["field_deg"], planes.box_mpc_h, log)
        choice = choose_planes(schedule, planes.n_slabs, planes.box_mpc_h, s["seed"], args.realization, m["randomize_planes"])
        maps = trace(
            cosmo, schedule, choice, planes, box_mpc_h=planes.box_mpc_h, field_deg=m["field_deg"],
            pixels=m["pixels"], source_redshifts=m["source_redshifts"], method=m["method"], log=log,
        )
        with atomic_h5(args.output, stage="trace", settings=s, inputs=args.planes, seed=s["seed"]) as f:
            for key, value in maps.items():
                write_dataset(f, key, value.astype(np.float32), "1", axes="[source, iy, ix]")
            f.attrs["source_redshifts"] = np.asarray(m["source_redshifts"], dtype=float)
            f.attrs["field_deg"] = float(m["field_deg"])
            f.attrs["pixels"] = int(m["pixels"])
            f.attrs["method"] = m["method"]
            f.attrs["model"] = args.model
            f.attrs["realization"] = int(args.realization)
            g = f.create_group("planes")
            write_dataset(g, "chi_mpc_h", schedule.chi, "Mpc/h")
            write_dataset(g, "redshift", schedule.z, "1")
            write_dataset(g, "snapshot", choice.snapshot, "1")
            write_dataset(g, "axis", choice.axis, "1")
            write_dataset(g, "slab", choice.slab, "1")
            write_dataset(g, "shift_mpc_h", choice.shift, "Mpc/h")
            write_dataset(g, "flip", choice.flip, "1")
    log(f"{len(m['source_redshifts'])} source redshifts x {m['pixels']}^2 pixels ({m['method']}) written to {args.output}")


def _warn_geometry(cosmo, schedule, field_deg: float, box: float, log: Callable[[str], None]) -> None:
    import numpy as np

    width = np.deg2rad(field_deg) * schedule.chi_hi[-1]
    if width > box:
        log(f"warning: the field is {width:.0f} Mpc/h wide at the farthest plane, wider than the box "
            f"({box:g} Mpc/h): structures repeat across the map")


def cmd_measure(args, log: Log) -> None:
    import h5py
    import numpy as np

    from . import statistics
    from .hdf5 import atomic_h5, open_input, write_dataset

    s = _settings(args.settings)
    with open_input(args.maps) as f:
        if "kappa" not in f:
            raise RaytraceError(f"{args.maps}: no kappa dataset")
        kappa = f["kappa"][...].astype(np.float64)
        field_deg = float(f.attrs["field_deg"])
        zs = list(f.attrs["source_redshifts"])
    labels = tuple(f"z{z:.2f}" for z in zs)
    pixels = kappa.shape[-1]
    mapset = statistics.MapSet(
        maps=kappa, mask=np.ones(kappa.shape[1:], dtype=bool), pixel_arcmin=field_deg * 60 / pixels, bin_labels=labels
    )
    with atomic_h5(args.output, stage="measure", settings=s, inputs=[args.maps]) as out:
        for name, settings in s["statistics"].items():
            stat = statistics.build(name, settings or {})
            result = stat.measure(mapset)
            g = out.create_group(name)
            write_dataset(g, "values", result.values, result.unit, axes="[entry, bin]")
            write_dataset(g, "bin_centers", result.bin_centers, result.bin_unit, quantity=result.bin_name)
            if result.bin_edges is not None:
                write_dataset(g, "bin_edges", result.bin_edges, result.bin_unit)
            g.attrs["entries"] = json.dumps(result.entries)
            g.attrs["bin_name"] = result.bin_name
            for key, value in result.extra.items():
                write_dataset(g, key, np.asarray(value), "1")
            log(f"{name}: {len(result.entries)} entries x {len(result.bin_centers)} bins")


# ------------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="raytrace", description=__doc__.splitlines()[0])
    sub = p.add_subparsers(dest="command", required=True)

    v = sub.add_parser("validate", help="check a configuration file")
    v.add_argument("config")
    v.add_argument("--show", action="store_true", help="print the configuration with defaults filled in")

    sm = sub.add_parser("simulate", help="write the demo snapshots of one model")
    sm.add_argument("--model", required=True)
    sm.add_argument("--settings", required=True)
    sm.add_argument("--outdir", required=True)

    sl = sub.add_parser("slice", help="cut one snapshot into lens planes")
    sl.add_argument("--settings", required=True)
    sl.add_argument("--snapshot", nargs="+", required=True, help="all files of the snapshot")
    sl.add_argument("--output", required=True)

    tr = sub.add_parser("trace", help="ray-trace one realisation of one model")
    tr.add_argument("--model", required=True)
    tr.add_argument("--realization", type=int, required=True)
    tr.add_argument("--settings", required=True)
    tr.add_argument("--planes", nargs="+", required=True, help="plane files, in increasing redshift")
    tr.add_argument("--output", required=True)

    me = sub.add_parser("measure", help="measure the configured statistics on one map file")
    me.add_argument("--settings", required=True)
    me.add_argument("--maps", required=True)
    me.add_argument("--output", required=True)
    return p


COMMANDS = {"simulate": cmd_simulate, "slice": cmd_slice, "trace": cmd_trace, "measure": cmd_measure}


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        if args.command == "validate":
            cmd_validate(args)
            return 0
        log = Log(args.command)
        COMMANDS[args.command](args, log)
        log.finish()
        return 0
    except RaytraceError as exc:
        print(f"raytrace {args.command}: error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
