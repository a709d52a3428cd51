"""Command line: --version, --help on each subcommand, one-line errors with exit code 2."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import tifffile

import wetpath
from wetpath import open_step
from wetpath.cli import _COMMANDS, main

from .conftest import REPO, subprocess_env, write_series


def _wetpath(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "wetpath", *map(str, args)], capture_output=True,
                          text=True, env=subprocess_env(), cwd=cwd)


def test_version(capsys):
    with pytest.raises(SystemExit) as info:
        main(["--version"])
    assert info.value.code == 0
    assert capsys.readouterr().out.strip() == f"wetpath {wetpath.__version__}"


@pytest.mark.parametrize("command", [None, "demo", "ingest", "summarise", "states", "run"])
def test_help(command, capsys):
    with pytest.raises(SystemExit) as info:
        main([command, "--help"] if command else ["--help"])
    assert info.value.code == 0
    text = capsys.readouterr().out
    assert "usage: wetpath" in text
    if command is None:
        assert all(name in text for name in _COMMANDS)


def test_error_is_one_line_and_exit_code_2(tmp_path):
    out = _wetpath("ingest", tmp_path / "missing.tif", tmp_path / "s.zarr", "--voxel-size-um", 2)
    assert out.returncode == 2
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1, out.stderr
    assert "missing.tif" in lines[0] and "does not exist" in lines[0]
    assert not (tmp_path / "s.zarr").exists()


def test_ingest_summarise_states_in_process(tmp_path, tiny_volume):
    tifffile.imwrite(tmp_path / "v.tif", (tiny_volume.astype(np.uint16) * 100))
    codes = '{"excluded": 0, "solid": 100, "wetting": 200, "nonwetting": 300}'
    assert main(["ingest", str(tmp_path / "v.tif"), str(tmp_path / "s" / "x.zarr"),
                 "--voxel-size-um", "2.5", "--chunks", "8", "--codes", codes]) == 0
    np.testing.assert_array_equal(open_step(tmp_path / "s" / "x.zarr").labels[:], tiny_volume)
    table = tmp_path / "summaries" / "x.csv"
    assert main(["summarise", str(tmp_path / "s" / "x.zarr"), str(table)]) == 0
    (tmp_path / "times.csv").write_text("step,time_s,file\nx,12.5,v.tif\n")
    assert main(["states", str(tmp_path / "states.csv"), "--times",
                 str(tmp_path / "times.csv"), str(table)]) == 0
    states = pd.read_csv(tmp_path / "states.csv")
    assert list(states[["step", "time_s"]].iloc[0]) == ["x", 12.5]
    assert states["voxels_solid"][0] == np.count_nonzero(tiny_volume == 1)


def test_ingest_settings_json_and_raw_flags(tmp_path, tiny_volume):
    (tmp_path / "v.raw").write_bytes(tiny_volume.tobytes())
    assert main(["ingest", str(tmp_path / "v.raw"), str(tmp_path / "v.zarr"), "--settings",
                 '{"voxel_size_um": 1.5, "raw": {"dtype": "uint8"}}', "--shape", "24", "24",
                 "24"]) == 0
    step = open_step(tmp_path / "v.zarr")
    assert step.voxel_size_um == 1.5
    np.testing.assert_array_equal(step.labels[:], tiny_volume)


def test_run_dry_run_on_a_tiny_series(tmp_path):
    write_series(tmp_path / "data", [np.ones((8, 8, 8), np.uint8)] * 2)
    (tmp_path / "cfg.yaml").write_text("series:\n  s:\n    input: data\n    voxel_size_um: 1\n")
    out = _wetpath("run", "--snakefile", REPO / "Snakefile", "--configfile", tmp_path / "cfg.yaml",
                   "--cores", 1, "--dry-run", "--", "--quiet", "rules", cwd=tmp_path)
    assert out.returncode == 0, out.stderr[-2000:]
    assert not (REPO / "results" / "s").exists()


def test_run_without_snakefile(tmp_path):
    (tmp_path / "c.yaml").write_text("series: {}\n")
    out = _wetpath("run", "--directory", tmp_path, "--configfile", tmp_path / "c.yaml")
    assert out.returncode == 2 and "no Snakefile here" in out.stderr


def test_demo_writes_the_contracted_layout(tmp_path):
    pytest.importorskip("wetpath._demo", reason="wetpath._demo is written on the demo branch")
    assert main(["demo", str(tmp_path / "d"), "--size", "48"]) == 0
    for kind in ("labels", "grayscale"):
        times = pd.read_csv(tmp_path / "d" / kind / "times.csv")
        assert list(times.columns[:3]) == ["step", "time_s", "file"]
        assert all((tmp_path / "d" / kind / f).exists() for f in times["file"])
    assert (tmp_path / "d" / "grayscale" / "dry.tif").exists()
    assert (tmp_path / "d" / "scenario.json").exists()
