"""Run a Snakemake workflow locally and through the SLURM executor, and compare the CSV results.

The workflow runs twice from scratch, in two separate working directories under ``--workdir``:
``local/`` (``--cores``, no executor plugin) and ``slurm/`` (``--profile``, which selects the
``slurm`` executor). Every CSV matched by ``--results-glob`` must then exist in both and hold the
same table: same columns in the same order, same number of rows, integers and strings equal,
floating-point values equal within a relative tolerance (NaN equals NaN).

The SLURM run's job ids are taken from Snakemake's log and looked up in SLURM's accounting
(``sacct``); they are printed, and each must have completed with exit code 0. A SLURM run that
submitted no job at all fails, since then nothing went through the cluster.

Exit status: 0 equal, 1 results differ, 2 a run failed or the SLURM jobs are not in accounting,
130 interrupted (SIGINT is passed on to Snakemake, which cancels its SLURM jobs; wait for it).

Example::

    python scripts/compare_runs.py --snakefile Snakefile --configfile config/config.yaml \\
        --profile workflow/profiles/slurm-ci --workdir /tmp/compare -- --config demo=true
"""

from __future__ import annotations

import argparse
import datetime as dt
import math
import re
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

SUBMITTED = re.compile(r"has been submitted with SLURM jobid (\d+)")
RUN_ID = re.compile(r"SLURM run ID: (\S+)")
SACCT_FIELDS = ["JobID", "JobName", "Partition", "Account", "AllocCPUS", "ReqMem", "State",
                "ExitCode", "Elapsed"]
MAX_REPORTED = 5  # differing rows reported per column


class RunFailed(Exception):
    """A Snakemake run or the accounting check failed; the message is one line."""


@dataclass
class Differences:
    """What differs between the two result trees, as human-readable lines."""

    lines: list[str] = field(default_factory=list)
    files_compared: int = 0
    values_compared: int = 0

    def add(self, line: str) -> None:
        self.lines.append(line)


# --------------------------------------------------------------------------------- comparison

def compare_frames(a: pd.DataFrame, b: pd.DataFrame, *, rtol: float, atol: float) -> list[str]:
    """Compare two tables column by column.

    Integer, boolean and string columns must be equal; a column that is floating point in either
    table is compared as float: ``|a - b| <= atol + rtol * max(|a|, |b|)``, NaN equal to NaN and
    infinities equal only to themselves.

    Returns
    -------
    list of str
        One line per difference (empty when the tables are equal).
    """
    out: list[str] = []
    if list(a.columns) != list(b.columns):
        only_a = [c for c in a.columns if c not in b.columns]
        only_b = [c for c in b.columns if c not in a.columns]
        out.append(f"columns differ: only local {only_a}, only slurm {only_b}"
                   if only_a or only_b else f"column order differs: {list(a.columns)} vs "
                   f"{list(b.columns)}")
        return out
    if len(a) != len(b):
        return [f"row count differs: local {len(a)}, slurm {len(b)}"]
    for col in a.columns:
        x, y = a[col], b[col]
        if pd.api.types.is_float_dtype(x) or pd.api.types.is_float_dtype(y):
            if not (pd.api.types.is_numeric_dtype(x) and pd.api.types.is_numeric_dtype(y)):
                out.append(f"column {col!r}: numeric in one run, text in the other "
                           f"({x.dtype} vs {y.dtype})")
                continue
            xv, yv = x.to_numpy(dtype=float), y.to_numpy(dtype=float)
            both_nan = np.isnan(xv) & np.isnan(yv)
            with np.errstate(invalid="ignore"):
                diff = np.abs(xv - yv)
                tol = atol + rtol * np.maximum(np.abs(xv), np.abs(yv))
                finite = np.isfinite(xv) & np.isfinite(yv)
                ok = both_nan | (xv == yv) | (finite & (diff <= tol))
            for i in np.flatnonzero(~ok)[:MAX_REPORTED]:
                scale = max(abs(xv[i]), abs(yv[i]))
                rel = diff[i] / scale if scale and math.isfinite(scale) else float("nan")
                out.append(f"column {col!r} row {i}: local {xv[i]!r}, slurm {yv[i]!r} "
                           f"(relative difference {rel:.3g})")
            bad = int((~ok).sum())
        else:
            xs, ys = x.astype(str).to_numpy(), y.astype(str).to_numpy()
            # missing in both runs is equal (string columns keep NaN under pandas 3)
            neq = (xs != ys) & ~(x.isna().to_numpy() & y.isna().to_numpy())
            for i in np.flatnonzero(neq)[:MAX_REPORTED]:
                out.append(f"column {col!r} row {i}: local {xs[i]!r}, slurm {ys[i]!r}")
            bad = int(neq.sum())
        if bad > MAX_REPORTED:
            out.append(f"column {col!r}: {bad - MAX_REPORTED} more differing rows")
    return out


