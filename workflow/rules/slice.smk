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
    resources:
        # accumulators (3 axes x slabs x grid^2 float64) + float32 fields + one chunk
        mem_mb=lambda w: 300
        + (
            3
            * round(config["suite"]["box_mpc_h"] / config["planes"]["thickness_mpc_h"])
            * config["planes"]["grid"] ** 2
            * (8 + 6 * 4)
            + config["planes"]["chunk_particles"] * 64
        )
        // 2**20,
    shell:
        "{RAYTRACE} slice --settings {params.settings:q} --snapshot {input:q} --output {output:q} 2> {log:q}"
