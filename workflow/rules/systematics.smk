# Nuisance variants: the same traced maps observed and measured with other nuisance values
# (survey.systematics.variants), for the models in survey.systematics.variant_models.
# Only observing and measuring run per variant; no variant re-traces.


def nuisance_variants():
    """Variant name -> its nuisance values, put over the nominal ones by observe_settings().

    Values are a mapping like one entry of survey.systematics.variants. To add variants made
    elsewhere (e.g. forecast derivative steps), extend this function."""
    return dict((config["survey"].get("systematics") or {}).get("variants") or {})


def variant_models():
    return list((config["survey"].get("systematics") or {}).get("variant_models") or MODELS[:1])


VARIANTS = list(nuisance_variants())


wildcard_constraints:
    variant="|".join(VARIANTS) if VARIANTS else "(?!)",


def variant_statistics_files():
    return expand(f"{OUT}/variants/{{variant}}/statistics/{{model}}/r{{real}}.h5", variant=VARIANTS,
                  model=variant_models(), real=REALIZATIONS)


rule observe_variant:
    input:
        f"{OUT}/maps/{{model}}/r{{real}}.h5",
    output:
        f"{OUT}/variants/{{variant}}/observed/{{model}}/r{{real}}.h5",
    params:
        settings=lambda w: observe_settings(nuisance_variants()[w.variant]),
    log:
        "logs/observe_variant/{variant}_{model}_r{real}.log",
    benchmark:
        "logs/benchmarks/observe_variant/{variant}_{model}_r{real}.tsv"
    resources:
        mem_mb=lambda w: 300 + config["maps"]["pixels"] ** 2 * 8 * 12 * (len(config["maps"]["source_redshifts"]) + 4) // 2**20,
    shell:
        "{RAYTRACE} observe --realization {wildcards.real} --settings {params.settings:q} "
        "--maps {input:q} --output {output:q} 2> {log:q}"


rule measure_variant:
    input:
        f"{OUT}/variants/{{variant}}/observed/{{model}}/r{{real}}.h5",
    output:
        f"{OUT}/variants/{{variant}}/statistics/{{model}}/r{{real}}.h5",
    params:
        settings=measure_settings(),
    log:
        "logs/measure_variant/{variant}_{model}_r{real}.log",
    benchmark:
        "logs/benchmarks/measure_variant/{variant}_{model}_r{real}.tsv"
    shell:
        "{RAYTRACE} measure --settings {params.settings:q} --maps {input:q} --output {output:q} 2> {log:q}"
