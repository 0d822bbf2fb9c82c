# Figures and pages for `snakemake --report`: example maps, statistic ratios, provenance.
from raytrace.report import report_defaults

STATISTICS = list(config.get("statistics", {}))
REPORT = report_defaults(config, MAP_LABELS, FIDUCIAL)
AREA_FACTOR = (config.get("forecast") or {}).get("survey_area_deg2", rtconfig.map_area_deg2(config)) / rtconfig.map_area_deg2(config)


def report_files():
    return (
        [f"{OUT}/report/maps.png", f"{OUT}/report/provenance.html"]
        + [f"{OUT}/report/statistics/{s}.png" for s in STATISTICS]
    )


rule plot_maps:
    input:
        maps=[f"{OUT}/maps/{m}/r0000.h5" for m in MODELS],
        observed=[f"{OUT}/observed/{m}/r0000.h5" for m in MODELS],
    output:
        report(f"{OUT}/report/maps.png", caption="../report/maps.rst", category="1. Maps"),
    params:
        settings=as_json({"models": MODELS, "map": REPORT["map"], "smoothing_arcmin": REPORT["smoothing_arcmin"]}),
    log:
        "logs/report/maps.log",
    group:
        "summary"
    threads: job_threads("plot_maps")
    resources:
        **job_resources("plot_maps"),
    shell:
        "{RAYTRACE} plot-maps --settings {params.settings:q} --maps {input.maps:q} "
        "--observed {input.observed:q} --output {output:q} 2> {log:q}"


rule plot_statistics:
    input:
        [f"{OUT}/stacks/{m}.h5" for m in MODELS],
    output:
        [
            report(f"{OUT}/report/statistics/{s}.png", caption="../report/statistic.rst", category="2. Statistics")
            for s in STATISTICS
        ],
    params:
        settings=as_json(
            {
                "statistics": STATISTICS,
                "reference": REPORT["reference"],
                "error_model": FIDUCIAL,
                "map": REPORT["map"],
                "smoothing_arcmin": REPORT["smoothing_arcmin"],
                "area_factor": AREA_FACTOR,
            }
        ),
    log:
        "logs/report/statistics.log",
    group:
        "summary"
    threads: job_threads("plot_statistics")
    resources:
        **job_resources("plot_statistics"),
    shell:
        "{RAYTRACE} plot-statistics --settings {params.settings:q} --stacks {input:q} --output {output:q} 2> {log:q}"


rule provenance:
    output:
        report(f"{OUT}/report/provenance.html", caption="../report/provenance.rst", category="4. Provenance"),
    params:
        config=as_json(config),
    log:
        "logs/report/provenance.log",
    group:
        "summary"
    threads: job_threads("provenance")
    resources:
        **job_resources("provenance"),
    shell:
        "{RAYTRACE} provenance --config {params.config:q} --output {output:q} 2> {log:q}"
