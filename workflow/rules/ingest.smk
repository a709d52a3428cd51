rule ingest:
    """One time-step volume -> validated canonical OME-Zarr step store."""
    input:
        source=step_source,
        dry=dry_reference,
    output:
        store=directory(f"{RESULTS}/{{series}}/steps/{{step}}.zarr"),
    log:
        f"{RESULTS}/{{series}}/logs/ingest/{{step}}.log",
    params:
        code=CODE,
        settings=ingest_settings,
    # validation first: every step is ingested and checked before any analysis job starts
    priority: 1
    threads: 1
    resources:
        mem_mb=ingest_mem_mb,
        runtime=scaled_runtime(5, 200),
    shell:
        "python -m wetpath ingest {input.source:q} {output.store:q} --settings {params.settings:q}"
        " > {log:q} 2>&1"
