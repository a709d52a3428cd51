"""Shared helpers: tiny label series on disk, file fingerprints, Snakemake runs in a subprocess."""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import tifffile

from wetpath.synthetic import random_medium

REPO = Path(__file__).resolve().parents[1]
SRC = REPO / "src"


def fingerprint(path: Path) -> tuple[int, str]:
    """(mtime_ns, sha256) of a file: to show that an input was left untouched."""
    return path.stat().st_mtime_ns, hashlib.sha256(path.read_bytes()).hexdigest()


def series_labels(n_steps: int = 3, shape=(24, 24, 24), seed: int = 1) -> list[np.ndarray]:
    """Invented test series: one random medium, wetting saturation rising step by step."""
    return [random_medium(shape, cylinder_fov=True, seed=seed, saturation_w=0.3 + 0.15 * i)
            for i in range(n_steps)]


def write_series(folder: Path, volumes, *, start: int = 0) -> Path:
    """Write volumes as step_NNN.tif plus times.csv (step,time_s,file) in ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    times = folder / "times.csv"
    rows = [] if times.exists() else ["step,time_s,file"]
    for i, vol in enumerate(volumes, start=start):
        tifffile.imwrite(folder / f"step_{i:03d}.tif", vol)
        rows.append(f"step_{i:03d},{60.0 * i:g},step_{i:03d}.tif")
    with open(times, "a") as fh:
        fh.write("\n".join(rows) + "\n")
    return folder


def subprocess_env(src: Path = SRC) -> dict:
    """Environment in which `python -m wetpath` runs the given source tree without installation."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(src)
    env["PATH"] = os.pathsep.join([str(Path(sys.executable).parent), env.get("PATH", "")])
    return env


def snakemake(workdir: Path, *args: str, src: Path = SRC, configfile: str = "config.yaml",
              check: bool = True, cores: int = 2) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "Snakefile"),
           "--directory", str(workdir), "--configfile", str(workdir / configfile),
           "--cores", str(cores), *args]
    out = subprocess.run(cmd, env=subprocess_env(src), capture_output=True, text=True,
                         cwd=workdir)
    if check and out.returncode != 0:
        raise AssertionError(f"snakemake failed:\n{out.stdout[-3000:]}\n{out.stderr[-3000:]}")
    return out


def planned_jobs(output: str) -> set[tuple[str, str | None]]:
    """(rule, step) pairs of a `snakemake -n` listing (step None for rules without one)."""
    jobs, rule, step = set(), None, None
    for line in output.splitlines() + ["rule end:"]:
        m = re.match(r"^(?:local)?rule (\w+):", line)
        if m:
            if rule is not None:
                jobs.add((rule, step))
            rule, step = m.group(1), None
        w = re.search(r"wildcards: .*step=([\w.-]+)", line)
        if w:
            step = w.group(1)
    return jobs


def planned_job_wildcards(output: str) -> set[tuple[str, frozenset]]:
    """(rule, wildcards as a frozenset of (name, value)) of every job in a `snakemake -n`
    listing."""
    jobs, rule, wildcards = set(), None, frozenset()
    for line in output.splitlines() + ["rule end:"]:
        m = re.match(r"^(?:local)?rule (\w+):", line)
        if m:
            if rule is not None:
                jobs.add((rule, wildcards))
            rule, wildcards = m.group(1), frozenset()
        w = re.match(r"^\s+wildcards: (.*)$", line)
        if w:
            wildcards = frozenset(tuple(kv.split("=", 1)) for kv in w.group(1).split(", "))
    return jobs


def step_jobs(series: str, step: str, rules=("ingest", "summarise", "measure")) -> set:
    """The per-step jobs of one step in the form of :func:`planned_job_wildcards`."""
    return {(r, frozenset({("series", series), ("step", step)})) for r in rules}


def increment_jobs(series: str, a: str, b: str) -> set:
    """The job of the increment a → b (tracking and its energy balance)."""
    return {("track", frozenset({("series", series), ("a", a), ("b", b)}))}


def aggregate_jobs(series: str) -> set:
    """The per-series aggregate jobs and the default target."""
    return {(r, frozenset({("series", series)})) for r in ("states", "angles", "history")} | {
        ("all", frozenset())}


WORKFLOW_CONFIG = "series:\n  tiny:\n    input: data\n    voxel_size_um: 2.5\n    chunks: 16\n"


def prepare_workflow(folder: Path, volumes=None, config: str = WORKFLOW_CONFIG) -> Path:
    """A workflow folder: the series in ``data/``, ``config.yaml`` and a private copy of the
    package sources in ``src/`` (so that a test can edit "the code")."""
    write_series(folder / "data", series_labels() if volumes is None else volumes)
    (folder / "config.yaml").write_text(config)
    shutil.copytree(SRC, folder / "src", ignore=shutil.ignore_patterns("__pycache__"))
    return folder


@pytest.fixture(scope="session")
def finished_workflow(tmp_path_factory) -> Path:
    """The whole workflow run once on the tiny 3-step series (shared by the workflow tests)."""
    folder = prepare_workflow(tmp_path_factory.mktemp("wf"))
    snakemake(folder, src=folder / "src")
    return folder


@pytest.fixture
def tiny_volume() -> np.ndarray:
    return random_medium((24, 24, 24), cylinder_fov=True, seed=7)
