# Shape noise, mask and smoothing (and optionally catalogs and FITS images) on one map file.


def observe_settings(nuisance=None):
    survey = {k: v for k, v in config["survey"].items() if k != "sources"}  # sources: trace
    systematics = rtsystematics.observe_settings(survey.pop("systematics", None), values=nuisance)
    if systematics is not None:  # without the variants; with a variant's nuisance values if given
        survey["systematics"] = systematics
    return as_json({"survey": survey, "seed": config["seed"]})


CATALOG = config["survey"].get("catalog", {}).get("enabled", False)
FITS = config["survey"].get("fits", {}).get("enabled", False)


def observe_extra_args(wildcards, output):
    args = []
    if CATALOG:
        args += ["--catalog", output.catalog, "--catalog-fits", output.catalog_fits]
    if FITS:
        args += ["--fits", output.fits]
    return " ".join(shlex.quote(a) for a in args)


rule observe:
    input:
        f"{OUT}/maps/{{model}}/r{{real}}.h5",
    output:
        observed=f"{OUT}/observed/{{model}}/r{{real}}.h5",
        **({"catalog": f"{OUT}/catalogs/{{model}}/r{{real}}.h5"} if CATALOG else {}),
        **({"catalog_fits": f"{OUT}/catalogs/{{model}}/r{{real}}.fits"} if CATALOG else {}),
        **({"fits": f"{OUT}/fits/{{model}}/r{{real}}_kappa.fits"} if FITS else {}),
    params:
        settings=observe_settings(),
        extra=observe_extra_args,
    log:
        "logs/observe/{model}_r{real}.log",
    benchmark:
        "logs/benchmarks/observe/{model}_r{real}.tsv"
    resources:
        mem_mb=lambda w: 300 + config["maps"]["pixels"] ** 2 * 8 * 12 * (len(config["maps"]["source_redshifts"]) + 4) // 2**20,
    shell:
        "{RAYTRACE} observe --realization {wildcards.real} --settings {params.settings:q} "
        "--maps {input:q} --output {output.observed:q} {params.extra} 2> {log:q}"
