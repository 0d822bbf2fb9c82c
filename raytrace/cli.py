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
import socket
import sys
import time
from pathlib import Path
from typing import Sequence

from .errors import RaytraceError
from .sky import cli as sky_cli


class Log:
    """Progress and timing lines to stderr (Snakemake sends them to the rule's log)."""

    def __init__(self, stage: str):
        self.stage = stage
        self.t0 = time.perf_counter()
        self.muted = False  # set on MPI ranks other than 0

    def __call__(self, message: str) -> None:
        if self.muted:
            return
        print(f"[{self.stage} {time.perf_counter() - self.t0:7.1f} s] {message}", file=sys.stderr, flush=True)

    def finish(self) -> None:
        from . import __version__

        self(f"done: wall time {time.perf_counter() - self.t0:.2f} s, peak memory {peak_memory_mib():.1f} MiB")
        # which package and machine ran the job (a cluster job may see another installation)
        self(f"raytrace {__version__} from {Path(__file__).resolve().parent} on {socket.gethostname()}")


def peak_memory_mib() -> float:
    """Peak resident memory of this process image.

    Linux's ``VmHWM`` where available: ``ru_maxrss`` survives fork and exec, so a job
    started by a large parent (Snakemake, a benchmark) would report the parent's size.
    """
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
    except (OSError, ValueError, IndexError):
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


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
    found = ""
    if cfg["suite"]["kind"] == "files":  # the snapshots are part of what must be valid
        from .filesuite import discover

        suite = discover(cfg)
        counts = ", ".join(f"{m}: {len(s)}" for m, s in suite.models.items())
        found = f" (snapshots {counts}; box {suite.box_mpc_h:g} Mpc/h)"
    print(json.dumps(cfg, indent=1) if args.show else f"{args.config}: valid{found}")


def cmd_resources(args) -> None:
    from . import config, resources

    cfg = config.load(args.config)
    print(f"{'rule':<34} {'threads':>7} {'mem_mb':>8} {'runtime':>8}   (first attempt; CPU estimate)")
    for row in resources.table(cfg):
        print(f"{row['rule']:<34} {row['threads']:>7} {row['mem_mb']:>8} {row['runtime']:>6} min   ({row['cpu_s']:.0f} s)")


def cmd_simulate(args, log: Log) -> None:
    from .cosmology import Cosmology
    from .demo import generate_model

    s = _settings(args.settings)
    cosmo = Cosmology.from_mapping(s["cosmology"], where=f"suite.models.{args.model}")
    generate_model(
        cosmo, box_mpc_h=s["box_mpc_h"], particles_per_side=s["particles_per_side"],
        snapshot_redshifts=s["snapshot_redshifts"], seed=s["seed"], directory=args.outdir,
        files_per_snapshot=s["files_per_snapshot"], lpt_order=s["lpt_order"],
        neutrino_particles=bool(s.get("neutrino_particles", False)), workers=_workers(), log=log,
    )


