# Per-step geometry and angles, per-increment tracking and energy balance, per-series history.
# Rules are thin: each calls one `python -m wetpath <subcommand>`.
ANALYSIS = config.get("analysis", {})
MEASURE_SETTINGS = json.dumps({k: ANALYSIS[k] for k in
                               ("sigma", "connectivity", "perturb", "geometric")}, sort_keys=True)
ENERGY_SETTINGS = json.dumps({"large_step": ANALYSIS["large_step"],
                              "volume_tol": ANALYSIS["volume_tolerance"]}, sort_keys=True)
HISTORY_SETTINGS = json.dumps({"interfacial_tension_n_per_m": ANALYSIS["interfacial_tension_n_per_m"],
                               "static_tolerance": ANALYSIS["static_tolerance"]}, sort_keys=True)
STEP_TABLES["measures"] = f"{RESULTS}/{{series}}/measures/{{step}}.csv"


def increments_of(series):
    steps = step_names(series)
    return list(zip(steps[:-1], steps[1:]))


def increment_tables(wildcards):
    return [f"{RESULTS}/{wildcards.series}/increments/{a}/{b}.csv"
            for a, b in increments_of(wildcards.series)]


def overlap_tables(wildcards):
    return [f"{RESULTS}/{wildcards.series}/tracks/{a}/{b}.csv"
            for a, b in increments_of(wildcards.series)]


def family_tables(wildcards):
    return [f"{RESULTS}/{wildcards.series}/families/{a}/{b}.csv"
            for a, b in increments_of(wildcards.series)]


def cluster_tables(wildcards):
    return [f"{RESULTS}/{wildcards.series}/measures/{s}_clusters.csv"
            for s in step_names(wildcards.series)]


def step_stores(wildcards):
    return [f"{RESULTS}/{wildcards.series}/steps/{s}.zarr" for s in step_names(wildcards.series)]


def history_settings(wildcards):
    return json.dumps({**json.loads(HISTORY_SETTINGS), "title": wildcards.series,
                       "config": {"series": SERIES[wildcards.series], "analysis": ANALYSIS}},
                      sort_keys=True, default=str)


rule measure:
    """Cluster labels, then volumes, areas, curvature, topology, contact line, topological and
    geometric angles of one step."""
    input:
        store=rules.ingest.output.store,
        # the step's summary checked the volume's shape against the series' first step: analysis
        # of a mis-shaped volume never starts (ancient: the summary's time does not rerun this)
        summary=ancient(rules.summarise.output.table),
    output:
        clusters=directory(f"{RESULTS}/{{series}}/clusters/{{step}}.zarr"),
        state=f"{RESULTS}/{{series}}/measures/{{step}}.csv",
        cluster_table=f"{RESULTS}/{{series}}/measures/{{step}}_clusters.csv",
        blocks=f"{RESULTS}/{{series}}/measures/{{step}}_blocks.csv",
        perturbed=f"{RESULTS}/{{series}}/measures/{{step}}_perturbed.csv",
        points=f"{RESULTS}/{{series}}/measures/{{step}}_points.csv",
    log:
        f"{RESULTS}/{{series}}/logs/measure/{{step}}.log",
    params:
        code=CODE,
        folder=lambda wc: f"{RESULTS}/{wc.series}/measures",
        settings=MEASURE_SETTINGS,
    threads: ANALYSIS["threads"]
    resources:
        mem_mb=scaled_mem_mb(1500, 40),
        runtime=scaled_runtime(10, 5),
    shell:
        "python -m wetpath measure {input.store:q} {output.clusters:q} {params.folder:q} --label"
        " --step {wildcards.step:q} --settings {params.settings:q} --threads {threads}"
        " > {log:q} 2>&1"


