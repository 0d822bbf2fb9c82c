# One snapshot -> lens planes along each axis (density contrast, potential derivatives).


def slice_settings():
    return as_json(config["planes"])


rule slice:
    input:
        lambda w: snapshot_files(w.model, w.index),
    output:
        f"{OUT}/planes/{{model}}/snap_{{index}}.h5",
    params:
        settings=slice_settings(),
    log:
        "logs/slice/{model}_{index}.log",
    benchmark:
        "logs/benchmarks/slice/{model}_{index}.tsv"
    threads: job_threads("slice")
    resources:
        **job_resources("slice"),
    shell:
        "{RAYTRACE} slice --settings {params.settings:q} --snapshot {input:q} --output {output:q} 2> {log:q}"
