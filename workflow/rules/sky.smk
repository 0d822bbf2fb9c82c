# Full-sky branch (maps.geometry: sphere): density shells of a batch of realisations, then
# Born or multi-plane HEALPix maps; observe, measure, stack and forecast are shared.
from raytrace.sky.config import shells_settings

SHELLS = config["shells"]
SHELL_KIND = SHELLS["kind"]


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
    group:
        "batch"
    threads: job_threads("shells")
    resources:
        **job_resources("shells"),
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
        "logs/trace_sphere/{model}_b{batch}.log",
    benchmark:
        "logs/benchmarks/trace_sphere/{model}_b{batch}.tsv"
    group:
        "batch"
    threads: job_threads("trace_sphere")
    resources:
        **job_resources("trace_sphere"),
    shell:
        "{RAYTRACE} trace-sphere --model {wildcards.model} --realization {params.realizations} "
        "--settings {params.settings:q} --shells {input:q} --output {params.outputs} 2> {log:q}"