def cmd_slice(args, log: Log) -> None:
    import numpy as np

    from .deposit import DEPOSIT_PLANES, load_plane_kernel
    from .hdf5 import atomic_h5
    from .parallel import collective, world
    from .planes import slice_snapshot, write_planes
    from .snapshots import read_header
    from .snapshots._check import position_range

    comm = world()
    s = _settings(args.settings)
    log.muted = comm.rank != 0  # one log: rank 0's
    if s.get("assignment") in DEPOSIT_PLANES:  # compiled kernels loaded once, before the clock starts
        load_plane_kernel(s["assignment"])
        position_range(np.zeros((1, 3)))
    t_start, cpu_start = time.perf_counter(), time.process_time()
    startup = t_start - log.t0  # logged at the end: an input error stays the only line on stderr
    # rank 0 reads the headers (one pass over the files' markers) and hands them to the others
    header = comm.bcast(collective(comm, lambda: read_header(args.snapshot, s.get("format", "hdf5"), s.get("length_unit"))
                                   if comm.rank == 0 else None))
    log(f"snapshot z = {header.redshift:g}, box {header.box_mpc_h:g} Mpc/h, particles {header.n_total}, "
        f"format {header.fmt}" + (f", {comm.size} MPI ranks" if comm.size > 1 else ""))
    omega_m = s.get("omega_m")
    if omega_m is not None and abs(header.omega_m / omega_m - 1) > 1e-3:
        log(f"note: the header's Omega0 = {header.omega_m:g} differs from the model's Omega_m = {omega_m:g}; "
            "the contrast is taken relative to the model's")
    planes = slice_snapshot(
        header, grid=s["grid"], thickness_mpc_h=s["thickness_mpc_h"], species=s["species"],
        assignment=s["assignment"], chunk_particles=s["chunk_particles"], workers=_workers(),
        omega_m=omega_m, log=log, comm=comm,
    )

    def write() -> None:
        if comm.rank == 0:
            with atomic_h5(args.output, stage="slice", settings=s, inputs=args.snapshot) as f:
                write_planes(f, planes)
            log(f"{planes.n_slabs} slabs x 3 axes of {planes.grid}^2 written to {args.output}; "
                f"deposited species {s['species']} hold {planes.deposited_fraction:.4f} of the mean matter density")

    collective(comm, write)  # a failure on rank 0 (disk full ...) must not leave the others waiting
    cpu = comm.allgather(time.process_time() - cpu_start)
    log(f"slicing took {time.perf_counter() - t_start:.2f} s (headers, deposit, reduction, potentials, writing; "
        f"{comm.size} rank{'s' if comm.size > 1 else ''}); cpu time per rank: {', '.join(f'{c:.2f}' for c in cpu)} s; "
        f"start-up before it (imports, MPI, compiled kernels; interpreter excluded) {startup:.2f} s")


def cmd_trace(args, log: Log) -> None:
    import numpy as np

    from . import survey, systematics
    from .config import check_sources_within_planes, plane_schedule
    from .cosmology import Cosmology
    from .hdf5 import atomic_h5, write_dataset
    from .tracing import PlaneFiles, choose_planes, trace

    s = _settings(args.settings)
    cosmo = Cosmology.from_mapping(s["cosmology"], where=f"suite.models.{args.model}")
    m = s["maps"]
    bins, source_bins = _source_bins(s.get("sources"))
    plan, alignment_bins = None, []
    if s.get("systematics"):
        if bins is None:
            raise RaytraceError("survey.systematics: systematics act on tomographic bins; configure survey.sources")
        plan = systematics.plan_trace(bins.z, bins.nz, s["systematics"])
        source_bins, alignment_bins = plan.source_bins(), plan.alignment_bins(cosmo)
    with PlaneFiles(args.planes) as planes:
        zs = [float(a["redshift"]) for a in planes.attrs]
        if zs != sorted(zs):
            raise RaytraceError(f"{args.planes[0]}: plane files must be given in increasing snapshot redshift")
        check_sources_within_planes(m["source_redshifts"], zs)
        thickness = float(planes.attrs[0]["thickness_mpc_h"])
        z_max = max(list(m["source_redshifts"]) + ([float(bins.z[-1])] if bins is not None else []))
        if z_max > max(zs) + 1e-9:
            raise RaytraceError(f"survey.sources.z_max: {z_max} lies beyond the last lens plane (z = {max(zs):g})")
        schedule = plane_schedule(cosmo, thickness, z_max, zs)
        survey.check_box_repetition(m["field_deg"], float(schedule.chi_hi[-1]), planes.box_mpc_h)
        choice = choose_planes(schedule, planes.n_slabs, planes.box_mpc_h, s["seed"], args.realization, m["randomize_planes"])
        maps = trace(
            cosmo, schedule, choice, planes, box_mpc_h=planes.box_mpc_h, field_deg=m["field_deg"],
            pixels=m["pixels"], source_redshifts=m["source_redshifts"], method=m["method"],
            source_bins=source_bins, alignment_bins=alignment_bins, log=log,
        )
        n_src = len(m["source_redshifts"])
        n_bins = bins.n_bins if bins is not None else 0
        lensing = ("kappa", "gamma1", "gamma2", "omega")
        with atomic_h5(args.output, stage="trace", settings=s, inputs=args.planes, seed=s["seed"]) as f:
            for key in lensing:
                write_dataset(f, key, maps[key][:n_src].astype(np.float32), "1", axes="[source, iy, ix]")
            if bins is not None:
                g = f.create_group("bins")
                for key in lensing:
                    write_dataset(g, key, maps[key][n_src:n_src + n_bins].astype(np.float32), "1", axes="[bin, iy, ix]")
                write_dataset(g, "z", bins.z, "1")
                write_dataset(g, "nz", bins.nz if plan is None else plan.nz, "1", axes="[bin, z]",
                              description="true-redshift n(z) of each bin")
                if plan is not None:
                    systematics.write_traced_systematics(g, plan, maps, n_src)
                write_dataset(g, "fraction", bins.fractions, "1", description="share of the galaxy sample")
                write_dataset(g, "edges", np.asarray(bins.edges, dtype=float), "1", description="photometric bin edges")
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


