# Every configured statistic, at every smoothing scale, on one observed-map file.


def measure_settings():
    return as_json({"statistics": config["statistics"]})


rule measure:
    input:
        f"{OUT}/observed/{{model}}/r{{real}}.h5",
    output:
        f"{OUT}/statistics/{{model}}/r{{real}}.h5",
    params:
        settings=measure_settings(),
    log:
        "logs/measure/{model}_r{real}.log",
    benchmark:
        "logs/benchmarks/measure/{model}_r{real}.tsv"
    shell:
        "{RAYTRACE} measure --settings {params.settings:q} --maps {input:q} --output {output:q} 2> {log:q}"
