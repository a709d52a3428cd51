"""Speed and peak memory of the streaming passes: lattice measures, cluster labelling, per-cluster
measures and overlap tracking.

Each (stage, size) runs in a fresh Python process so that its peak resident memory is its own;
inputs are generated once into a cache directory (``.npy`` for in-memory runs; for the out-of-core
runs a step store and a cluster store as the workflow writes them: 128³ chunks, Blosc-Zstandard
uint8 phase codes, Blosc-LZ4 uint16 cluster ids). Media: a 256³ random three-phase medium
(``wetpath.synthetic.random_medium``, ~35 % porosity, both fluids) mirror-tiled to the requested
size; the second step for tracking has the same solid and fluid field at a lower wetting
saturation (a drainage step). ``--medium`` picks the Gaussian-field scales as in
``bench_state.py``: ``pores20`` (default; grains and pores ~20 voxels across) or ``fine`` (~6
voxels: hundreds of small clusters, the worst case for labelling). The label stage out of core
writes a cluster store as ``label_step`` does.

Usage::

    PYTHONPATH=src python benchmarks/bench_streaming.py              # 256³ and 512³, in memory
    PYTHONPATH=src python benchmarks/bench_streaming.py --zarr 1024  # plus 1024³ from zarr
    PYTHONPATH=src python benchmarks/bench_streaming.py --smoke      # tiny sizes for CI
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

STAGES = ("lattice", "label", "cluster_measures", "overlap")
BASE = 256
MEDIA = {"pores20": (8.0, 10.0), "fine": (3.0, 4.0)}
"""Grain and fluid scales (voxels) of the benchmark media."""


def _reflect(n: int, m: int) -> np.ndarray:
    """Indices 0..m−1, m−1..0, 0.. of length n (mirror tiling)."""
    period = np.concatenate([np.arange(m), np.arange(m)[::-1]])
    return np.resize(period, n)


def _base(size: int, saturation_w: float, medium: str) -> np.ndarray:
    from wetpath import synthetic

    m = min(size, BASE)
    grain, fluid = MEDIA[medium]
    return synthetic.random_medium((m, m, m), porosity=0.35, saturation_w=saturation_w,
                                   grain_scale=grain, fluid_scale=fluid, seed=11)


def _names(name: str, size: int, as_zarr: bool, medium: str) -> tuple[str, str]:
    """Cache file names of a step's phase codes and cluster labels."""
    if as_zarr:
        return f"step_{name}_{size}_{medium}.zarr", f"clusters_{name}_{size}_{medium}.zarr"
    return f"{name}_{size}_{medium}.npy", f"{name}_{size}_{medium}_clusters.npy"


def make_inputs(size: int, cache: Path, as_zarr: bool, medium: str = "pores20") -> None:
    """Write steps a and b (phase codes) and their cluster labels into ``cache``.

    Out of core they are what the workflow writes: a step store (``_store.create_step_store``,
    128³ chunks, Blosc-Zstandard) and a cluster store (``_store.create_cluster_array``)."""
    from wetpath._clusters import label_clusters

    for name, sat in (("a", 0.55), ("b", 0.45)):
        base = _base(size, sat, medium)
        idx = _reflect(size, base.shape[0])
        codes, clusters = (cache / n for n in _names(name, size, as_zarr, medium))
        if not as_zarr:
            vol = base[np.ix_(idx, idx, idx)]
            np.save(codes, vol)
            np.save(clusters, label_clusters(vol)[0])
            continue
        import zarr

        from wetpath._store import create_cluster_array, create_step_store

        level0, _ = create_step_store(codes, (size,) * 3, 1.0)
        depth = level0.chunks[0]
        for z0 in range(0, size, depth):
            level0[z0:z0 + depth] = base[np.ix_(idx[z0:z0 + depth], idx, idx)]
        group = zarr.open_group(clusters, mode="w", zarr_format=3)
        label_clusters(level0, out=lambda n, g=group, z=level0: create_cluster_array(
            g, z.shape, z.chunks, n))


def _open(path: Path):
    if path.suffix == ".npy":
        return np.load(path)
    from wetpath._stages import open_clusters
    from wetpath._store import open_step

    return open_clusters(path) if path.name.startswith("clusters_") else open_step(path).labels


