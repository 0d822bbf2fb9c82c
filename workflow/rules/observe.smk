# Shape noise, mask and smoothing (and optionally catalogs and FITS images) on one map file.


def observe_settings(nuisance=None):
    survey = {k: v for k, v in config["survey"].items() if k != "sources"}  # sources: trace
    systematics = rtsystematics.observe_settings(survey.pop("systematics", None), values=nuisance)
    # without the variants; with a variant's nuisance values if given. Neutral values (no
    # bias, nominal n(z), no alignment) observe exactly as no systematics, so they are left
    # out and adding a systematics section for variants does not rerun the nominal stages.
    n_bins = rtconfig.configured_bin_count(config["survey"].get("sources"))
    if systematics is not None and not rtsystematics.Nuisance.from_settings(systematics, n_bins).is_null():
        survey["systematics"] = systematics
    return as_json({"survey": survey, "seed": config["seed"]})


CATALOG = config["survey"].get("catalog", {}).get("enabled", False)
FITS = config["survey"].get("fits", {}).get("enabled", False)


def observe_extra_args(wildcards, output):
    args = ""
    if CATALOG:
        args += f" --catalog {quoted(output.catalog)} --catalog-fits {quoted(output.catalog_fits)}"
    if FITS:
        args += f" --fits {quoted(output.fits)}"
    return args


rule observe:
    input:
        batch_outputs(f"{OUT}/maps/{{model}}/r{{batch}}.h5"),
    output:
        observed=batch_outputs(f"{OUT}/observed/{{model}}/r{{batch}}.h5"),
        **({"catalog": batch_outputs(f"{OUT}/catalogs/{{model}}/r{{batch}}.h5")} if CATALOG else {}),
        **({"catalog_fits": batch_outputs(f"{OUT}/catalogs/{{model}}/r{{batch}}.fits")} if CATALOG else {}),
        **({"fits": batch_outputs(f"{OUT}/fits/{{model}}/r{{batch}}_kappa.fits")} if FITS else {}),
    params:
        settings=observe_settings(),
        extra=observe_extra_args,
        realizations=batch_realizations,
        outputs=lambda w, output: quoted(output.observed),
    log:
        "logs/observe/{model}_b{batch}.log",
    benchmark:
        "logs/benchmarks/observe/{model}_b{batch}.tsv"
    resources:
        mem_mb=lambda w: 300 + rtconfig.map_pixel_count(config) * 8 * 12 * (len(config["maps"]["source_redshifts"]) + 4) // 2**20,
    shell:
        "{RAYTRACE} observe --realization {params.realizations} --settings {params.settings:q} "
        "--maps {input:q} --output {params.outputs}{params.extra} 2> {log:q}"
