"""Smoke run of the per-state benchmark (tiny sizes): the script, its workers and its table work.
Speed itself is measured by running the benchmark, not here."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_bench_state_smoke(tmp_path):
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(
        [str(ROOT / "src"), os.environ.get("PYTHONPATH", "")])}
    out = subprocess.run(
        [sys.executable, str(ROOT / "benchmarks" / "bench_state.py"), "--smoke", "--threads", "2",
         "--cache", str(tmp_path), "--stages", "read", "mesh_angles", "overlap", "measure_step"],
        capture_output=True, text=True, env=env, check=False, timeout=600)
    assert out.returncode == 0, out.stderr
    rows = [line for line in out.stdout.splitlines() if line.startswith("| 40³ pores20 |")]
    assert [r.split("|")[2].strip() for r in rows] == ["read", "mesh_angles", "overlap",
                                                       "measure_step"]
    assert "versions: python" in out.stdout
