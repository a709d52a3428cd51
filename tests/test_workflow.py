"""The Snakemake workflow for real on a tiny series (3 steps of 24³) in a temporary folder.

A module fixture runs the workflow once (with a private copy of the package sources on PYTHONPATH,
so a test can edit "the code"); each scheduling test copies that finished folder and asks Snakemake
for a dry run.
"""

from __future__ import annotations

import shutil

import numpy as np
import pandas as pd
import pytest
import tifffile

from .conftest import (
    WORKFLOW_CONFIG,
    aggregate_jobs,
    increment_jobs,
    planned_job_wildcards,
    planned_jobs,
    series_labels,
    snakemake,
    step_jobs,
    write_series,
)

pytestmark = [pytest.mark.workflow, pytest.mark.xdist_group("workflow")]

CONFIG = WORKFLOW_CONFIG


@pytest.fixture
def finished(finished_workflow):
    return finished_workflow


def _copy(finished, tmp_path):
    dest = tmp_path / "wf"
    shutil.copytree(finished, dest, symlinks=True)  # copy2 keeps modification times
    return dest


def test_states_match_direct_numpy_counts(finished):
    states = pd.read_csv(finished / "results" / "tiny" / "states.csv")
    assert list(states["step"]) == ["step_000", "step_001", "step_002"]
    assert list(states["time_s"]) == [0.0, 60.0, 120.0]
    for row, labels in zip(states.itertuples(), series_labels(), strict=True):
        n = np.bincount(labels.ravel(), minlength=4)  # direct count on the written labels
        assert row.porosity == pytest.approx((n[2] + n[3]) / n[1:].sum(), abs=0, rel=1e-15)
        assert row.saturation_w == pytest.approx(n[2] / (n[2] + n[3]), abs=0, rel=1e-15)
        assert row.voxel_size_um == 2.5
        assert len(row.source_sha256) == 64 and row.wetpath_version
    assert (finished / "results" / "tiny" / "steps" / "step_001.zarr" / "zarr.json").exists()
    for log in ("ingest/step_000.log", "summarise/step_002.log", "states.log"):
        assert (finished / "results" / "tiny" / "logs" / log).exists()


def test_nothing_to_do_after_a_complete_run(finished, tmp_path):
    wf = _copy(finished, tmp_path)
    assert planned_jobs(snakemake(wf, "-n", src=wf / "src").stdout) == set()


def test_changed_input_reruns_only_its_step(finished, tmp_path):
    wf = _copy(finished, tmp_path)
    changed = series_labels()[1]
    changed[changed == 2] = 3
    tifffile.imwrite(wf / "data" / "step_001.tif", changed)
    jobs = planned_job_wildcards(snakemake(wf, "-n", src=wf / "src").stdout)
    assert jobs == (step_jobs("tiny", "step_001") | increment_jobs("tiny", "step_000", "step_001")
                    | increment_jobs("tiny", "step_001", "step_002") | aggregate_jobs("tiny"))


def test_per_step_setting_reruns_only_that_step(finished, tmp_path):
    wf = _copy(finished, tmp_path)
    (wf / "config.yaml").write_text(CONFIG + "    steps:\n      step_002:\n        chunks: 8\n")
    jobs = planned_job_wildcards(snakemake(wf, "-n", src=wf / "src").stdout)
    assert jobs == (step_jobs("tiny", "step_002") | increment_jobs("tiny", "step_001", "step_002")
                    | aggregate_jobs("tiny"))


def test_code_change_reruns_every_rule(finished, tmp_path):
    wf = _copy(finished, tmp_path)
    with open(wf / "src" / "wetpath" / "_summary.py", "a") as fh:
        fh.write("\n# an edit of the package code\n")
    out = snakemake(wf, "-n", src=wf / "src").stdout
    jobs = planned_jobs(out)
    steps = ("step_000", "step_001", "step_002")
    assert {("ingest", s) for s in steps} | {("summarise", s) for s in steps} <= jobs
    assert ("states", None) in jobs
    assert "params have changed since last execution" in out.lower()


@pytest.mark.parametrize(("config", "key"), [
    (CONFIG.replace("2.5", "-1"), "voxel_size_um"),
    (CONFIG.replace("2.5", ".nan"), "series.tiny.voxel_size_um"),
    (CONFIG.replace("input: data", "input: nowhere"), "times.csv"),
    (CONFIG + "    colour: red\n", "colour"),
    (CONFIG.replace("chunks: 16", "chunks: many"), "chunks"),
])
def test_bad_config_fails_before_any_job(tmp_path, config, key):
    write_series(tmp_path / "data", [np.ones((6, 6, 6), np.uint8)] * 2)
    (tmp_path / "config.yaml").write_text(config)
    out = snakemake(tmp_path, "--cores", "1", check=False)
    assert out.returncode != 0
    assert key in out.stdout + out.stderr
    assert not (tmp_path / "results").exists()


def test_bad_label_file_fails_its_job_with_a_one_line_log(tmp_path):
    vols = series_labels(n_steps=2)
    vols[1] = vols[1].copy()
    vols[1][0, 0, :5] = 9
    write_series(tmp_path / "data", vols)
    (tmp_path / "config.yaml").write_text(CONFIG)
    out = snakemake(tmp_path, "--keep-going", check=False)
    assert out.returncode != 0
    log = (tmp_path / "results/tiny/logs/ingest/step_001.log").read_text().strip().splitlines()
    assert log == ["wetpath ingest: error: ingest step_001: data/step_001.tif: unexpected label "
                   "values 9 (5 voxels); known codes are 0=excluded, 1=solid, 2=wetting, "
                   "3=nonwetting"]
    assert not (tmp_path / "results/tiny/steps/step_001.zarr").exists()
    assert (tmp_path / "results/tiny/steps/step_000.zarr").exists()
    assert not list((tmp_path / "results/tiny/steps").glob(".*tmp*"))
