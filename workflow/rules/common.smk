# Shared names: every path is built here, from the configuration, in one place.
import os
import shutil

from raytrace.demo import snapshot_paths
import raytrace.resources as rtresources

OUT = config["output"]
MODELS = rtconfig.model_names(config)
KIND = config["suite"]["kind"]
if KIND == "files":
    # the user's snapshots: headers read once, at start-up (one line naming the key on error)
    from raytrace import filesuite

    try:
        FILE_SUITE = filesuite.discover(config)
    except RaytraceError as exc:
        sys.exit(f"raytrace: snapshot error: {exc}")
    BOX_MPC_H = FILE_SUITE.box_mpc_h
    SNAP_INDEX = None  # per model: FILE_SUITE.indices(model)
else:
    FILE_SUITE = None
    BOX_MPC_H = config["suite"]["box_mpc_h"]
    SNAP_Z = rtconfig.snapshot_redshifts(config)
    SNAP_INDEX = [f"{i:03d}" for i in range(len(SNAP_Z))]
# realisations per model (the fiducial may have more, for the covariance); one trace,
# observe or measure job handles a batch of PER_JOB consecutive realisations, named by
# the leading digits of their four-digit index: batch "003" of 10 is r0030 ... r0039
COUNTS = rtconfig.realization_counts(config)
PER_JOB = rtconfig.realizations_per_job(config)
SUFFIX_DIGITS = len(str(PER_JOB)) - 1
BATCH_DIGITS = 4 - SUFFIX_DIGITS
SUFFIXES = [f"{i:0{SUFFIX_DIGITS}d}" if SUFFIX_DIGITS else "" for i in range(PER_JOB)]
MAP_LABELS = rtconfig.map_labels(config)
FIDUCIAL = rtconfig.fiducial_model(config)
# every job runs with the interpreter that runs the workflow
RAYTRACE = f"{shlex.quote(sys.executable)} -m raytrace"
# MPI launcher of the slicing jobs: the one installed beside this interpreter (the mpich
# wheel puts it there), else whatever `mpiexec` is on PATH; a cluster profile replaces it
# with set-resources (e.g. slice:mpi="srun")
MPIEXEC = shutil.which("mpiexec", path=os.path.dirname(sys.executable)) or "mpiexec"


wildcard_constraints:
    model="|".join(MODELS),
    index=r"\d{3}",
    batch=rf"\d{{{BATCH_DIGITS}}}",


def as_json(value):
    return json.dumps(value, sort_keys=True)


def snapshot_indices(model):
    return FILE_SUITE.indices(model) if FILE_SUITE is not None else SNAP_INDEX


def snapshot_files(model, index):
    if FILE_SUITE is not None:
        return list(FILE_SUITE.snapshot(model, index).files)
    suite = config["suite"]
    return [str(p) for p in snapshot_paths(f"{OUT}/snapshots/{model}", int(index), suite["files_per_snapshot"])]


def plane_files(model):
    return [f"{OUT}/planes/{model}/snap_{i}.h5" for i in snapshot_indices(model)]


def batch_outputs(pattern):
    """The files of one batch: ``pattern`` has ``{batch}`` where the realisation index starts."""
    return [pattern.replace("{batch}", "{batch}" + s) for s in SUFFIXES]


def batch_realizations(wildcards):
    return " ".join(str(int(wildcards.batch + s)) for s in SUFFIXES)


def batches(model):
    return [f"{b:0{BATCH_DIGITS}d}" for b in range(COUNTS[model] // PER_JOB)]


def realization_files(stage, model):
    return [f"{OUT}/{stage}/{model}/r{r:04d}.h5" for r in range(COUNTS[model])]


def quoted(paths):
    return " ".join(shlex.quote(str(p)) for p in paths)


def statistics_files():
    return [f for m in MODELS for f in realization_files("statistics", m)]


# Job sizes (raytrace/resources.py, formulas in README "Resources"): memory in MB and wall
# time in minutes of one job, from the configuration's sizes; each retry asks for more.
# Extra keywords reach the estimate (e.g. the MPI tasks of a slicing job).
def job_resources(rule, **extra):
    def request(key):
        def value(wildcards, attempt):
            model = getattr(wildcards, "model", None)
            return rtresources.estimate(rule, config, model=model, files=FILE_SUITE, **extra).request(attempt)[key]

        return value

    return {"mem_mb": request("mem_mb"), "runtime": request("runtime")}


def job_threads(rule):
    return rtresources.estimate(rule, config, files=FILE_SUITE).threads
