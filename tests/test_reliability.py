"""Reliability of the analysis stages: bad input fails early on one line, undefined physics is NaN
with a flag, a killed run completes byte-identically, an appended scan reruns only what it must,
and every table carries its provenance while the inputs stay untouched.

Ingest-level validation (missing/unreadable file, raw size, TIFF pages, label values, voxel size,
time stamps) is tested in ``test_ingest.py`` and ``test_readers.py``; this module adds the cases
that concern a whole series or the analysis stages. Workflow runs use tiny 24³ series.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest
import tifffile

from wetpath import WetpathError, ingest_volume, measure_state
from wetpath._energy import energy_balance_angle
from wetpath._geometric import geometric_angles, summarise_geometric
from wetpath._provenance import code_hash, config_hash
from wetpath._stages import label_step
from wetpath._summary import summarise_step
from wetpath._topological import topological_angle
from wetpath.cli import main
from wetpath.synthetic import cap_on_plate, random_medium

from .conftest import (
    REPO,
    aggregate_jobs,
    fingerprint,
    increment_jobs,
    planned_job_wildcards,
    prepare_workflow,
    series_labels,
    snakemake,
    step_jobs,
    subprocess_env,
    write_series,
)

RESULTS = "results/tiny"


def _fingerprints(folder):
    return {p.name: fingerprint(p) for p in sorted(folder.iterdir()) if p.is_file()}


def _one_line(text: str) -> str:
    lines = text.strip().splitlines()
    assert len(lines) == 1, lines
    return lines[0]


def _no_nonwetting(vol: np.ndarray) -> np.ndarray:
    out = vol.copy()
    out[out == 3] = 2
    return out


# ---- 1. validation: shapes within a series, one step, analysis subcommands ----------------------

def test_summarise_rejects_a_shape_other_than_the_first_steps(tmp_path, tiny_volume):
    np.save(tmp_path / "a.npy", tiny_volume)
    np.save(tmp_path / "b.npy", tiny_volume[:, :, :20])
    before = _fingerprints(tmp_path)
    a = ingest_volume(tmp_path / "a.npy", tmp_path / "s" / "a.zarr", voxel_size_um=1.0)
    b = ingest_volume(tmp_path / "b.npy", tmp_path / "s" / "b.zarr", voxel_size_um=1.0)
    assert summarise_step(a, same_shape_as=a)["shape_x"][0] == 24
    with pytest.raises(WetpathError) as info:
        summarise_step(b, same_shape_as=a)
    assert str(info.value) == (
        f"summarise b: {tmp_path / 'b.npy'}: volumes of different shapes within one series: "
        f"shape (24, 24, 20) but the first step a ({tmp_path / 'a.npy'}) has (24, 24, 24)")
    assert _fingerprints(tmp_path) == before


def test_truncated_tiff_fails_ingest_on_one_line_and_stays_untouched(tmp_path, tiny_volume):
    """Header intact, pixel data cut: found while streaming, reported as one line."""
    src = tmp_path / "step_004.tif"
    tifffile.imwrite(src, tiny_volume)
    src.write_bytes(src.read_bytes()[: src.stat().st_size // 2])
    before = fingerprint(src)
    out = tmp_path / "steps" / "step_004.zarr"
    with pytest.raises(WetpathError) as info:
        ingest_volume(src, out, voxel_size_um=1.0, chunks=8)
    message = _one_line(str(info.value))
    assert message.startswith(f"ingest step_004: {src}: ")
    assert "cannot read" in message
    assert not out.exists() and not list(out.parent.glob(".*tmp*"))
    assert fingerprint(src) == before


@pytest.mark.workflow
@pytest.mark.xdist_group("workflow")
def test_series_with_a_mis_shaped_volume_stops_before_any_analysis(tmp_path):
    vols = series_labels()
    vols[1] = vols[1][:, :, :20].copy()
    wf = prepare_workflow(tmp_path / "wf", vols)
    before = _fingerprints(wf / "data")
    out = snakemake(wf, "--cores", "1", src=wf / "src", check=False)
    assert out.returncode != 0
    log = _one_line((wf / RESULTS / "logs/summarise/step_001.log").read_text())
    assert log == ("wetpath summarise: error: summarise step_001: data/step_001.tif: volumes of "
                   "different shapes within one series: shape (24, 24, 20) but the first step "
                   "step_000 (data/step_000.tif) has (24, 24, 24)")
    # ingest and summarise go first (priority): no analysis job of any step has started
    assert not (wf / RESULTS / "clusters").exists() and not (wf / RESULTS / "measures").exists()
    assert not (wf / RESULTS / "states.csv").exists()
    assert _fingerprints(wf / "data") == before


@pytest.mark.workflow
@pytest.mark.xdist_group("workflow")
def test_one_step_series_measures_the_state_and_skips_increments(tmp_path):
    wf = prepare_workflow(tmp_path / "wf", series_labels(n_steps=1))
    before = _fingerprints(wf / "data")
    out = snakemake(wf, src=wf / "src")
    assert "note: series tiny has one step: state measures only, no increments" in out.stdout
    res = wf / RESULTS
    state = pd.read_csv(res / "measures/step_000.csv")
    assert state["area_nw"][0] > 0 and state["volume_n"][0] > 0 and state["n_clusters"][0] > 0
    increments = pd.read_csv(res / "angles/increments.csv")
    assert len(increments) == 0 and {"step_from", "step_to", "time_s"} <= set(increments)
    history = pd.read_csv(res / "history.csv")
    assert list(history["record"]) == ["state"]
    assert (res / "report.html").stat().st_size > 0
    assert not (res / "increments").exists() and not (res / "tracks/step_000").exists()
    assert _fingerprints(wf / "data") == before


@pytest.fixture
def stores(tmp_path, tiny_volume):
    step = ingest_volume(_saved(tmp_path, tiny_volume), tmp_path / "s" / "step_000.zarr",
                         voxel_size_um=2.0)
    clusters = tmp_path / "c" / "step_000.zarr"
    label_step(step, clusters, threads=1)
    return step, clusters


def _saved(tmp_path, vol):
    np.save(tmp_path / "v.npy", vol)
    return tmp_path / "v.npy"


def _cli_error(capsys, argv) -> str:
    assert main([str(a) for a in argv]) == 2
    return _one_line(capsys.readouterr().err)


def test_analysis_subcommands_fail_on_one_line_with_exit_code_2(tmp_path, stores, capsys):
    step, clusters = stores
    gone = tmp_path / "gone.zarr"
    out = tmp_path / "out"
    cases = [
        (["label", gone, out / "c.zarr"], f"wetpath label: error: open: {gone}: step store does "
                                          "not exist"),
        (["label", clusters, out / "c.zarr"], f"wetpath label: error: open: {clusters}: not a "
                                              "wetpath step store"),
        (["measure", gone, clusters, out], f"wetpath measure: error: open: {gone}: step store "
                                           "does not exist"),
        (["measure", step, step, out], f"wetpath measure: error: open: {step}: not a cluster "
                                       "label store"),
        (["measure", step, gone, out], f"wetpath measure: error: open: {gone}: cluster label "
                                       "store does not exist"),
        (["track", clusters, gone, out / "o.csv", out / "e.csv", "--voxel-size-um", "2"],
         f"wetpath track: error: open: {gone}: cluster label store does not exist"),
        (["track", clusters, step, out / "o.csv", out / "e.csv", "--voxel-size-um", "2"],
         f"wetpath track: error: open: {step}: not a cluster label store"),
        (["track", clusters, clusters, tmp_path / "t" / "o.csv", tmp_path / "t" / "e.csv",
          "--voxel-size-um", "2", "--increment", out, "a", "b", out / "i.csv", out / "f.csv"],
         f"wetpath track: error: increment: {out / 'a.csv'}: measure output is missing"),
        (["angles", out / "states.csv", out],
         f"wetpath angles: error: angles: {out / 'states.csv'}: input table does not exist"),
        (["history", out / "states.csv", out / "i.csv", out],
         f"wetpath history: error: history: {out / 'states.csv'}: input table does not exist"),
    ]
    before = {p: fingerprint(p) for p in [*step.rglob("*"), *clusters.rglob("*")] if p.is_file()}
    for argv, expected in cases:
        assert _cli_error(capsys, argv).startswith(expected), argv
    assert not out.exists()  # nothing written by a failed stage
    assert {p: fingerprint(p) for p in before} == before


def test_history_rejects_an_empty_table_on_one_line(tmp_path, capsys):
    (tmp_path / "states.csv").write_text("")
    (tmp_path / "inc.csv").write_text("step_from,step_to\n")
    msg = _cli_error(capsys, ["history", tmp_path / "states.csv", tmp_path / "inc.csv", tmp_path])
    assert msg.startswith(f"wetpath history: error: history: {tmp_path / 'states.csv'}: cannot "
                          "read table (EmptyDataError")


# ---- 2. undefined physics: NaN and a flag, never an exception --------------------------------

def test_state_without_nonwetting_phase_is_nan_with_flags():
    vol = _no_nonwetting(random_medium((24, 24, 24), seed=3))
    m = measure_state(vol, 2.0, threads=1)
    assert m["flag_no_nonwetting"] is True
    assert m["volume_n"] == 0 and m["area_nw"] == 0 and m["area_ns"] == 0
    assert m["saturation_w"] == 1.0 and m["n_clusters"] == 0
    assert np.isnan(m["curvature_nw"]) and np.isnan(m["curvature_nw_std"])
    topo = topological_angle(vol, 2.0)
    assert topo["flag"] == "no_nonwetting_phase" and np.isnan(topo["theta_topo_deg"])
    points = geometric_angles(vol, 2.0)
    geo = summarise_geometric(points)
    assert len(points) == 0 and geo["flag_no_contact_line"] and np.isnan(geo["median_deg"])
    # two such states: no wetted-area change, no curvature; NaN angle with its flags
    e = energy_balance_angle(m, measure_state(vol, 2.0, threads=1))
    assert np.isnan(e["theta_energy_deg"]) and np.isnan(e["cos_theta_energy"])
    assert e["flag_no_wetted_area_change"] and e["flag_no_nonwetting"]
    assert e["flag_curvature_undefined"]


def test_increment_without_wetted_area_change_is_nan_with_flag():
    vol = random_medium((24, 24, 24), seed=4, saturation_w=0.5)
    m = measure_state(vol, 1.0, threads=1)
    e = energy_balance_angle(m, measure_state(vol.copy(), 1.0, threads=1))
    assert e["d_area_ws"] == 0 and e["flag_no_wetted_area_change"]
    for key in ("theta_energy_deg", "cos_theta_energy", "theta_energy_lo_deg",
                "theta_energy_hi_deg", "r_kappa"):
        assert np.isnan(e[key]), key
    assert e["direction"] == "static"


def _cap_and_border_cap():
    cap = cap_on_plate(8.0, 60.0)  # plate normal along z, cap centred in x and y
    half = cap[:, :, : cap.shape[2] // 2 + 1]  # a second cap cut by the x border of the image
    return np.concatenate([cap, half], axis=2)


def test_cluster_touching_the_border_is_flagged_and_left_out():
    vol = _cap_and_border_cap()
    topo = topological_angle(vol, 1.0)
    table = topo["clusters"].sort_values("cluster")
    assert list(table["touches_border"]) == [False, True]
    assert list(table["used"]) == [True, False]
    assert topo["clusters_used"] == 1
    # the pooled angle is the interior cap's alone (its own per-cluster angle)
    assert topo["theta_topo_deg"] == pytest.approx(table["theta_topo_deg"].iloc[0], abs=1e-9)
    border_only = vol[:, :, cap_on_plate(8.0, 60.0).shape[2]:]
    only = topological_angle(border_only, 1.0)
    assert only["flag"] == "no_usable_cluster" and np.isnan(only["theta_topo_deg"])
    assert only["clusters_used"] == 0


# ---- workflow on an edge-case series: NaN + flags end to end, provenance, inputs untouched -------

@pytest.fixture(scope="module")
def edge_run(tmp_path_factory):
    """step_000: random medium; step_001: the same scan again (no change); step_002: no n."""
    first = series_labels(n_steps=1)[0]
    wf = prepare_workflow(tmp_path_factory.mktemp("edge"), [first, first, _no_nonwetting(first)])
    before = _fingerprints(wf / "data")
    snakemake(wf, src=wf / "src")
    return wf, before


@pytest.mark.workflow
@pytest.mark.xdist_group("workflow")
def test_workflow_writes_nan_and_flags_for_undefined_results(edge_run):
    res = edge_run[0] / RESULTS
    s2 = pd.read_csv(res / "measures/step_002.csv").iloc[0]
    assert bool(s2["flag_no_nonwetting"]) and s2["topo_flag"] == "no_nonwetting_phase"
    assert s2["area_nw"] == 0 and s2["saturation_w"] == 1.0
    for key in ("curvature_nw", "theta_topo_deg", "theta_geom_median_deg"):
        assert np.isnan(s2[key]), key
    same = pd.read_csv(res / "increments/step_000/step_001.csv").iloc[0]
    assert bool(same["flag_no_wetted_area_change"]) and np.isnan(same["theta_energy_deg"])
    gone = pd.read_csv(res / "increments/step_001/step_002.csv").iloc[0]
    assert np.isnan(gone["theta_energy_deg"]) or bool(gone["flag_curvature_undefined"]) is False
    clusters = pd.read_csv(res / "measures/step_000_clusters.csv")
    assert clusters["touches_border"].any() and not clusters["used"][clusters["touches_border"]].any()
    history = pd.read_csv(res / "history.csv")
    assert len(history) == 5 and "theta_topo_deg" in history
    assert "no wetted" in (res / "report.html").read_text().lower()


@pytest.mark.workflow
@pytest.mark.xdist_group("workflow")
def test_every_table_and_the_report_record_their_provenance(edge_run):
    wf, before = edge_run
    res = wf / RESULTS
    code = code_hash(str(wf / "src" / "wetpath"))
    from wetpath import __version__

    files = [res / "measures/step_000.csv", res / "increments/step_000/step_001.csv",
             res / "angles/increments.csv", res / "summaries/step_001.csv", res / "states.csv",
             res / "history.csv", res / "branches.csv"]
    for f in files:
        table = pd.read_csv(f)
        assert set(table["wetpath_version"]) == {__version__}, f
        assert set(table["code_sha256"]) == {code}, f
    assert pd.read_csv(res / "measures/step_000.csv")["measure_settings_sha256"][0]
    assert pd.read_csv(res / "angles/increments.csv")["energy_settings_sha256"].nunique() == 1
    prov = json.loads((res / "provenance.json").read_text())
    assert prov["wetpath_version"] == __version__ and prov["code_sha256"] == code
    assert set(pd.read_csv(res / "history.csv")["config_sha256"]) == {prov["config_sha256"]}
    html = (res / "report.html").read_text()
    assert prov["config_sha256"] in html and code in html
    for rec, step in zip(prov["inputs"], ("step_000", "step_001", "step_002"), strict=True):
        src = wf / "data" / f"{step}.tif"
        assert rec["step"] == step and rec["source_file"] == f"data/{step}.tif"
        assert rec["source_bytes"] == src.stat().st_size
        assert rec["source_sha256"] == hashlib.sha256(src.read_bytes()).hexdigest()
        assert rec["source_sha256"] in html
    # the config hash covers the series and analysis settings the history rule was given
    assert re.fullmatch(r"[0-9a-f]{16}", prov["config_sha256"]) and prov["config_sha256"] != \
        config_hash({})
    assert _fingerprints(wf / "data") == before  # inputs never modified


def test_ingest_opens_inputs_read_only(tmp_path, tiny_volume):
    """Every open() of an input during ingest (TIFF, npy, raw, zarr) is read-only (audit hook)."""
    import zarr

    tifffile.imwrite(tmp_path / "v.tif", tiny_volume)
    np.save(tmp_path / "v.npy", tiny_volume)
    (tmp_path / "v.raw").write_bytes(tiny_volume.tobytes())
    zarr.save_array(str(tmp_path / "v.zarr"), tiny_volume)
    inputs = {"v.tif": {}, "v.npy": {}, "v.zarr": {},
              "v.raw": {"raw": {"dtype": "uint8", "shape": [24, 24, 24]}}}
    opened: list[tuple[str, object, int]] = []
    watched = str(tmp_path / "v.")

    def hook(event, args):
        if event == "open" and str(args[0]).startswith(watched) and _active:
            opened.append((str(args[0]), args[1], args[2]))

    _hooks.append(hook)
    before = {p: fingerprint(p) for p in tmp_path.rglob("v*") if p.is_file()}
    _set_active(True)
    try:
        for name, read in inputs.items():
            ingest_volume(tmp_path / name, tmp_path / "out" / f"{name}.zarr", voxel_size_um=1.0,
                          read=read)
    finally:
        _set_active(False)
    assert {os.path.basename(p).split("/")[0] for p, _, _ in opened} >= {"v.tif", "v.npy",
                                                                          "v.raw"}
    for path, mode, flags in opened:
        writes = (mode is not None and any(c in str(mode) for c in "wax+")) or (
            flags & (os.O_WRONLY | os.O_RDWR | os.O_APPEND | os.O_CREAT | os.O_TRUNC))
        assert not writes, (path, mode, flags)
    assert {p: fingerprint(p) for p in before} == before


_hooks: list = []
_active = False


def _set_active(value: bool) -> None:
    global _active
    _active = value


def _dispatch(event, args):
    for hook in _hooks:
        hook(event, args)


sys.addaudithook(_dispatch)


# ---- 3. interrupted run: kill during measure, rerun, byte-identical tables ----------------------

def _tables(folder):
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*.csv"))}


@pytest.mark.workflow
@pytest.mark.xdist_group("workflow")
def test_kill_during_measure_then_rerun_gives_identical_tables(finished_workflow, tmp_path):
    wf = prepare_workflow(tmp_path / "killed")
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "Snakefile"),
           "--directory", str(wf), "--configfile", str(wf / "config.yaml"), "--cores", "1"]
    proc = subprocess.Popen(cmd, env=subprocess_env(wf / "src"), stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    logs = wf / RESULTS / "logs" / "measure"
    deadline = time.time() + 600
    while time.time() < deadline and not (logs.is_dir() and any(logs.iterdir())):
        time.sleep(0.02)
    assert logs.is_dir(), "measure never started"
    running = next(logs.iterdir()).stem
    proc.send_signal(signal.SIGTERM)  # to the Snakemake process only, while measure runs
    # Snakemake lets the running job finish; on a fresh install its first numba compile is slow
    proc.wait(timeout=900)
    assert proc.returncode != 0
    res = wf / RESULTS
    assert not (res / "states.csv").exists() and not (res / "history.csv").exists()
    # nothing half-written sits under a final name: every table there parses, and the killed
    # job's state row (written last) is absent or complete
    for f in res.rglob("*.csv"):
        pd.read_csv(f)
    state = res / "measures" / f"{running}.csv"
    assert not state.exists() or len(pd.read_csv(state)) == 1
    snakemake(wf, "--rerun-incomplete", src=wf / "src")
    assert not [p for p in res.rglob("*") if ".tmp-" in p.name]
    got, want = _tables(res), _tables(finished_workflow / RESULTS)
    assert sorted(got) == sorted(want)
    assert len(got) >= 30
    for name in want:
        assert got[name] == want[name], name
    assert (res / "provenance.json").read_bytes() == (
        finished_workflow / RESULTS / "provenance.json").read_bytes()


# ---- 4. incremental series: an appended scan schedules only its own jobs ------------------------

@pytest.mark.workflow
@pytest.mark.xdist_group("workflow")
def test_appended_step_schedules_only_its_jobs_its_increment_and_aggregates(finished_workflow,
                                                                            tmp_path):
    wf = tmp_path / "wf"
    shutil.copytree(finished_workflow, wf, symlinks=True)  # copy2 keeps modification times
    write_series(wf / "data", [series_labels(n_steps=4)[3]], start=3)
    jobs = planned_job_wildcards(snakemake(wf, "-n", src=wf / "src").stdout)
    assert jobs == (step_jobs("tiny", "step_003") | increment_jobs("tiny", "step_002", "step_003")
                    | aggregate_jobs("tiny"))