def _rss_mb(key: str = "VmHWM") -> float:
    """Peak (VmHWM) or current (VmRSS) resident memory of this process in MB. ru_maxrss is not
    used: Linux carries it over from the parent across fork and exec."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(key + ":"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def run_stage(stage: str, size: int, cache: Path, kind: str, threads: int, repeat: int,
              medium: str = "pores20") -> dict:
    """Body of one worker process: load the inputs, time the stage ``repeat`` times."""
    from wetpath._clusters import cluster_lattice_measures, label_clusters
    from wetpath._lattice import lattice_measures
    from wetpath._tracking import overlap_table

    as_zarr = kind == "zarr"
    a, ca = (_open(cache / n) for n in _names("a", size, as_zarr, medium))
    cb = _open(cache / _names("b", size, as_zarr, medium)[1])
    tmp = Path(tempfile.mkdtemp(dir=cache))

    # in memory, the label stage writes into one output buffer reused across runs (as a workflow
    # reuses it across steps: first touch of fresh memory is slow on these machines)
    reused = np.zeros(a.shape, np.int32) if kind == "numpy" and stage == "label" else None

    def once(a, ca, cb, kind):
        if stage == "lattice":
            lattice_measures(a, threads=threads)
        elif stage == "label":
            out = reused if reused is not None and reused.shape == a.shape else None
            if kind == "zarr":          # as label_step writes it
                import zarr

                from wetpath._store import create_cluster_array

                group = zarr.open_group(tmp / "out.zarr", mode="w", zarr_format=3)
                out = lambda n: create_cluster_array(group, a.shape, a.chunks, n)  # noqa: E731
            label_clusters(a, threads=threads, out=out)
        elif stage == "cluster_measures":
            cluster_lattice_measures(a, ca, threads=threads)
        elif stage == "overlap":
            overlap_table(ca, cb, threads=threads)

    # warm-up on a small crop: loads the compiled kernels from numba's cache
    once(*(np.asarray(x[:16, :16, :16]) for x in (a, ca, cb)), "numpy")
    rss_inputs = _rss_mb("VmRSS")
    times, cpu = [], []
    for _ in range(repeat):
        t, c = time.perf_counter(), time.process_time()
        once(a, ca, cb, kind)
        times.append(time.perf_counter() - t)
        cpu.append(time.process_time() - c)
    shutil.rmtree(tmp, ignore_errors=True)
    best = int(np.argmin(times))
    return {"stage": stage, "size": size, "source": kind, "medium": medium, "threads": threads,
            "seconds": times[best], "mvox_s": size**3 / times[best] / 1e6,
            "cpu_seconds": cpu[best], "mvox_cpu_s": size**3 / cpu[best] / 1e6,
            "rss_inputs_mb": rss_inputs,
            "peak_rss_mb": _rss_mb()}


def machine() -> str:
    import dask
    import numba
    import scipy
    import zarr

    cpu = "?"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    return (f"machine: {platform.node()} {platform.machine()} {cpu}, "
            f"{len(os.sched_getaffinity(0))} cores, {mem:.0f} GB; load {os.getloadavg()[0]:.1f}\n"
            f"versions: python {platform.python_version()}, numpy {np.__version__}, "
            f"numba {numba.__version__}, scipy {scipy.__version__}, zarr {zarr.__version__}, "
            f"dask {dask.__version__}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sizes", type=int, nargs="*", default=[256, 512],
                    help="edge lengths of the in-memory runs (default 256 512)")
    ap.add_argument("--zarr", type=int, nargs="*", default=[],
                    help="edge lengths of out-of-core runs read from zarr (e.g. 1024)")
    ap.add_argument("--threads", type=int, default=None, help="worker threads (default: all)")
    ap.add_argument("--repeat", type=int, default=2, help="timed runs per stage (best is kept)")
    ap.add_argument("--stages", nargs="*", default=list(STAGES), choices=STAGES)
    ap.add_argument("--cache", type=Path, default=None, help="directory for generated inputs")
    ap.add_argument("--medium", choices=sorted(MEDIA), default="pores20",
                    help="benchmark medium (default pores20: grain/fluid scales 8/10 voxels)")
    ap.add_argument("--smoke", action="store_true", help="tiny sizes, one run (CI)")
    ap.add_argument("--worker", nargs=4, metavar=("STAGE", "SIZE", "CACHE", "KIND"),
                    help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    threads = args.threads or len(os.sched_getaffinity(0))
    if args.worker:
        stage, size, cache, kind = args.worker
        res = run_stage(stage, int(size), Path(cache), kind, threads, args.repeat, args.medium)
        print(json.dumps(res))
        return 0
    if args.smoke:
        args.sizes, args.zarr, args.repeat = [40], [48], 1
    cache = args.cache or Path(tempfile.mkdtemp(prefix="wetpath-bench-"))
    cache.mkdir(parents=True, exist_ok=True)
    print(machine())
    print(f"command: {' '.join([Path(sys.executable).name, *sys.argv])}")
    runs = [(s, "numpy") for s in args.sizes] + [(s, "zarr") for s in args.zarr]
    rows = []
    for size, kind in runs:
        t = time.perf_counter()
        if not (cache / _names("b", size, kind == "zarr", args.medium)[1]).exists():
            make_inputs(size, cache, kind == "zarr", args.medium)
        print(f"# inputs {size}³ {kind}: {time.perf_counter() - t:.1f} s", flush=True)
        for stage in args.stages:
            cmd = [sys.executable, __file__, "--worker", stage, str(size), str(cache), kind,
                   "--threads", str(threads), "--repeat", str(args.repeat),
                   "--medium", args.medium]
            out = subprocess.run(cmd, capture_output=True, text=True, env=os.environ)
            if out.returncode:
                print(out.stderr, file=sys.stderr)
                return out.returncode
            rows.append(json.loads(out.stdout.strip().splitlines()[-1]))
            r = rows[-1]
            print(f"# {stage:17s} {size:5d}³ {kind:5s} {r['mvox_s']:8.1f} Mvox/s", flush=True)
    print()
    print(f"medium: {args.medium} (grain/fluid scales {MEDIA[args.medium]})")
    print("| stage | size | source | threads | wall s | Mvox/s | CPU s | Mvox per CPU-s "
          "| RSS after inputs (MB) | peak RSS (MB) |")
    print("|---|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['stage']} | {r['size']}³ | {r['source']} | {r['threads']} | "
              f"{r['seconds']:.3f} | {r['mvox_s']:.0f} | {r['cpu_seconds']:.3f} | "
              f"{r['mvox_cpu_s']:.0f} | {r['rss_inputs_mb']:.0f} | {r['peak_rss_mb']:.0f} |")
    print("\nMvox/s = voxels / best wall time; Mvox per CPU-s = voxels / CPU time of that run "
          "(all threads): on a loaded machine the second shows the work per voxel.")
    if args.cache is None:
        shutil.rmtree(cache, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
