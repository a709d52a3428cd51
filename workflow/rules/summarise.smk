rule summarise:
    """Voxel counts per phase, porosity and wetting saturation of one step."""
    input:
        store=rules.ingest.output.store,
    output:
        table=f"{RESULTS}/{{series}}/summaries/{{step}}.csv",
    log:
        f"{RESULTS}/{{series}}/logs/summarise/{{step}}.log",
    params:
        code=CODE,
    threads: 1
    resources:
        mem_mb=scaled_mem_mb(500, 0.5),
        runtime=scaled_runtime(5, 500),
    shell:
        "python -m wetpath summarise {input.store:q} {output.table:q} --step {wildcards.step:q}"
        " > {log:q} 2>&1"
