# A batch of realisations of one model: random plane choices, multi-plane or Born tracing.


def trace_settings(model, batch):
    settings = {
        "cosmology": rtconfig.model_parameters(config, model),
        "maps": config["maps"] | {"realizations": None, "realizations_per_job": None},  # counts do not change a map
        "sources": config["survey"].get("sources"),
        "seed": config["seed"],
    }
    # only the systematics keys that change the traced maps (nuisance values: observe)
    systematics = config["survey"].get("systematics")
    traced = rtsystematics.trace_settings(systematics)
    if traced and not needs_variant_maps(model, batch):
        traced = rtsystematics.nominal_trace_settings(systematics, traced)
    if traced:
        settings["systematics"] = traced
    return as_json(settings)


def needs_variant_maps(model, batch):
    """Derivative-step bins and alignment maps are traced where variants observe them: the
    variant models' first maps.realizations realisations (unless nominal values need them)."""
    return model in variant_models() and int(batch) < config["maps"]["realizations"] // PER_JOB


rule trace:
    input:
        lambda w: plane_files(w.model),
    output:
        batch_outputs(f"{OUT}/maps/{{model}}/r{{batch}}.h5"),
    params:
        settings=lambda w: trace_settings(w.model, w.batch),
        realizations=batch_realizations,
        outputs=lambda w, output: quoted(output),
    log:
        "logs/trace/{model}_b{batch}.log",
    benchmark:
        "logs/benchmarks/trace/{model}_b{batch}.tsv"
    resources:
        mem_mb=lambda w: 300 + (config["maps"]["pixels"] ** 2 * 8 * (12 + 8) + 5 * config["planes"]["grid"] ** 2 * 8) // 2**20,
    shell:
        "{RAYTRACE} trace --model {wildcards.model} --realization {params.realizations} "
        "--settings {params.settings:q} --planes {input:q} --output {params.outputs} 2> {log:q}"
