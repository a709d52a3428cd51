"""Speed and peak memory of every stage of the per-state analysis, and of the whole measure stage.

Stages (each (stage, size) in a fresh Python process, so that its peak resident memory is its own):
``read`` (step store and cluster store from zarr into memory), ``lattice`` (volumes, Crofton areas,
Euler characteristics), ``label`` (n clusters), ``cluster_lattice`` (per-cluster lattice measures),
``mesh`` (per-cluster mesh measures alone), ``mesh_angles`` (mesh measures and geometric
contact-line angles from one meshing pass), ``topological`` (angle from the per-cluster table,
after ``measure_clusters``), ``perturb`` (±1-voxel fluid boundary and its two lattice passes),
``overlap`` (cluster overlap table between two states): these run on the whole arrays in memory,
read beforehand and untimed (``read`` times that reading on its own). ``measure_step`` is the
workflow's measure stage end to end as it runs: it streams from the stores (lattice passes by
slabs, mesh chunks read their own boxes, perturbed states slab by slab) and reads nothing whole,
computes all of the above but labelling and tracking, and writes the tables; its peak memory is
the stage's own, bounded by the chunk sizes rather than the volume.

Media: a random three-phase medium (``wetpath.synthetic.random_medium``: ~35 % porosity, both
fluids, many n clusters) generated at up to 256³ and mirror-tiled to the requested size. The
default grain and fluid scales, 8 and 10 voxels (Gaussian-field correlation lengths; grains and
pores ~20 voxels across), give pores of the size at which contact angles can be measured at all
(menisci of ≥ 10–20 voxels radius, issues 3 and 5); ``--medium fine`` (scales 3 and 4: pores ~6
voxels across, hundreds of clusters, ~3× the interface area per voxel and nearly every interface
unresolvable) is the worst case for the mesh stages. The second state for tracking has the same
solid at a lower wetting saturation. They are written as step stores (OME-Zarr, as ``wetpath
ingest`` writes them) with their cluster stores (as ``wetpath label`` writes them).

``--area`` adds a run at one size over fluid scales 4–12 voxels: the n–w interface area changes
several-fold at the same voxel count, and the mesh stage's cost follows it.

Usage::

    PYTHONPATH=src python benchmarks/bench_state.py                       # 256³ and 512³
    PYTHONPATH=src python benchmarks/bench_state.py --size 512 1024 --streaming  # passes from zarr
    PYTHONPATH=src python benchmarks/bench_state.py --smoke               # tiny sizes for CI
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import threading
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_streaming import MEDIA, _reflect, _rss_mb, machine  # noqa: E402

STAGES = ("read", "lattice", "label", "cluster_lattice", "mesh", "mesh_angles", "topological",
          "perturb", "overlap", "measure_step")


def make_stores(size: int, cache: Path, medium: str = "pores20",
                fluid_scale: float | None = None) -> dict[str, Path]:
    """Step stores ``a``/``b`` and their cluster stores under ``cache``; returns their paths."""
    from wetpath import synthetic
    from wetpath._stages import label_step
    from wetpath._store import create_step_store

    grain, fluid = MEDIA[medium]
    fluid = fluid if fluid_scale is None else fluid_scale
    tag = f"{size}_g{grain:g}_f{fluid:g}"
    paths = {}
    for name, sat in (("a", 0.55), ("b", 0.45)):
        store, clusters = cache / f"{name}_{tag}.zarr", cache / f"{name}_{tag}_clusters.zarr"
        if not clusters.exists():
            m = min(size, 256)
            base = synthetic.random_medium((m,) * 3, porosity=0.35, saturation_w=sat,
                                           grain_scale=grain, fluid_scale=fluid, seed=11)
            idx = _reflect(size, base.shape[0])
            level0, _ = create_step_store(store, (size,) * 3, 1.0, chunks=(128, 256, 256),
                                          attrs={"step": name})
            for z0 in range(0, size, 128):
                level0[z0:z0 + 128] = base[np.ix_(idx[z0:z0 + 128], idx, idx)]
            label_step(store, clusters)
        paths[name], paths[f"{name}_clusters"] = store, clusters
    return paths


def _run(stage: str, arrays: dict, paths: dict, threads: int, tmp: Path) -> None:
    from wetpath._clusters import cluster_lattice_measures, label_clusters
    from wetpath._energy import perturb_fluid_boundary
    from wetpath._geometric import mesh_and_angles, summarise_geometric
    from wetpath._lattice import lattice_measures
    from wetpath._measure import measure_clusters
    from wetpath._mesh import mesh_measures
    from wetpath._stages import MESH_CHUNKS, measure_step, open_clusters
    from wetpath._store import open_step
    from wetpath._topological import topological_from_clusters
    from wetpath._tracking import overlap_table

    lab, cl = arrays.get("labels"), arrays.get("clusters")
    if stage == "read":
        np.asarray(open_step(paths["a"]).labels[...])
        np.asarray(open_clusters(paths["a_clusters"])[...])
    elif stage == "lattice":
        lattice_measures(lab, threads=threads)
    elif stage == "label":
        label_clusters(lab, threads=threads)
    elif stage == "cluster_lattice":
        cluster_lattice_measures(lab, cl, threads=threads)
    elif stage == "mesh":
        mesh_measures(lab, clusters=cl, chunks=MESH_CHUNKS, threads=threads)
    elif stage == "mesh_angles":
        summarise_geometric(mesh_and_angles(lab, clusters=cl, chunks=MESH_CHUNKS,
                                            threads=threads)[1])
    elif stage == "topological":
        topological_from_clusters(arrays["table"])
    elif stage == "perturb":
        for p in perturb_fluid_boundary(lab):
            lattice_measures(p, threads=threads)
    elif stage == "overlap":
        overlap_table(cl, arrays["clusters_b"], threads=threads)
    elif stage == "measure_step":
        measure_step(paths["a"], paths["a_clusters"], tmp, threads=threads)
    elif stage == "prepare_topological":
        arrays["table"] = measure_clusters(lab, clusters=cl, threads=threads)


def run_stage(stage: str, paths: dict, threads: int, sample_every: float = 0.5) -> dict:
    """Body of one worker process: load what the stage needs (untimed), warm the compiled kernels
    up on a small crop, then time the stage once."""
    from wetpath._stages import open_clusters
    from wetpath._store import open_step

    warnings.simplefilter("ignore")
    tmp = Path(tempfile.mkdtemp())
    arrays: dict = {}
    if stage not in ("read", "measure_step"):
        arrays["labels"] = np.asarray(open_step(paths["a"]).labels[...])
        arrays["clusters"] = np.asarray(open_clusters(paths["a_clusters"])[...])
        if stage == "overlap":
            arrays["clusters_b"] = np.asarray(open_clusters(paths["b_clusters"])[...])
    crop = {"labels": np.asarray(open_step(paths["a"]).labels[:24, :24, :24]),
            "clusters": np.asarray(open_clusters(paths["a_clusters"])[:24, :24, :24])}
    crop["clusters_b"] = crop["clusters"]
    # load numba's cached kernels (and compile what is not cached) before timing
    for warm in ("lattice", "label", "cluster_lattice", "mesh", "mesh_angles", "perturb",
                 "overlap"):
        if stage in (warm, "measure_step"):
            _run(warm, crop, paths, threads, tmp)
    if stage == "topological":
        _run("prepare_topological", arrays, paths, threads, tmp)
    rss_inputs = _rss_mb("VmRSS")
    sampler = _PssSampler(sample_every)
    t, c, cc = time.perf_counter(), time.process_time(), _children_cpu()
    _run(stage, arrays, paths, threads, tmp)
    wall = time.perf_counter() - t
    peak_pss = sampler.stop()
    cpu = time.process_time() - c + _children_cpu() - cc - sampler.cpu
    shutil.rmtree(tmp, ignore_errors=True)
    n = int(np.prod(open_step(paths["a"]).labels.shape))
    return {"stage": stage, "voxels": n, "threads": threads, "seconds": wall,
            "mvox_s": n / wall / 1e6, "cpu_seconds": cpu, "mvox_cpu_s": n / cpu / 1e6,
            "rss_inputs_mb": rss_inputs, "peak_rss_mb": max(_rss_mb(), peak_pss),
            "load": os.getloadavg()[0]}


def _children_cpu() -> float:
    """CPU seconds of the worker processes that have finished (the mesh stage forks some)."""
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


class _PssSampler:
    """Largest proportional set size (PSS, MB) of this process plus its worker processes, sampled
    every ``interval`` seconds: what they occupy together, shared copy-on-write pages counted once.

    Reading PSS walks the page tables of every process (``smaps_rollup``): every 0.1 s it took
    ~10 % of both cores in a 512³ measure stage (perf, kernel ``smaps_account``) and read peaks
    3–5 % higher than every 0.5 s (1.43 against 1.35–1.39 GB). ``cpu`` is the sampler's own CPU
    time, which :func:`run_stage` leaves out of the stage's."""

    def __init__(self, interval: float = 0.5):
        self.peak, self.cpu, self._stop = 0.0, 0.0, threading.Event()
        self._interval = interval
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    @staticmethod
    def _pss_mb() -> float:
        me = os.getpid()
        pids = [me]
        for tid in os.listdir(f"/proc/{me}/task"):
            try:
                pids += [int(x) for x in Path(f"/proc/{me}/task/{tid}/children").read_text().split()]
            except OSError:
                pass
        total = 0
        for pid in pids:
            try:
                for line in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines():
                    if line.startswith("Pss:"):
                        total += int(line.split()[1])
            except OSError:
                pass
        return total / 1024

    def _run(self):
        while not self._stop.wait(self._interval):
            self.peak = max(self.peak, self._pss_mb())
        self.cpu = time.thread_time()

    def stop(self) -> float:
        self._stop.set()
        self._thread.join()
        return self.peak