def read_csv(path: Path) -> pd.DataFrame:
    """Read a result table (both runs' files go through the same parser)."""
    try:
        return pd.read_csv(path)
    except pd.errors.EmptyDataError:
        return pd.DataFrame()
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise RunFailed(f"compare: {path}: not a readable CSV ({exc})") from None


def compare_trees(local: Path, slurm: Path, pattern: str, *, rtol: float, atol: float,
                  exclude: tuple[str, ...] = (), ignore_columns: tuple[str, ...] = ()
                  ) -> Differences:
    """Compare every CSV matching ``pattern`` under two working directories.

    Files matching a glob in ``exclude`` and columns named in ``ignore_columns`` (run-specific
    values such as timings or host names) are left out.
    """
    result = Differences()

    def tables(root: Path) -> set[Path]:
        return {p.relative_to(root) for p in root.glob(pattern)
                if p.is_file() and not any(p.relative_to(root).match(g) for g in exclude)}

    files_a, files_b = tables(local), tables(slurm)
    for rel in sorted(files_a - files_b):
        result.add(f"{rel}: written by the local run only")
    for rel in sorted(files_b - files_a):
        result.add(f"{rel}: written by the SLURM run only")
    for rel in sorted(files_a & files_b):
        a, b = (read_csv(root / rel).drop(columns=list(ignore_columns), errors="ignore")
                for root in (local, slurm))
        result.files_compared += 1
        result.values_compared += a.size
        for line in compare_frames(a, b, rtol=rtol, atol=atol):
            result.add(f"{rel}: {line}")
    return result


# --------------------------------------------------------------------------------- running

def run_logged(cmd: list[str], log_path: Path, label: str) -> list[str]:
    """Run ``cmd``, echo its output with a prefix, keep it in ``log_path``; return its lines.

    On SIGINT (Ctrl-C, or ``timeout -s INT`` which signals the whole process group) the child
    gets the same signal; Snakemake then cancels its cluster jobs, which takes a moment, so this
    waits for it instead of killing it.
    """
    print(f"[{label}] $ {' '.join(cmd)}", flush=True)
    lines: list[str] = []
    with open(log_path, "w") as log, subprocess.Popen(
        cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, bufsize=1
    ) as proc:
        assert proc.stdout is not None

        def echo() -> None:
            for line in proc.stdout:
                lines.append(line.rstrip("\n"))
                log.write(line)
                print(f"[{label}] {line}", end="", flush=True)

        try:
            echo()
        except KeyboardInterrupt:
            print(f"[{label}] interrupted: waiting for snakemake to cancel its jobs", flush=True)
            echo()  # keep reading, or snakemake blocks on a full pipe while it shuts down
            proc.wait()
            raise
        rc = proc.wait()
    if rc != 0:
        raise RunFailed(f"{label}: snakemake exited with {rc} (log: {log_path})")
    return lines


def sacct_table(run_id: str | None, since: str, job_ids: list[str]) -> list[dict[str, str]]:
    """Accounting records of this run's jobs (by job name = run id, else by id)."""
    cmd = ["sacct", "-X", "-n", "-P", "-S", since, "-o", ",".join(SACCT_FIELDS)]
    cmd += ["--name", run_id] if run_id else ["-j", ",".join(job_ids)]
    try:
        out = subprocess.run(cmd, capture_output=True, text=True, check=True, timeout=60).stdout
    except (OSError, subprocess.SubprocessError) as exc:
        raise RunFailed(f"accounting: {' '.join(cmd)} failed ({exc})") from None
    return [dict(zip(SACCT_FIELDS, row.split("|"), strict=False))
            for row in out.splitlines() if row.strip()]


def check_accounting(lines: list[str], since: str) -> list[dict[str, str]]:
    """Print the SLURM jobs of the run from ``sacct`` and check that each one completed."""
    submitted = sorted({m.group(1) for line in lines if (m := SUBMITTED.search(line))}, key=int)
    run_ids = [m.group(1) for line in lines if (m := RUN_ID.search(line))]
    if not submitted:
        raise RunFailed("slurm: snakemake submitted no SLURM job (is the executor 'slurm'?)")
    rows: list[dict[str, str]] = []
    for _ in range(10):  # slurmdbd records job ends asynchronously
        rows = sacct_table(run_ids[0] if run_ids else None, since, submitted)
        done = {r["JobID"] for r in rows if r["State"] == "COMPLETED"}
        if done >= set(submitted):
            break
        time.sleep(2)
    print(f"SLURM jobs of this run (sacct, run id {run_ids[0] if run_ids else '?'}):")
    widths = [max(len(f), *(len(r.get(f, "")) for r in rows)) for f in SACCT_FIELDS]
    for rec in [dict(zip(SACCT_FIELDS, SACCT_FIELDS, strict=True)), *rows]:
        print("  " + "  ".join(rec.get(f, "").ljust(w) for f, w in zip(SACCT_FIELDS, widths,
                                                                        strict=True)))
    by_id = {r["JobID"]: r for r in rows}
    bad = [f"{j} ({by_id[j]['State']}, exit {by_id[j]['ExitCode']})" if j in by_id
           else f"{j} (not in accounting)" for j in submitted
           if j not in by_id or by_id[j]["State"] != "COMPLETED" or by_id[j]["ExitCode"] != "0:0"]
    if bad:
        raise RunFailed(f"accounting: SLURM jobs not completed cleanly: {', '.join(bad)}")
    print(f"SLURM job ids: {' '.join(submitted)} ({len(submitted)} jobs, all COMPLETED 0:0)")
    return rows