def _source_bins(sources):
    """Tomographic bins of ``survey.sources`` (None when not configured)."""
    if not sources:
        return None, []
    from . import survey
    from .tracing import SourceBin

    bins = survey.source_bins(sources, base_dir=Path.cwd())
    return bins, [SourceBin.from_nz(bins.z, bins.nz[i]) for i in range(bins.nz.shape[0])]


def cmd_observe(args, log: Log) -> None:
    from .observe import observe
    from .sky import is_sphere_file

    s = _settings(args.settings)
    if is_sphere_file(args.maps):  # the full-sky branch (raytrace.sky)
        from .sky.survey import observe as observe_sphere

        observe_sphere(args.maps, args.output, s["survey"], seed=s["seed"], realization=args.realization,
                       base_dir=Path.cwd(), fits_path=args.fits, log=log)
        return
    catalogs = (args.catalog, args.catalog_fits) if args.catalog else None
    observe(args.maps, args.output, s["survey"], seed=s["seed"], realization=args.realization, base_dir=Path.cwd(),
            catalog_paths=catalogs, fits_path=args.fits, log=log)


def cmd_measure(args, log: Log) -> None:
    from . import statistics
    from .measuring import read_observed, write_measurements
    from .sky import is_sphere_file

    s = _settings(args.settings)
    if is_sphere_file(args.maps):  # the full-sky branch (raytrace.sky)
        from .sky.statistics import measure as measure_sphere

        measure_sphere(args.maps, args.output, s, log=log)
        return
    obs = read_observed(args.maps, attrs=("pixel_arcmin",))
    pixel_arcmin = float(obs.attrs["pixel_arcmin"])
    unsmoothed, smoothed = obs.map_sets(
        lambda maps, scale, noise: statistics.MapSet(maps=maps, mask=obs.mask, pixel_arcmin=pixel_arcmin,
                                                     smoothing_arcmin=scale, noise_sigma=noise,
                                                     bin_labels=obs.labels))

    def chosen(name, settings):
        stat = statistics.build(name, settings)
        return stat.smoothed, stat.measure

    write_measurements(args.output, s, args.maps, obs.labels, unsmoothed, smoothed, chosen, log)


def cmd_stack(args, log: Log) -> None:
    from .stack import read_statistics, write_stack

    table, bin_names = read_statistics(args.statistics, model=args.model)
    write_stack(args.output, table, bin_names, model=args.model, inputs=args.statistics)
    log(f"{args.model}: {table.n_realizations} realisations x {table.n_data} elements written to {args.output}")


