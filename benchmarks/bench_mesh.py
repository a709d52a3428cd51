"""Speed and peak memory of the mesh measures on random porous media.

Usage::

    PYTHONPATH=src python benchmarks/bench_mesh.py            # 256³ and 512³
    PYTHONPATH=src python benchmarks/bench_mesh.py --smoke    # 64³, seconds

Reports, per size: Mvox/s of ``mesh_measures`` (labelling excluded: clusters are given) with the
given chunk size (``--chunks 0``: whole clusters) and threads, the number of clusters and of
resolved clusters, and the peak resident memory (``ru_maxrss``) of a fresh subprocess that only
loads the medium and measures it. The media come from ``wetpath.synthetic.random_medium``
(~35 % porosity, S_w = 0.5, grain scale 3 voxels).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time


def run_one(path: str, chunks: int | None, threads: int) -> dict:
    import numpy as np

    from wetpath._mesh import mesh_measures, mesh_totals

    data = np.load(path)
    labels, clusters = data["labels"], data["clusters"]
    size = labels.shape[0]
    mesh_measures(labels[:32, :32, :32], threads=1)            # load the compiled kernels
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter()
    table = mesh_measures(labels, clusters=clusters, chunks=chunks, threads=threads)
    seconds = time.perf_counter() - t0
    totals = mesh_totals(table)
    return {"size": size, "chunks": chunks, "threads": threads, "seconds": round(seconds, 2),
            "mvox_per_s": round(size**3 / seconds / 1e6, 3), "clusters": len(table),
            "resolved": int(table["resolved"].sum()),
            "area_nw_mesh": round(totals["area_nw_mesh"], 1),
            "rss_mb_before": round(rss0 / 1024, 1),
            "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1)}


def make_medium(size: int, folder: str) -> str:
    """Write a random medium and its 26-connected n clusters to ``folder``; return the path."""
    import numpy as np
    from scipy import ndimage

    from wetpath import synthetic

    labels = synthetic.random_medium((size,) * 3, seed=1)
    clusters, _ = ndimage.label(labels == 3, np.ones((3, 3, 3), bool))
    path = os.path.join(folder, f"medium_{size}.npz")
    np.savez(path, labels=labels, clusters=clusters.astype(np.int32))
    return path


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--smoke", action="store_true", help="one 64³ run")
    p.add_argument("--sizes", type=int, nargs="*", default=[256, 512])
    p.add_argument("--chunks", type=int, default=128)
    p.add_argument("--threads", type=int, default=os.cpu_count() or 1)
    p.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    p.add_argument("--path", help=argparse.SUPPRESS)
    p.add_argument("--make", action="store_true", help=argparse.SUPPRESS)
    a = p.parse_args()
    if a.child:
        print(json.dumps(run_one(a.path, a.chunks or None, a.threads)))
        return
    if a.make:
        make_medium(a.sizes[0], a.path)
        return
    sizes = [64] if a.smoke else a.sizes
    with tempfile.TemporaryDirectory() as folder:
        for size in sizes:
            # build the medium in its own process: ru_maxrss carries over from parent to child
            subprocess.run([sys.executable, __file__, "--make", "--sizes", str(size), "--path",
                            folder], check=True)
            path = os.path.join(folder, f"medium_{size}.npz")
            out = subprocess.run([sys.executable, __file__, "--child", "--path", path,
                                  "--chunks", str(a.chunks), "--threads", str(a.threads)],
                                 capture_output=True, text=True, check=True)
            print(out.stdout.strip(), flush=True)


if __name__ == "__main__":
    main()
