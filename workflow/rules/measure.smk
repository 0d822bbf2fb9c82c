# Every configured statistic, at every smoothing scale, on a batch of observed-map files.


def measure_settings():
    return as_json({"statistics": config["statistics"]})


rule measure:
    input:
        batch_outputs(f"{OUT}/observed/{{model}}/r{{batch}}.h5"),
    output:
        batch_outputs(f"{OUT}/statistics/{{model}}/r{{batch}}.h5"),
    params:
        settings=measure_settings(),
        outputs=lambda w, output: quoted(output),
    log:
        "logs/measure/{model}_b{batch}.log",
    benchmark:
        "logs/benchmarks/measure/{model}_b{batch}.tsv"
    group:
        "batch"
    threads: job_threads("measure")
    resources:
        **job_resources("measure"),
    shell:
        "{RAYTRACE} measure --settings {params.settings:q} --maps {input:q} --output {params.outputs} 2> {log:q}"
