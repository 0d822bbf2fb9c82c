# One snapshot -> lens planes along each axis (density contrast, potential derivatives).
# With planes.mpi_tasks > 1 the job runs under the MPI launcher of resources.mpi.

MPI_TASKS = config["planes"]["mpi_tasks"]


def slice_settings(model, index):
    # what the job's result depends on (not the rank count: MPI planes equal serial ones)
    settings = {k: v for k, v in config["planes"].items() if k != "mpi_tasks"}
    settings["species"] = rtconfig.model_species(config, model)
    if FILE_SUITE is not None:
        m = config["suite"]["models"][model]
        settings["format"] = FILE_SUITE.snapshot(model, index).fmt
        settings["length_unit"] = m.get("length_unit")
        settings["omega_m"] = rtconfig.model_parameters(config, model)["Omega_m"]
    return as_json(settings)


rule slice:
    input:
        lambda w: snapshot_files(w.model, w.index),
    output:
        f"{OUT}/planes/{{model}}/snap_{{index}}.h5",
    params:
        settings=lambda w: slice_settings(w.model, w.index),
    log:
        "logs/slice/{model}_{index}.log",
    benchmark:
        "logs/benchmarks/slice/{model}_{index}.tsv"
    threads: MPI_TASKS
    resources:
        **job_resources("slice", tasks=MPI_TASKS),
        # with MPI: the launcher, the tasks, and one CPU per task on a cluster (the SLURM
        # plugin would otherwise ask for `threads` CPUs per task)
        **({"mpi": MPIEXEC, "tasks": MPI_TASKS, "cpus_per_task": 1} if MPI_TASKS > 1 else {}),
    shell:
        ("{resources.mpi} -n {resources.tasks} " if MPI_TASKS > 1 else "")
        + "{RAYTRACE} slice --settings {params.settings:q} --snapshot {input:q} --output {output:q} 2> {log:q}"