def cmd_forecast(args, log: Log) -> None:
    from .forecasting import run_forecast, write_products
    from .stack import read_stack

    s = _settings(args.settings)
    stacks = {read_stack(path)[0].name: path for path in args.stacks}
    products = run_forecast(s, stacks, log=log)
    write_products(products, h5_path=args.output, csv_path=args.table, html_path=args.html,
                   diagnostics_path=args.diagnostics, png_path=args.ellipses, settings=s, inputs=args.stacks,
                   degradation_path=args.degradation)
    log(f"forecast of {len(products.all_results())} combination(s) written to {args.output}")


def cmd_plot_maps(args, log: Log) -> None:
    from .report import plot_example_maps

    s = _settings(args.settings)
    if len(args.maps) != len(args.observed) or len(args.maps) != len(s["models"]):
        raise RaytraceError("--maps, --observed and the settings' models must have the same length")
    plot_example_maps(dict(zip(s["models"], args.maps)), dict(zip(s["models"], args.observed)), s["map"],
                      args.output, s.get("smoothing_arcmin"))
    log(f"maps of {len(args.maps)} model(s) drawn in {args.output}")


def cmd_plot_statistics(args, log: Log) -> None:
    from .report import plot_statistic_ratios
    from .stack import read_stack

    s = _settings(args.settings)
    if len(args.output) != len(s["statistics"]):
        raise RaytraceError(f"--output: {len(args.output)} files for {len(s['statistics'])} statistics")
    stacks = {read_stack(p)[0].name: p for p in args.stacks}
    for name, out in zip(s["statistics"], args.output):
        plot_statistic_ratios(stacks, name, reference=s["reference"], error_model=s["error_model"],
                              map_label=s["map"], path=out, smoothing_arcmin=s.get("smoothing_arcmin"),
                              area_factor=float(s.get("area_factor", 1.0)))
        log(f"{name}: ratios to {s['reference']} drawn in {out}")


def cmd_provenance(args, log: Log) -> None:
    from .report import write_provenance

    write_provenance(args.output, _settings(args.config), Path(__file__).resolve().parents[1])
    log(f"provenance written to {args.output}")


# ------------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="raytrace", description=__doc__.splitlines()[0])
    sub = p.add_subparsers(dest="command", required=True)

    v = sub.add_parser("validate", help="check a configuration file")
    v.add_argument("config")
    v.add_argument("--show", action="store_true", help="print the configuration with defaults filled in")

    rs = sub.add_parser("resources", help="memory, run time and threads each rule's jobs ask for")
    rs.add_argument("config")

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
    tr.add_argument("--realization", type=int, nargs="+", required=True, help="one or more realisations")
    tr.add_argument("--settings", required=True)
    tr.add_argument("--planes", nargs="+", required=True, help="plane files, in increasing redshift")
    tr.add_argument("--output", nargs="+", required=True, help="one map file per realisation")

    ob = sub.add_parser("observe", help="add shape noise, mask and smoothing to one map file")
    ob.add_argument("--realization", type=int, nargs="+", required=True, help="one or more realisations")
    ob.add_argument("--settings", required=True)
    ob.add_argument("--maps", nargs="+", required=True, help="one trace file per realisation")
    ob.add_argument("--output", nargs="+", required=True)
    ob.add_argument("--catalog", nargs="+", help="also write a mock shear catalog here (HDF5)")
    ob.add_argument("--catalog-fits", nargs="+", help="... and as a FITS table here")
    ob.add_argument("--fits", nargs="+", help="also write the noisy convergence maps as FITS images here")

    me = sub.add_parser("measure", help="measure the configured statistics on one observed-map file")
    me.add_argument("--settings", required=True)
    me.add_argument("--maps", nargs="+", required=True, help="one observed-map file per realisation")
    me.add_argument("--output", nargs="+", required=True)
    st = sub.add_parser("stack", help="every realisation of one model -> one table with mean and covariance")
    st.add_argument("--model", required=True)
    st.add_argument("--statistics", nargs="+", required=True, help="statistics files r<realisation>.h5")
    st.add_argument("--output", required=True)

    fo = sub.add_parser("forecast", help="Fisher forecasts per combination of statistics")
    fo.add_argument("--settings", required=True)
    fo.add_argument("--stacks", nargs="+", required=True, help="stack files <model>.h5")
    fo.add_argument("--output", required=True, help="forecast HDF5 file")
    fo.add_argument("--table", required=True, help="CSV error table")
    fo.add_argument("--html", required=True, help="HTML error table")
    fo.add_argument("--diagnostics", required=True, help="CSV half-sample diagnostics")
    fo.add_argument("--ellipses", required=True, help="PNG confidence ellipses")
    fo.add_argument("--degradation", help="CSV of sigma with / without nuisance parameters")

    pm = sub.add_parser("plot-maps", help="example convergence maps of every model (PNG)")
    pm.add_argument("--settings", required=True)
    pm.add_argument("--maps", nargs="+", required=True, help="one trace file per model")
    pm.add_argument("--observed", nargs="+", required=True, help="one observed file per model, same order")
    pm.add_argument("--output", required=True)

    ps = sub.add_parser("plot-statistics", help="each statistic as a ratio to a reference model (PNG)")
    ps.add_argument("--settings", required=True)
    ps.add_argument("--stacks", nargs="+", required=True)
    ps.add_argument("--output", nargs="+", required=True, help="one PNG per statistic of --settings")

    pv = sub.add_parser("provenance", help="configuration and software versions of the run (HTML)")
    pv.add_argument("--config", required=True, help="the run's configuration as JSON")
    pv.add_argument("--output", required=True)
    sky_cli.add_parsers(sub)  # shells, trace-sphere (the full-sky branch)
    return p


