# Shared names: every path is built here, from the configuration, in one place.
import os
import shutil

from raytrace.demo import snapshot_paths

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
REALIZATIONS = [f"{r:04d}" for r in range(config["maps"]["realizations"])]
# every job runs with the interpreter that runs the workflow
RAYTRACE = f"{shlex.quote(sys.executable)} -m raytrace"
# MPI launcher of the slicing jobs: the one installed beside this interpreter (the mpich
# wheel puts it there), else whatever `mpiexec` is on PATH; a cluster profile replaces it
# with set-resources (e.g. slice:mpi="srun")
MPIEXEC = shutil.which("mpiexec", path=os.path.dirname(sys.executable)) or "mpiexec"


wildcard_constraints:
    model="|".join(MODELS),
    index=r"\d{3}",
    real=r"\d{4}",


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


def statistics_files():
    return expand(f"{OUT}/statistics/{{model}}/r{{real}}.h5", model=MODELS, real=REALIZATIONS)
