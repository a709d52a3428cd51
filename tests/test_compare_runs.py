"""Tests of scripts/compare_runs.py: the table comparison behind the SLURM CI stage."""

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pandas as pd

SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "compare_runs.py"
spec = importlib.util.spec_from_file_location("compare_runs", SCRIPT)
compare_runs = importlib.util.module_from_spec(spec)
sys.modules["compare_runs"] = compare_runs
spec.loader.exec_module(compare_runs)


def frame(**columns):
    return pd.DataFrame(columns)


def test_equal_tables_have_no_differences():
    a = frame(step=[1, 2], phase=["n", "w"], area_nw_um2=[1.5, np.nan])
    assert compare_runs.compare_frames(a, a.copy(), rtol=1e-9, atol=0.0) == []


def test_float_within_relative_tolerance_is_equal():
    a = frame(x=[1.0, -3.0e6, 0.0])
    b = frame(x=[1.0 + 5e-10, -3.0e6 * (1 + 9e-10), 0.0])
    assert compare_runs.compare_frames(a, b, rtol=1e-9, atol=0.0) == []


def test_float_beyond_tolerance_is_reported_with_its_relative_difference():
    a = frame(x=[1.0, 2.0])
    b = frame(x=[1.0, 2.0 * (1 + 1e-6)])
    (line,) = compare_runs.compare_frames(a, b, rtol=1e-9, atol=0.0)
    assert "column 'x' row 1" in line
    assert "relative difference 1e-06" in line


def test_absolute_tolerance_covers_values_near_zero():
    a, b = frame(x=[0.0]), frame(x=[1e-15])
    assert compare_runs.compare_frames(a, b, rtol=1e-9, atol=0.0) != []
    assert compare_runs.compare_frames(a, b, rtol=1e-9, atol=1e-12) == []


def test_nan_equals_nan_but_not_a_number():
    a = frame(x=[np.nan, np.nan])
    b = frame(x=[np.nan, 0.5])
    (line,) = compare_runs.compare_frames(a, b, rtol=1e-9, atol=0.0)
    assert "row 1" in line


def test_infinities_equal_only_themselves():
    a = frame(x=[np.inf, np.inf])
    b = frame(x=[np.inf, -np.inf])
    (line,) = compare_runs.compare_frames(a, b, rtol=1e-9, atol=0.0)
    assert "row 1" in line


def test_integers_and_strings_must_be_exact():
    a = frame(voxels=[10, 20], flag=["ok", "no_nw"])
    b = frame(voxels=[10, 21], flag=["ok", "no_n"])
    lines = compare_runs.compare_frames(a, b, rtol=0.5, atol=10.0)
    assert any("'voxels' row 1: local '20', slurm '21'" in s for s in lines)
    assert any("'flag' row 1" in s for s in lines)


def test_many_differences_are_summarised():
    a = frame(x=np.arange(20.0))
    b = frame(x=np.arange(20.0) + 1)
    lines = compare_runs.compare_frames(a, b, rtol=1e-9, atol=0.0)
    # all 20 rows differ: 5 are shown, then one summary line
    assert len(lines) == compare_runs.MAX_REPORTED + 1
    assert lines[-1] == "column 'x': 15 more differing rows"


def test_shape_and_column_mismatches():
    a = frame(x=[1.0], y=[2.0])
    assert "columns differ" in compare_runs.compare_frames(a, frame(x=[1.0]), rtol=0, atol=0)[0]
    assert "order" in compare_runs.compare_frames(a, a[["y", "x"]], rtol=0, atol=0)[0]
    two = frame(x=[1.0, 1.0], y=[2.0, 2.0])
    assert "row count" in compare_runs.compare_frames(a, two, rtol=0, atol=0)[0]


def test_text_against_numbers_is_reported():
    (line,) = compare_runs.compare_frames(frame(x=[1.0]), frame(x=["a"]), rtol=0, atol=0)
    assert "numeric in one run, text in the other" in line


def write(root: Path, rel: str, text: str) -> None:
    path = root / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)


def test_compare_trees_finds_missing_and_differing_files(tmp_path):
    local, slurm = tmp_path / "local", tmp_path / "slurm"
    write(local, "results/history.csv", "step,saturation_w\n1,0.25\n2,0.5\n")
    write(slurm, "results/history.csv", "step,saturation_w\n1,0.25\n2,0.5\n")
    write(local, "results/angles/states.csv", "step,theta_deg\n1,60.0\n")
    write(slurm, "results/angles/states.csv", "step,theta_deg\n1,61.0\n")
    write(local, "results/only_local.csv", "a\n1\n")
    write(slurm, "results/empty.csv", "")
    write(local, "results/empty.csv", "")
    diffs = compare_runs.compare_trees(local, slurm, "results/**/*.csv", rtol=1e-9, atol=0.0)
    assert diffs.files_compared == 3
    assert diffs.values_compared == 4 + 2
    assert any(s.startswith("results/only_local.csv: written by the local run only")
               for s in diffs.lines)
    assert any(s.startswith("results/angles/states.csv: column 'theta_deg' row 0")
               for s in diffs.lines)
    assert len(diffs.lines) == 2


def test_excluded_files_and_ignored_columns_are_left_out(tmp_path):
    local, slurm = tmp_path / "local", tmp_path / "slurm"
    write(local, "results/states.csv", "step,elapsed_s,volume_n\n1,3.2,10\n")
    write(slurm, "results/states.csv", "step,elapsed_s,volume_n\n1,9.7,10\n")
    write(local, "results/provenance/run.csv", "host\nlaptop\n")
    write(slurm, "results/provenance/run.csv", "host\nnode1\n")
    diffs = compare_runs.compare_trees(local, slurm, "results/**/*.csv", rtol=1e-9, atol=0.0,
                                       exclude=("provenance/*.csv",),
                                       ignore_columns=("elapsed_s",))
    assert diffs.lines == []
    assert (diffs.files_compared, diffs.values_compared) == (1, 2)


def test_main_rejects_a_non_empty_workdir(tmp_path, capsys):
    (tmp_path / "Snakefile").write_text("")
    (tmp_path / "config.yaml").write_text("")
    (tmp_path / "profile").mkdir()
    (tmp_path / "profile" / "config.yaml").write_text("executor: slurm\n")
    work = tmp_path / "work"
    work.mkdir()
    (work / "old").write_text("x")
    rc = compare_runs.main(["--snakefile", str(tmp_path / "Snakefile"), "--configfile",
                            str(tmp_path / "config.yaml"), "--profile", str(tmp_path / "profile"),
                            "--workdir", str(work)])
    assert rc == 2
    assert "working directory is not empty" in capsys.readouterr().err


def test_submission_lines_give_job_ids():
    # the message format of snakemake-executor-plugin-slurm 2.x
    line = "Job 3 has been submitted with SLURM jobid 27 (log: /x/27.log)."
    assert compare_runs.SUBMITTED.search(line).group(1) == "27"


def test_missing_text_in_both_runs_is_equal():
    # a text column with empty cells in both runs (e.g. step_from on state rows of history.csv)
    a = pd.DataFrame({"step_from": ["s0", None, "s1"]})
    assert compare_runs.compare_frames(a, a.copy(), rtol=1e-9, atol=0) == []