# --------------------------------------------------------------------------------- CLI

def parse_args(argv: list[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(
        description="Run a Snakemake workflow locally and through SLURM; compare its CSV results.",
        epilog="Arguments after '--' are passed to both snakemake runs.")
    p.add_argument("--snakefile", type=Path, required=True)
    p.add_argument("--configfile", type=Path, required=True)
    p.add_argument("--profile", type=Path, required=True,
                   help="Snakemake profile of the SLURM run (directory with config.yaml)")
    p.add_argument("--workdir", type=Path, required=True,
                   help="empty or new directory; the runs go to WORKDIR/local and WORKDIR/slurm")
    p.add_argument("--cores", type=int, default=2, help="cores of the local run (default 2)")
    p.add_argument("--results-glob", default="results/**/*.csv",
                   help="CSV files to compare, relative to each run's directory")
    p.add_argument("--exclude", action="append", default=[], metavar="GLOB",
                   help="leave out CSV files matching GLOB (repeatable)")
    p.add_argument("--ignore-column", action="append", default=[], metavar="NAME",
                   help="leave out columns named NAME, e.g. timings (repeatable)")
    p.add_argument("--rtol", type=float, default=1e-9,
                   help="relative tolerance for floating-point values (default 1e-9)")
    p.add_argument("--atol", type=float, default=0.0,
                   help="absolute tolerance for floating-point values (default 0)")
    p.add_argument("snakemake_args", nargs="*", help=argparse.SUPPRESS)
    return p.parse_args(argv)


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    snakefile, configfile = args.snakefile.resolve(), args.configfile.resolve()
    profile, workdir = args.profile.resolve(), args.workdir.resolve()
    for path, what in [(snakefile, "Snakefile"), (configfile, "config file")]:
        if not path.is_file():
            print(f"compare: {path}: {what} not found", file=sys.stderr)
            return 2
    if not (profile / "config.yaml").is_file():
        print(f"compare: {profile}: profile has no config.yaml", file=sys.stderr)
        return 2
    if workdir.exists() and any(workdir.iterdir()):
        print(f"compare: {workdir}: working directory is not empty", file=sys.stderr)
        return 2
    local, slurm = workdir / "local", workdir / "slurm"
    local.mkdir(parents=True)
    slurm.mkdir()
    base = [sys.executable, "-m", "snakemake", "--snakefile", str(snakefile),
            "--configfile", str(configfile)]
    try:
        t0 = time.monotonic()
        run_logged([*base, "--directory", str(local), "--cores", str(args.cores),
                    *args.snakemake_args], workdir / "local.log", "local")
        t1 = time.monotonic()
        # sacct compares with the controller's local time; a minute of slack for clock steps
        since = (dt.datetime.now() - dt.timedelta(minutes=1)).strftime("%Y-%m-%dT%H:%M:%S")
        lines = run_logged([*base, "--directory", str(slurm), "--profile", str(profile),
                            *args.snakemake_args], workdir / "slurm.log", "slurm")
        t2 = time.monotonic()
        check_accounting(lines, since)
        diffs = compare_trees(local, slurm, args.results_glob, rtol=args.rtol, atol=args.atol,
                              exclude=tuple(args.exclude),
                              ignore_columns=tuple(args.ignore_column))
    except RunFailed as exc:
        print(exc, file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("compare: interrupted", file=sys.stderr)
        return 130
    print(f"local run {t1 - t0:.1f} s, SLURM run {t2 - t1:.1f} s")
    if diffs.files_compared == 0 and not diffs.lines:
        print(f"compare: no file matches {args.results_glob!r} in either run", file=sys.stderr)
        return 2
    for line in diffs.lines:
        print(f"DIFF {line}")
    verdict = "differ" if diffs.lines else "equal"
    print(f"compare: {diffs.files_compared} CSV files, {diffs.values_compared} values: {verdict}"
          f" (rtol {args.rtol:g}, atol {args.atol:g})")
    return 1 if diffs.lines else 0


if __name__ == "__main__":
    sys.exit(main())