COMMANDS = {"simulate": cmd_simulate, "slice": cmd_slice, "trace": cmd_trace, "observe": cmd_observe,
            "measure": cmd_measure, "stack": cmd_stack, "forecast": cmd_forecast, "plot-maps": cmd_plot_maps,
            "plot-statistics": cmd_plot_statistics, "provenance": cmd_provenance}

#: Commands that take several realisations at once: the per-realisation options, one value each.
BATCHED = {
    "trace": ("realization", "output"),
    "observe": ("realization", "maps", "output", "catalog", "catalog_fits", "fits"),
    "measure": ("maps", "output"),
}
COMMANDS.update(sky_cli.COMMANDS)
BATCHED.update(sky_cli.BATCHED)


def per_realization(args: argparse.Namespace) -> list[argparse.Namespace]:
    """Split a batched command into one namespace per realisation (start-up is paid once)."""
    keys = [k for k in BATCHED.get(args.command, ()) if getattr(args, k, None) is not None]
    if not keys:
        return [args]
    n = len(args.output)
    for k in keys:
        if len(getattr(args, k)) != n:
            raise RaytraceError(f"--{k.replace('_', '-')}: {len(getattr(args, k))} values for {n} outputs")
    return [argparse.Namespace(**{**vars(args), **{k: getattr(args, k)[i] for k in keys}}) for i in range(n)]


def _rank() -> int:
    from .parallel import launched_by_mpi

    if not launched_by_mpi():
        return 0
    try:
        from mpi4py import MPI

        return MPI.COMM_WORLD.Get_rank()
    except ImportError:
        return 0


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        if args.command in ("validate", "resources"):
            (cmd_validate if args.command == "validate" else cmd_resources)(args)
            return 0
        log = Log(args.command)
        items = per_realization(args)
        for i, item in enumerate(items):
            if len(items) > 1:
                log(f"item {i + 1}/{len(items)}: {item.output}")
            COMMANDS[args.command](item, log)
        log.finish()
        return 0
    except RaytraceError as exc:
        if _rank() == 0:  # under MPI every rank has the error; one line is printed
            print(f"raytrace {args.command}: error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
