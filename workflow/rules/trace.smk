# One realisation of one model: random plane choices, multi-plane or Born tracing.


def trace_settings(model):
    settings = {
        "cosmology": rtconfig.model_parameters(config, model),
        "maps": config["maps"] | {"realizations": None},  # the count does not change a map
        "sources": config["survey"].get("sources"),
        "seed": config["seed"],
    }
    # only the systematics keys that change the traced maps (nuisance values: observe)
    traced_systematics = rtsystematics.trace_settings(config["survey"].get("systematics"))
    if traced_systematics:
        settings["systematics"] = traced_systematics
    return as_json(settings)


rule trace:
    input:
        lambda w: plane_files(w.model),
    output:
        f"{OUT}/maps/{{model}}/r{{real}}.h5",
    params:
        settings=lambda w: trace_settings(w.model),
    log:
        "logs/trace/{model}_r{real}.log",
    benchmark:
        "logs/benchmarks/trace/{model}_r{real}.tsv"
    resources:
        mem_mb=lambda w: 300 + (config["maps"]["pixels"] ** 2 * 8 * (12 + 8) + 5 * config["planes"]["grid"] ** 2 * 8) // 2**20,
    shell:
        "{RAYTRACE} trace --model {wildcards.model} --realization {wildcards.real} "
        "--settings {params.settings:q} --planes {input:q} --output {output:q} 2> {log:q}"
