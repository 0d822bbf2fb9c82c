# Every realisation of one model -> one table with labels, mean, covariance and correlation.


rule stack:
    input:
        lambda w: realization_files("statistics", w.model),
    output:
        f"{OUT}/stacks/{{model}}.h5",
    log:
        "logs/stack/{model}.log",
    benchmark:
        "logs/benchmarks/stack/{model}.tsv"
    group:
        "summary"
    threads: job_threads("stack")
    resources:
        **job_resources("stack"),
    shell:
        "{RAYTRACE} stack --model {wildcards.model} --statistics {input:q} --output {output:q} 2> {log:q}"
