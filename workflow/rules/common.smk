# Shared names: every path is built here, from the configuration, in one place.
from raytrace.demo import snapshot_paths

OUT = config["output"]
MODELS = rtconfig.model_names(config)
SNAP_Z = rtconfig.snapshot_redshifts(config)
SNAP_INDEX = [f"{i:03d}" for i in range(len(SNAP_Z))]
REALIZATIONS = [f"{r:04d}" for r in range(config["maps"]["realizations"])]
# every job runs with the interpreter that runs the workflow
RAYTRACE = f"{shlex.quote(sys.executable)} -m raytrace"


wildcard_constraints:
    model="|".join(MODELS),
    index=r"\d{3}",
    real=r"\d{4}",


def as_json(value):
    return json.dumps(value, sort_keys=True)


def snapshot_files(model, index):
    suite = config["suite"]
    return [str(p) for p in snapshot_paths(f"{OUT}/snapshots/{model}", int(index), suite["files_per_snapshot"])]


def plane_files(model):
    return [f"{OUT}/planes/{model}/snap_{i}.h5" for i in SNAP_INDEX]


def statistics_files():
    return expand(f"{OUT}/statistics/{{model}}/r{{real}}.h5", model=MODELS, real=REALIZATIONS)
