# Nuisance variants: the same traced maps observed and measured with other nuisance values,
# for the models in survey.systematics.variant_models (default: the forecast's fiducial, else
# the first model). Only observing and measuring run per variant; no variant re-traces.
# Variants come from survey.systematics.variants and from forecast.nuisance (two per
# nuisance parameter, its derivative steps). They observe the first maps.realizations
# realisations, the ones paired with every model.

NUISANCE = rtconfig.nuisance_parameters(config)


def nuisance_variants():
    """Variant name -> its nuisance values, put over the nominal ones by observe_settings()."""
    variants = dict((config["survey"].get("systematics") or {}).get("variants") or {})
    for p in NUISANCE.values():
        variants.update(p["variants"])
    return variants


def variant_models():
    return list((config["survey"].get("systematics") or {}).get("variant_models") or [FIDUCIAL])


VARIANTS = list(nuisance_variants())
VARIANT_BATCHES = [f"{b:0{BATCH_DIGITS}d}" for b in range(config["maps"]["realizations"] // PER_JOB)]


wildcard_constraints:
    variant="|".join(VARIANTS) if VARIANTS else "(?!)",


def variant_statistics_files():
    return [f"{OUT}/variants/{v}/statistics/{m}/r{r:04d}.h5" for v in VARIANTS for m in variant_models()
            for r in range(config["maps"]["realizations"])]


def variant_stack_files(models=None):
    return [f"{OUT}/variants/{v}/stacks/{m}.h5" for v in VARIANTS for m in (models or variant_models())]


rule observe_variant:
    input:
        batch_outputs(f"{OUT}/maps/{{model}}/r{{batch}}.h5"),
    output:
        batch_outputs(f"{OUT}/variants/{{variant}}/observed/{{model}}/r{{batch}}.h5"),
    params:
        settings=lambda w: observe_settings(nuisance_variants()[w.variant]),
        realizations=batch_realizations,
        outputs=lambda w, output: quoted(output),
    log:
        "logs/observe_variant/{variant}_{model}_b{batch}.log",
    benchmark:
        "logs/benchmarks/observe_variant/{variant}_{model}_b{batch}.tsv"
    resources:
        mem_mb=lambda w: 300 + config["maps"]["pixels"] ** 2 * 8 * 12 * (len(config["maps"]["source_redshifts"]) + 4) // 2**20,
    shell:
        "{RAYTRACE} observe --realization {params.realizations} --settings {params.settings:q} "
        "--maps {input:q} --output {params.outputs} 2> {log:q}"


rule measure_variant:
    input:
        batch_outputs(f"{OUT}/variants/{{variant}}/observed/{{model}}/r{{batch}}.h5"),
    output:
        batch_outputs(f"{OUT}/variants/{{variant}}/statistics/{{model}}/r{{batch}}.h5"),
    params:
        settings=measure_settings(),
        outputs=lambda w, output: quoted(output),
    log:
        "logs/measure_variant/{variant}_{model}_b{batch}.log",
    benchmark:
        "logs/benchmarks/measure_variant/{variant}_{model}_b{batch}.tsv"
    shell:
        "{RAYTRACE} measure --settings {params.settings:q} --maps {input:q} --output {params.outputs} 2> {log:q}"


rule stack_variant:
    input:
        lambda w: [f"{OUT}/variants/{w.variant}/statistics/{w.model}/r{r:04d}.h5"
                   for r in range(config["maps"]["realizations"])],
    output:
        f"{OUT}/variants/{{variant}}/stacks/{{model}}.h5",
    log:
        "logs/stack_variant/{variant}_{model}.log",
    shell:
        "{RAYTRACE} stack --model {wildcards.model}@{wildcards.variant} --statistics {input:q} "
        "--output {output:q} 2> {log:q}"
