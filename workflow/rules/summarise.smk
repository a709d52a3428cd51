def first_step_store(wildcards):
    return f"{RESULTS}/{wildcards.series}/steps/{step_names(wildcards.series)[0]}.zarr"


rule summarise:
    """Voxel counts per phase, porosity and wetting saturation of one step; checks that its volume
    has the shape of the series' first step before any per-step analysis runs."""
    input:
        store=rules.ingest.output.store,
        # ancient(): the first step's store orders the jobs (its shape is the series' shape) but
        # its modification time does not rerun the other steps' summaries.
        first=ancient(first_step_store),
    output:
        table=f"{RESULTS}/{{series}}/summaries/{{step}}.csv",
    log:
        f"{RESULTS}/{{series}}/logs/summarise/{{step}}.log",
    params:
        code=CODE,
    # validation first: every step is ingested and checked before any analysis job starts
    priority: 1
    threads: 1
    resources:
        mem_mb=scaled_mem_mb(500, 0.5),
        runtime=scaled_runtime(5, 500),
    shell:
        "python -m wetpath summarise {input.store:q} {output.table:q} --step {wildcards.step:q}"
        " --same-shape-as {input.first:q} > {log:q} 2>&1"
