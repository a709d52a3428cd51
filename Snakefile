# wetpath workflow: time series of 3D label volumes -> step stores -> per-step tables -> states.csv
# Run with `wetpath run --configfile config/config.yaml --cores 2` (or plain `snakemake --cores 2
# --configfile ...`). Without --configfile the demo configuration config/config.yaml is used.
from snakemake.utils import min_version

min_version("9.0")


include: "workflow/rules/common.smk"
include: "workflow/rules/ingest.smk"
include: "workflow/rules/summarise.smk"
include: "workflow/rules/aggregate.smk"
include: "workflow/rules/analysis.smk"


rule all:
    default_target: True
    input:
        expand(f"{RESULTS}/{{series}}/states.csv", series=SERIES),
        expand(f"{RESULTS}/{{series}}/report.html", series=SERIES),