rule track:
    """Overlaps and displacement events between the clusters of two successive steps, and the
    energy-balance angle of the increment (field of view and per cluster family)."""
    input:
        a=f"{RESULTS}/{{series}}/clusters/{{a}}.zarr",
        b=f"{RESULTS}/{{series}}/clusters/{{b}}.zarr",
        before=f"{RESULTS}/{{series}}/measures/{{a}}.csv",
        after=f"{RESULTS}/{{series}}/measures/{{b}}.csv",
    output:
        overlaps=f"{RESULTS}/{{series}}/tracks/{{a}}/{{b}}.csv",
        events=f"{RESULTS}/{{series}}/events/{{a}}/{{b}}.csv",
        table=f"{RESULTS}/{{series}}/increments/{{a}}/{{b}}.csv",
        families=f"{RESULTS}/{{series}}/families/{{a}}/{{b}}.csv",
    log:
        f"{RESULTS}/{{series}}/logs/track/{{a}}/{{b}}.log",
    params:
        code=CODE,
        voxel=lambda wc: voxel_triple(SERIES[wc.series]["voxel_size_um"])[0],
        folder=lambda wc: f"{RESULTS}/{wc.series}/measures",
        settings=ENERGY_SETTINGS,
    threads: ANALYSIS["threads"]
    resources:
        mem_mb=scaled_mem_mb(800, 4),
        runtime=scaled_runtime(5, 200),
    shell:
        "python -m wetpath track {input.a:q} {input.b:q} {output.overlaps:q} {output.events:q}"
        " --voxel-size-um {params.voxel} --threads {threads} --settings {params.settings:q}"
        " --increment {params.folder:q} {wildcards.a:q} {wildcards.b:q} {output.table:q}"
        " {output.families:q} > {log:q} 2>&1"


rule angles:
    """Per-series angle tables (states, increments, families, clusters) and cluster lineages."""
    input:
        states=f"{RESULTS}/{{series}}/states.csv",
        increments=increment_tables,
        families=family_tables,
        clusters=cluster_tables,
        overlaps=overlap_tables,
    output:
        states=f"{RESULTS}/{{series}}/angles/states.csv",
        increments=f"{RESULTS}/{{series}}/angles/increments.csv",
        families=f"{RESULTS}/{{series}}/angles/families.csv",
        clusters=f"{RESULTS}/{{series}}/angles/clusters.csv",
        lineages=f"{RESULTS}/{{series}}/angles/lineages.csv",
    log:
        f"{RESULTS}/{{series}}/logs/angles.log",
    params:
        code=CODE,
        folder=lambda wc: f"{RESULTS}/{wc.series}/angles",
    threads: 1
    resources:
        mem_mb=scaled_mem_mb(500, 4),
        runtime=scaled_runtime(2, 100),
    shell:
        "python -m wetpath angles {input.states:q} {params.folder:q}"
        " --increments {input.increments:q} --families {input.families:q}"
        " --clusters {input.clusters:q} --overlaps {input.overlaps:q} > {log:q} 2>&1"


rule history:
    """Saturation-path history, branch summary, figures and the HTML report of a series."""
    input:
        states=f"{RESULTS}/{{series}}/states.csv",
        increments=rules.angles.output.increments,
        stores=step_stores,
    output:
        history=f"{RESULTS}/{{series}}/history.csv",
        parquet=f"{RESULTS}/{{series}}/history.parquet",
        branches=f"{RESULTS}/{{series}}/branches.csv",
        report=f"{RESULTS}/{{series}}/report.html",
        provenance=f"{RESULTS}/{{series}}/provenance.json",
    log:
        f"{RESULTS}/{{series}}/logs/history.log",
    params:
        code=CODE,
        folder=lambda wc: f"{RESULTS}/{wc.series}",
        settings=history_settings,
    threads: 1
    resources:
        mem_mb=scaled_mem_mb(1000, 2),
        runtime=scaled_runtime(5, 500),
    shell:
        "python -m wetpath history {input.states:q} {input.increments:q} {params.folder:q}"
        " --stores {input.stores:q} --settings {params.settings:q} > {log:q} 2>&1"