def _worker(stage: str, paths: dict, threads: int, sample_every: float) -> dict:
    cmd = [sys.executable, __file__, "--worker", stage, json.dumps({k: str(v) for k, v in
                                                                    paths.items()}),
           "--threads", str(threads), "--sample-every", str(sample_every)]
    out = subprocess.run(cmd, capture_output=True, text=True, env=os.environ, check=False)
    if out.returncode:
        raise SystemExit(out.stderr)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _area_nw(path: Path) -> float:
    from wetpath._lattice import lattice_measures
    from wetpath._store import open_step

    return float(lattice_measures(np.asarray(open_step(path).labels[...]))["area_nw"])


def _table(rows: list[dict], first: str) -> None:
    print(f"| {first} | stage | threads | wall s | Mvox/s | CPU s | Mvox per CPU-s "
          "| RSS after inputs (MB) | peak memory (MB) | load |")
    print("|---|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['label']} | {r['stage']} | {r['threads']} | {r['seconds']:.2f} | "
              f"{r['mvox_s']:.2f} | {r['cpu_seconds']:.2f} | {r['mvox_cpu_s']:.2f} | "
              f"{r['rss_inputs_mb']:.0f} | {r['peak_rss_mb']:.0f} | {r['load']:.1f} |")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--size", type=int, nargs="*", default=[256, 512],
                    help="edge lengths (default 256 512)")
    ap.add_argument("--streaming", action="store_true",
                    help="run the streaming passes from zarr (bench_streaming.py) at --size")
    ap.add_argument("--medium", choices=sorted(MEDIA), default="pores20",
                    help="benchmark medium (default pores20: grain/fluid scales 8/10 voxels)")
    ap.add_argument("--area", type=int, default=None, metavar="SIZE",
                    help="also run mesh_angles and measure_step at SIZE over fluid scales")
    ap.add_argument("--threads", type=int, default=None, help="worker threads (default: all)")
    ap.add_argument("--stages", nargs="*", default=list(STAGES), choices=STAGES)
    ap.add_argument("--cache", type=Path, default=None, help="directory for generated inputs")
    ap.add_argument("--smoke", action="store_true", help="tiny sizes (CI)")
    ap.add_argument("--sample-every", type=float, default=0.5, metavar="S",
                    help="seconds between memory samples (default 0.5)")
    ap.add_argument("--worker", nargs=2, metavar=("STAGE", "PATHS"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    threads = args.threads or len(os.sched_getaffinity(0))
    if args.worker:
        stage, paths = args.worker
        print(json.dumps(run_stage(stage, {k: Path(v) for k, v in json.loads(paths).items()},
                                   threads, args.sample_every)))
        return 0
    if args.streaming:
        import bench_streaming

        sizes = [40] if args.smoke else args.size
        extra = ["--cache", str(args.cache)] if args.cache else []
        return bench_streaming.main(["--sizes", "--zarr", *map(str, sizes), "--repeat", "1",
                                     "--threads", str(threads), "--medium", args.medium, *extra])
    if args.smoke:
        args.size, args.area = [40], (40 if args.area else None)
    cache = args.cache or Path(tempfile.mkdtemp(prefix="wetpath-bench-state-"))
    cache.mkdir(parents=True, exist_ok=True)
    print(machine())
    print(f"command: {' '.join([Path(sys.executable).name, *sys.argv])}", flush=True)
    rows = []
    for size in args.size:
        t = time.perf_counter()
        paths = make_stores(size, cache, args.medium)
        print(f"# inputs {size}³: {time.perf_counter() - t:.1f} s", flush=True)
        for stage in args.stages:
            r = _worker(stage, paths, threads, args.sample_every)
            r["label"] = f"{size}³ {args.medium}"
            rows.append(r)
            print(f"# {stage:16s} {size:5d}³ {r['mvox_s']:8.2f} Mvox/s "
                  f"{r['peak_rss_mb']:7.0f} MB", flush=True)
    area_rows = []
    if args.area:
        for scale in (4.0, 6.0, 8.0, 12.0):
            paths = make_stores(args.area, cache, args.medium, fluid_scale=scale)
            area = _area_nw(paths["a"])
            for stage in ("mesh_angles", "measure_step"):
                r = _worker(stage, paths, threads, args.sample_every)
                r["label"] = f"{args.area}³ fluid scale {scale:g}, A_nw {area:.3g} vox²"
                r["area"] = area
                area_rows.append(r)
                print(f"# {stage:16s} scale {scale:g} A_nw {area:.3g}: {r['seconds']:.2f} s "
                      f"({r['cpu_seconds'] / area * 1e5:.3f} CPU-s per 1e5 vox²)", flush=True)
    print()
    _table(rows, "size")
    if area_rows:
        print()
        _table(area_rows, "medium")
        print("\nCPU-s per 1e5 voxel² of n–w interface: " + ", ".join(
            f"{r['stage']} {r['cpu_seconds'] / r['area'] * 1e5:.3f}" for r in area_rows))
    print("\nMvox/s = voxels / wall time; Mvox per CPU-s = voxels / CPU time (all threads and "
          "worker processes, the memory sampler's own left out): on a loaded machine the second "
          "shows the work per voxel; peak memory = the larger of the process's peak RSS and the "
          f"peak PSS of the process and its workers together (sampled every {args.sample_every:g} "
          "s); load = 1-min load average.")
    if args.cache is None:
        shutil.rmtree(cache, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
