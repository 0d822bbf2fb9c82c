# Demo suite: LPT particle snapshots for every model (same phases everywhere).
# A files suite (suite.kind: files) has no such rule: its snapshots are the user's.


def simulate_settings(model):
    suite = config["suite"]
    keys = ("box_mpc_h", "particles_per_side", "files_per_snapshot", "lpt_order", "snapshot_redshifts")
    settings = {k: suite[k] for k in keys}
    settings["cosmology"] = rtconfig.model_parameters(config, model)
    settings["seed"] = config["seed"]
    if suite["neutrino_particles"]:  # only when set, so that older runs stay up to date
        settings["neutrino_particles"] = True
    return as_json(settings)


if KIND == "demo":

    rule simulate:
        output:
            [
                f"{OUT}/snapshots/{{model}}/snap_{i}.{j}.hdf5"
                for i in SNAP_INDEX
                for j in range(config["suite"]["files_per_snapshot"])
            ],
        params:
            settings=lambda w: simulate_settings(w.model),
            outdir=lambda w: f"{OUT}/snapshots/{w.model}",
        log:
            "logs/simulate/{model}.log",
        benchmark:
            "logs/benchmarks/simulate/{model}.tsv"
        threads: job_threads("simulate")
        resources:
            **job_resources("simulate"),
        shell:
            "RAYTRACE_THREADS={threads} {RAYTRACE} simulate --model {wildcards.model} "
            "--settings {params.settings:q} --outdir {params.outdir:q} 2> {log:q}"
