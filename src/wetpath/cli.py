"""Command-line interface: `wetpath <subcommand> ...`, each a thin call into the library.

A :class:`~wetpath.WetpathError` is printed as one line on stderr and exits with code 2.

Adding a subcommand: write ``def _add_x(parser)`` and ``def _cmd_x(args) -> int`` and decorate the
latter with ``@subcommand("x", _add_x, "one-line help")``; import heavy modules inside ``_cmd_x`` so
that ``wetpath --help`` stays fast.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Callable
from pathlib import Path

from . import __version__
from ._errors import WetpathError

__all__ = ["main", "subcommand"]

_COMMANDS: dict[str, tuple[Callable, Callable, str]] = {}


def subcommand(name: str, add_arguments: Callable[[argparse.ArgumentParser], None], help: str):
    """Register ``func(args) -> int`` as ``wetpath <name>``."""
    def register(func):
        _COMMANDS[name] = (add_arguments, func, help)
        return func
    return register


def _json(text: str):
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise argparse.ArgumentTypeError(f"not valid JSON: {exc}") from exc


# ---- demo -------------------------------------------------------------------------------------

def _add_demo(p):
    p.add_argument("out_dir", type=Path, help="folder to write the demo series into")
    p.add_argument("--seed", type=int, default=2026, help="random seed (default 2026)")
    p.add_argument("--size", type=int, default=144, help="edge of the cubic volumes in voxels")
    p.add_argument("--no-grayscale", action="store_true", help="write only the labelled series")


@subcommand("demo", _add_demo, "write the embedded synthetic demo series (labels and grayscale)")
def _cmd_demo(args) -> int:
    from ._demo import write_demo_series

    out = write_demo_series(args.out_dir, seed=args.seed, size=args.size,
                            grayscale=not args.no_grayscale)
    print(f"demo series written to {out}")
    return 0


# ---- ingest -----------------------------------------------------------------------------------

def _add_ingest(p):
    p.add_argument("source", help="volume file or folder (TIFF, TIFF slices, raw, npy, zarr, HDF5)")
    p.add_argument("out_store", type=Path, help="step store to write (<step>.zarr)")
    p.add_argument("--settings", type=_json, default={},
                   help="all settings as one JSON object (keys as in the workflow config: "
                        "voxel_size_um, kind, chunks, codes, format, dataset, raw, segment); the "
                        "options below override it")
    p.add_argument("--voxel-size-um", type=float, help="voxel edge length in micrometres")
    p.add_argument("--kind", choices=["labels", "grayscale"], help="input kind (default labels)")
    p.add_argument("--chunks", type=int, help="chunk edge in voxels (default 128)")
    p.add_argument("--codes", type=_json, help='phase codes, e.g. \'{"solid": 255}\'')
    p.add_argument("--format", help="tiff, tiff-folder, raw, npy, zarr, hdf5 (default: by name)")
    p.add_argument("--dataset", help="HDF5 dataset or zarr array path inside the file")
    p.add_argument("--dtype", help="raw: voxel type, e.g. uint16")
    p.add_argument("--shape", type=int, nargs=3, metavar=("Z", "Y", "X"), help="raw: shape")
    p.add_argument("--byte-order", choices=["little", "big"], help="raw: byte order")
    p.add_argument("--offset", type=int, help="raw: header bytes before the first voxel")
    p.add_argument("--dry", help="grayscale: dry reference scan")
    p.add_argument("--segment", type=_json, help="grayscale: segmentation knobs as JSON")
    p.add_argument("--step", help="step name (default: store name)")


@subcommand("ingest", _add_ingest, "validate one time-step volume and write its step store")
def _cmd_ingest(args) -> int:
    from ._ingest import ingest_volume

    s = dict(args.settings)
    raw = dict(s.get("raw") or {})
    for key in ("dtype", "shape", "byte_order", "offset"):
        if getattr(args, key) is not None:
            raw[key] = getattr(args, key)
    for key in ("voxel_size_um", "kind", "chunks", "codes", "format", "dataset", "segment",
                "step"):
        if getattr(args, key) is not None:
            s[key] = getattr(args, key)
    segment = dict(s.get("segment") or {})
    if args.dry:
        segment["dry"] = args.dry
    read = {k: s[k] for k in ("format", "dataset") if s.get(k) is not None}
    if raw:
        read["raw"] = raw
    out = ingest_volume(args.source, args.out_store, voxel_size_um=s.get("voxel_size_um"),
                        codes=s.get("codes"), chunks=s.get("chunks") or 128,
                        kind=s.get("kind") or "labels", read=read, segment=segment,
                        step=s.get("step"))
    print(f"wrote {out}")
    return 0


# ---- summarise --------------------------------------------------------------------------------

def _add_summarise(p):
    p.add_argument("store", type=Path, help="step store (<step>.zarr)")
    p.add_argument("out_csv", type=Path, help="one-row summary table to write")
    p.add_argument("--step", help="step name (default: from the store)")
    p.add_argument("--chunks", type=int, help="block edge for counting (default: store chunks)")
    p.add_argument("--same-shape-as", type=Path,
                   help="step store of the series' first step: fail if the shapes differ")


@subcommand("summarise", _add_summarise,
            "voxel counts per phase, porosity and wetting saturation of one step store")
def _cmd_summarise(args) -> int:
    from ._atomic import atomic_write_table
    from ._summary import summarise_step

    atomic_write_table(summarise_step(args.store, chunks=args.chunks, step=args.step,
                                      same_shape_as=args.same_shape_as), args.out_csv)
    return 0


# ---- states -----------------------------------------------------------------------------------

def _add_states(p):
    p.add_argument("out_csv", type=Path, help="states table to write (one row per step)")
    p.add_argument("--times", required=True, type=Path, help="the series' times.csv")
    p.add_argument("--series", help="series name for messages")
    p.add_argument("tables", nargs="+", type=Path,
                   help="per-step tables; the folder name names the table (summaries/x.csv)")


@subcommand("states", _add_states, "join the per-step tables of a series into states.csv")
def _cmd_states(args) -> int:
    from ._atomic import atomic_write_table
    from ._ingest import read_step_table
    from ._summary import join_states

    times = read_step_table(args.times, series=args.series)
    atomic_write_table(join_states(times, args.tables, series=args.series), args.out_csv)
    return 0


# ---- run --------------------------------------------------------------------------------------

def _add_run(p):
    p.add_argument("--configfile", type=Path, default=Path("config/config.yaml"),
                   help="workflow configuration (default config/config.yaml: the demo run)")
    p.add_argument("--cores", type=int, default=2, help="cores Snakemake may use (default 2)")
    p.add_argument("--profile", help="Snakemake profile folder (e.g. a cluster profile)")
    p.add_argument("--directory", type=Path, default=Path("."),
                   help="working folder: relative paths of the config and results/ are in it "
                        "(default: current folder)")
    p.add_argument("--snakefile", type=Path,
                   help="the workflow's Snakefile (default: Snakefile in --directory)")
    p.add_argument("-n", "--dry-run", action="store_true", help="only show what would run")
    p.add_argument("snakemake_args", nargs=argparse.REMAINDER,
                   help="further Snakemake options after --")


@subcommand("run", _add_run, "run the Snakemake workflow with a config, cores and a profile")
def _cmd_run(args) -> int:
    import subprocess

    import yaml

    workdir = args.directory.resolve()
    snakefile = (args.snakefile or workdir / "Snakefile").resolve()
    if not snakefile.is_file():
        raise WetpathError("no Snakefile here; run in a wetpath checkout or give --snakefile",
                           step="run", path=snakefile)
    configfile = args.configfile if args.configfile.is_absolute() else Path.cwd() / args.configfile
    if not configfile.is_file():
        raise WetpathError("config file does not exist", step="run", path=configfile)
    config = yaml.safe_load(configfile.read_text()) or {}
    demo = config.get("demo")
    if demo and not args.dry_run:
        out = workdir / demo.get("out", "demo-data")
        if not (out / "scenario.json").exists():
            from ._demo import write_demo_series

            write_demo_series(out, seed=int(demo.get("seed", 2026)),
                              size=int(demo.get("size", 144)))
            print(f"demo series written to {out}")
    extra = [a for a in args.snakemake_args if a != "--"]
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(snakefile), "--directory",
           str(workdir), "--configfile", str(configfile), "--cores", str(args.cores)]
    # Snakemake looks for profiles/default next to the Snakefile; ours sits in workflow/profiles.
    workflow_profile = snakefile.parent / "workflow" / "profiles" / "default"
    if workflow_profile.is_dir():
        cmd += ["--workflow-profile", str(workflow_profile)]
    cmd += (["--profile", args.profile] if args.profile else []) + (
        ["--dry-run"] if args.dry_run else []) + extra
    env = dict(os.environ)  # rules call `python -m wetpath`: put this interpreter first on PATH
    env["PATH"] = os.pathsep.join([str(Path(sys.executable).parent), env.get("PATH", "")])
    code = subprocess.run(cmd, env=env, check=False).returncode
    if code == 0 and not args.dry_run:
        results = workdir / config.get("results", "results")
        for series in config.get("series", {}):
            print(f"results of series {series}: {results / series / 'states.csv'}")
    return code


# ---- per-step analysis ------------------------------------------------------------------------

def _threads(p):
    p.add_argument("--threads", type=int, default=None,
                   help="threads for numba and the chunk passes (default: all cores)")


def _add_label(p):
    p.add_argument("store", type=Path, help="step store (<step>.zarr)")
    p.add_argument("out_store", type=Path, help="cluster label store to write")
    p.add_argument("--connectivity", type=int, choices=[6, 26], default=26,
                   help="voxel adjacency of a non-wetting cluster (default 26)")
    _threads(p)


@subcommand("label", _add_label, "label the non-wetting clusters of one step store")
def _cmd_label(args) -> int:
    from ._stages import label_step

    n = label_step(args.store, args.out_store, connectivity=args.connectivity,
                   threads=args.threads)
    print(f"{n} non-wetting clusters in {args.out_store}")
    return 0


def _add_measure(p):
    p.add_argument("store", type=Path, help="step store (<step>.zarr)")
    p.add_argument("clusters", type=Path, help="cluster label store of the same step")
    p.add_argument("out_folder", type=Path, help="folder for <step>.csv and its companions")
    p.add_argument("--step", help="step name (default: from the store)")
    p.add_argument("--label", action="store_true",
                   help="write the cluster label store first (as `wetpath label`)")
    p.add_argument("--settings", type=_json, default={},
                   help="JSON: sigma (voxels), connectivity, perturb, geometric")
    _threads(p)


@subcommand("measure", _add_measure,
            "geometry, topological and geometric angles of one step (tables per state/cluster)")
def _cmd_measure(args) -> int:
    from ._stages import label_step, measure_step

    s = args.settings
    if args.label:
        label_step(args.store, args.clusters, connectivity=int(s.get("connectivity", 26)),
                   threads=args.threads)
    measure_step(args.store, args.clusters, args.out_folder, step=args.step,
                 sigma=float(s.get("sigma", 1.0)), connectivity=int(s.get("connectivity", 26)),
                 perturb=bool(s.get("perturb", True)), geometric=bool(s.get("geometric", True)),
                 threads=args.threads)
    return 0


def _add_track(p):
    p.add_argument("clusters_a", type=Path, help="cluster store of the earlier step")
    p.add_argument("clusters_b", type=Path, help="cluster store of the later step")
    p.add_argument("out_overlaps", type=Path, help="overlap table to write (CSV)")
    p.add_argument("out_events", type=Path, help="events table to write (CSV)")
    p.add_argument("--voxel-size-um", type=float, required=True, help="voxel edge, µm")
    p.add_argument("--shift", type=int, nargs=3, metavar=("DZ", "DY", "DX"),
                   help="rigid drift of the later step, voxels")
    p.add_argument("--increment", nargs=5, metavar=("MEASURES", "STEP_FROM", "STEP_TO",
                                                    "OUT_CSV", "OUT_FAMILIES"),
                   help="also the energy-balance angle of the increment, for the field of view "
                        "(OUT_CSV) and per cluster family (OUT_FAMILIES), from the measure tables "
                        "in the folder MEASURES")
    p.add_argument("--settings", type=_json, default={},
                   help="JSON keyword arguments of wetpath.energy_balance_angle")
    _threads(p)


@subcommand("track", _add_track,
            "match the clusters of two steps, classify the events, optionally the energy balance")
def _cmd_track(args) -> int:
    from ._stages import increment_step, track_step

    track_step(args.clusters_a, args.clusters_b, args.out_overlaps, args.out_events,
               voxel_size_um=args.voxel_size_um, shift=args.shift, threads=args.threads)
    if args.increment:
        measures, step_from, step_to, out_csv, out_families = args.increment
        increment_step(measures, step_from, step_to, args.out_overlaps, args.out_events,
                       out_csv, out_families, settings=args.settings)
    return 0


def _add_angles(p):
    p.add_argument("states", type=Path, help="the series' states.csv")
    p.add_argument("out_folder", type=Path, help="folder of the angle tables to write")
    p.add_argument("--increments", nargs="*", type=Path, default=[],
                   help="per-increment tables (track --increment)")
    p.add_argument("--families", nargs="*", type=Path, default=[],
                   help="per-family tables (track --increment)")
    p.add_argument("--clusters", nargs="*", type=Path, default=[],
                   help="per-cluster measure tables, in step order")
    p.add_argument("--overlaps", nargs="*", type=Path, default=[],
                   help="overlap tables in time order (for the lineages)")


@subcommand("angles", _add_angles,
            "per-series angle tables: states, increments, families, clusters, lineages")
def _cmd_angles(args) -> int:
    from ._stages import collect_angles

    collect_angles(args.states, args.out_folder, increment_csvs=args.increments,
                   family_csvs=args.families, cluster_csvs=args.clusters,
                   overlap_csvs=args.overlaps)
    return 0


def _add_history(p):
    p.add_argument("states", type=Path, help="the series' states.csv")
    p.add_argument("increments", type=Path, help="the series' increments table")
    p.add_argument("out_folder", type=Path, help="series results folder (history, report)")
    p.add_argument("--stores", nargs="*", type=Path, default=[],
                   help="step stores in time order (phase slices of first, middle, last)")
    p.add_argument("--settings", type=_json, default={},
                   help="JSON: interfacial_tension_n_per_m, static_tolerance, title, config")


@subcommand("history", _add_history,
            "saturation-path history, branch summary, figures and the HTML report")
def _cmd_history(args) -> int:
    from ._stages import history_series

    s = args.settings
    out = history_series(args.states, args.increments, args.out_folder, stores=args.stores,
                         config=s.get("config"),
                         sigma_n_per_m=s.get("interfacial_tension_n_per_m"),
                         static_tol=float(s.get("static_tolerance", 0.005)), title=s.get("title"))
    print(f"report written to {out}")
    return 0


def _add_summary(p):
    p.add_argument("results", type=Path, help="a series results folder (or its branches.csv)")


@subcommand("summary", _add_summary, "print the branch summary of a series as a table")
def _cmd_summary(args) -> int:
    from ._history import format_branch_summary

    if not args.results.exists():
        raise WetpathError("no such results folder", step="summary", path=args.results)
    print(format_branch_summary(args.results))
    return 0


# ---- main -------------------------------------------------------------------------------------

def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="wetpath", description="Effective wettability along the saturation path from "
        "time-resolved 3D images of displacement experiments.")
    parser.add_argument("--version", action="version", version=f"wetpath {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, (add_arguments, func, help_text) in _COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        add_arguments(p)
        p.set_defaults(func=func)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``wetpath`` console script; returns the exit code."""
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except WetpathError as exc:
        print(f"wetpath {args.command}: error: {exc}", file=sys.stderr)
        return 2
