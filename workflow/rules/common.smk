# Configuration, step discovery, per-step settings, resources. Rules stay thin: they call
# `python -m wetpath <subcommand>`; everything here only decides *what* to run.
import copy
import json
import os
from pathlib import Path

import yaml
from snakemake.utils import validate

from wetpath._errors import WetpathError
from wetpath._ingest import read_step_table
from wetpath._provenance import code_hash
from wetpath._store import voxel_triple

if not config:  # no --configfile: the demo run (loaded here, not merged with a user's config)
    with open(Path(workflow.basedir) / "config" / "config.yaml") as fh:
        config.update(yaml.safe_load(fh))

# Fails before any job, naming the offending key (jsonschema path); fills defaults.
validate(config, Path(workflow.basedir) / "workflow" / "schemas" / "config.schema.yaml")

RESULTS = config["results"].rstrip("/")
SERIES = config["series"]
# Changes whenever any source file of the installed wetpath changes: a params value of every rule,
# so that Snakemake's params rerun trigger reruns jobs after a code change.
CODE = code_hash()

wildcard_constraints:
    series=r"[A-Za-z0-9][A-Za-z0-9_.-]*",
    step=r"[A-Za-z0-9][A-Za-z0-9_.-]*",
    a=r"[A-Za-z0-9][A-Za-z0-9_.-]*",
    b=r"[A-Za-z0-9][A-Za-z0-9_.-]*",


def _series_folder(name):
    return Path(SERIES[name]["input"])


def _check_series(name, cfg):
    voxel_triple(cfg["voxel_size_um"], step=f"config series.{name}.voxel_size_um")
    for step, override in cfg.get("steps", {}).items():
        if "voxel_size_um" in override:
            voxel_triple(override["voxel_size_um"],
                         step=f"config series.{name}.steps.{step}.voxel_size_um")


# Steps of each series come from its step table (default <input>/times.csv: step,time_s,file),
# read when the workflow is parsed: a scan appended to the folder and its table is picked up by
# the next run, which then schedules only the new step's jobs and the aggregates.
STEPS = {}
for _name, _cfg in SERIES.items():
    _check_series(_name, _cfg)
    _demo_out = Path(config.get("demo", {}).get("out", "demo-data"))
    if "demo" in config and _demo_out in [_series_folder(_name), *_series_folder(_name).parents] \
            and not _series_folder(_name).exists():
        raise WetpathError(f"demo series not written yet: run `wetpath run` (writes it first) or "
                           f"`wetpath demo {_demo_out}`", step=f"series {_name}",
                           path=_series_folder(_name))
    STEPS[_name] = read_step_table(_series_folder(_name), times=_cfg["times"], series=_name)
    if len(STEPS[_name]) < 2:
        print(f"note: series {_name} has one step: state measures only, no increments")


def times_file(wildcards):
    return str(_series_folder(wildcards.series) / SERIES[wildcards.series]["times"])


def step_names(series):
    return list(STEPS[series]["step"])


def step_source(wildcards):
    table = STEPS[wildcards.series].set_index("step")
    return table.loc[wildcards.step, "file"]


def _merge(base, override):
    out = copy.deepcopy(base)
    for key, value in override.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def step_settings(series, step):
    """Effective settings of one step: series settings merged with its `steps.<step>` override."""
    cfg = SERIES[series]
    settings = {key: cfg.get(key) for key in
                ("voxel_size_um", "kind", "codes", "format", "dataset", "raw", "segment")}
    settings["chunks"] = cfg.get("chunks", config["chunks"])
    settings = _merge(settings, cfg.get("steps", {}).get(step, {}))
    if settings["kind"] == "grayscale":
        seg = dict(settings.get("segment") or {})
        seg["dry"] = str(_series_folder(series) / cfg["dry"])
        settings["segment"] = seg
    settings["step"] = step
    return {k: v for k, v in settings.items() if v is not None}


def ingest_settings(wildcards):
    # A params value: a change to this step's settings reruns only this step (params trigger).
    return json.dumps(step_settings(wildcards.series, wildcards.step), sort_keys=True)


def dry_reference(wildcards):
    cfg = SERIES[wildcards.series]
    return [str(_series_folder(wildcards.series) / cfg["dry"])] if cfg["kind"] == "grayscale" else []


# Per-step tables joined into results/<series>/states.csv. A later per-step rule registers its
# output pattern here (e.g. STEP_TABLES["measures"] = f"{RESULTS}/{{series}}/measures/{{step}}.csv")
# and the aggregate picks it up; the folder name names the table.
STEP_TABLES = {"summaries": f"{RESULTS}/{{series}}/summaries/{{step}}.csv"}


def step_tables(wildcards):
    return [pattern.format(series=wildcards.series, step=step)
            for pattern in STEP_TABLES.values() for step in step_names(wildcards.series)]


# ---- resources: scale with the size of a job's inputs --------------------------------------------
def input_mb(input):
    total = 0
    for item in input:
        path = Path(str(item))
        if path.is_file():
            total += path.stat().st_size
        elif path.is_dir():
            total += sum(p.stat().st_size for p in path.rglob("*") if p.is_file())
    return total / 2**20


def scaled_mem_mb(base_mb, per_input_mb):
    """mem_mb = base + factor x input size (MB), doubled on each retry."""
    def mem_mb(wildcards, input, attempt):
        return int((base_mb + per_input_mb * input_mb(input)) * attempt)
    return mem_mb


def scaled_runtime(base_min, input_mb_per_min):
    """runtime (minutes) = base + input size / throughput, doubled on each retry."""
    def runtime(wildcards, input, attempt):
        return int((base_min + input_mb(input) / input_mb_per_min) * attempt)
    return runtime


def ingest_mem_mb(wildcards, input, attempt):
    # labels stream one slab (a few chunk depths of planes); grayscale segmentation holds the
    # scan, the reference and float work arrays in memory (~12 bytes per input byte).
    factor = 12 if SERIES[wildcards.series]["kind"] == "grayscale" else 0.25
    return int((1000 + factor * input_mb(input)) * attempt)
