# Full-sky branch (maps.geometry: sphere): density shells of a batch of realisations, then
# Born or multi-plane HEALPix maps; observe, measure, stack and forecast are shared.
from raytrace.sky.config import shells_settings

SHELLS = config["shells"]
SHELL_KIND = SHELLS["kind"]
NPIX = 12 * config["maps"]["nside"] ** 2


def shell_inputs(wildcards):
    if SHELL_KIND == "tile":
        return [f for i in SNAP_INDEX for f in snapshot_files(wildcards.model, i)]
    return [SHELLS["files"].format(model=wildcards.model, realization=int(wildcards.batch + s)) for s in SUFFIXES]


def shell_input_args(wildcards, input):
    return ("--snapshots " if SHELL_KIND == "tile" else "--input ") + quoted(input)


def shell_files():
    files = batch_outputs(f"{OUT}/shells/{{model}}/r{{batch}}.h5")
    return files if SHELLS["keep"] else [temp(f) for f in files]


rule shells:
    input:
        shell_inputs,
    output:
        shell_files(),
    params:
        settings=lambda w: as_json(shells_settings(config, rtconfig.model_parameters(config, w.model))),
        realizations=batch_realizations,
        inputs=shell_input_args,
        outputs=lambda w, output: quoted(output),
    log:
        "logs/shells/{model}_b{batch}.log",
    benchmark:
        "logs/benchmarks/shells/{model}_b{batch}.tsv"
    resources:
        # one snapshot (read, sorted into blocks, rotated: ~85 bytes per particle) + shell maps
        mem_mb=lambda w: 300 + (config["suite"]["particles_per_side"] ** 3 * 90 + NPIX * 16) // 2**20,
    shell:
        "{RAYTRACE} shells --model {wildcards.model} --realization {params.realizations} "
        "--settings {params.settings:q} {params.inputs} --output {params.outputs} 2> {log:q}"


def trace_sphere_settings(model):
    return as_json(
        {
            "cosmology": rtconfig.model_parameters(config, model),
            "maps": config["maps"] | {"realizations": None, "realizations_per_job": None},
            "sources": config["survey"].get("sources"),
            "seed": config["seed"],
        }
    )


rule trace_sphere:
    input:
        batch_outputs(f"{OUT}/shells/{{model}}/r{{batch}}.h5"),
    output:
        batch_outputs(f"{OUT}/maps/{{model}}/r{{batch}}.h5"),
    params:
        settings=lambda w: trace_sphere_settings(w.model),
        realizations=batch_realizations,
        outputs=lambda w, output: quoted(output),
    log:
        "logs/trace/{model}_b{batch}.log",
    benchmark:
        "logs/benchmarks/trace/{model}_b{batch}.tsv"
    resources:
        # maps (4 doubles per map) + multi-plane rays, Jacobians, bases, weights, shell fields
        mem_mb=lambda w: 300 + NPIX * (32 * len(MAP_LABELS) + 350) // 2**20,
    shell:
        "{RAYTRACE} trace-sphere --model {wildcards.model} --realization {params.realizations} "
        "--settings {params.settings:q} --shells {input:q} --output {params.outputs} 2> {log:q}"
