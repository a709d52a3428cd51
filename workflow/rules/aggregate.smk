localrules: states


rule states:
    """Join every per-step table of a series (see STEP_TABLES) into results/<series>/states.csv."""
    input:
        times=times_file,
        tables=step_tables,
    output:
        table=f"{RESULTS}/{{series}}/states.csv",
    log:
        f"{RESULTS}/{{series}}/logs/states.log",
    params:
        code=CODE,
    threads: 1
    resources:
        mem_mb=scaled_mem_mb(500, 4),
        runtime=scaled_runtime(2, 100),
    shell:
        "python -m wetpath states {output.table:q} --times {input.times:q}"
        " --series {wildcards.series:q} {input.tables:q} > {log:q} 2>&1"
