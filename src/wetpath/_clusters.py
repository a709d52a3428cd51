"""Connected components of the non-wetting phase, slab by slab, and their lattice measures.

Labelling streams the volume as z-slabs: each slab is labelled in memory by a compiled raster scan
with union–find (GIL released, so slabs run in parallel threads; :func:`scipy.ndimage.label` is the
test oracle), the pieces are merged across slab faces with a union–find over the face planes, and
final ids 1..n are given in the order of each cluster's first voxel in C order — the same numbering
whatever the slab depth.
The labels may be written into a zarr array (out of core): only the two face planes of each slab
and one integer per piece are kept between the passes.

Per-cluster measures accumulate over the same 2×2×2 cubes as :mod:`wetpath._lattice` (virtual
excluded layer around the array, integer counts): voxel counts, centroids, bounding boxes,
Crofton pair areas on the n side of each n–w and n–s pair, and χ of each cluster from the cubes —
with 26-connectivity a cube holds at most one cluster.

References
----------
Raster-scan labelling with union–find and merging of block-wise labels: K. Wu, E. Otoo & K. Suzuki
(2009), Pattern Anal. Appl. 12, 117–135. Crofton pair areas and Euler characteristics: see
:mod:`wetpath._lattice`.
"""

from __future__ import annotations

import threading

import numpy as np
import pandas as pd
from numba import njit
from scipy import ndimage

from ._errors import WetpathError
from ._lattice import (
    CUBE_CORNERS,
    Scratch,
    _check_voxel_size,
    _class_factors,
    _depth,
    _lut,
    _Source,
    euler_lut,
    resolve_threads,
    run_parallel,
)

__all__ = ["label_clusters", "cluster_dtype", "cluster_lattice_measures", "CLUSTER_COLUMNS"]

# bytes of first-pass runs kept in memory for the second pass of label_clusters
RUN_BUDGET = 512 * 2**20

CLUSTER_COLUMNS = ["cluster", "voxels", "volume", "centroid_z", "centroid_y", "centroid_x",
                   "bbox_z0", "bbox_y0", "bbox_x0", "bbox_z1", "bbox_y1", "bbox_x1",
                   "area_nw", "area_ns", "euler_n", "touches_border"]


def _structure(connectivity: int) -> np.ndarray:
    if connectivity not in (6, 26):
        raise WetpathError(f"connectivity must be 6 or 26, got {connectivity}", step="clusters")
    return ndimage.generate_binary_structure(3, 1 if connectivity == 6 else 3)


@njit(cache=True, nogil=True, inline="always")
def _find(parent, i):
    root = i
    while parent[root] != root:
        root = parent[root]
    while parent[i] != root:          # path compression
        nxt = parent[i]
        parent[i] = root
        i = nxt
    return root


@njit(cache=True, nogil=True)
def _scan_labels(codes, out, parent, first, offs, right):
    """Raster-scan union–find labelling of code 3 in a contiguous slab, voxel by voxel (the
    reference for :func:`_scan_runs`).

    ``out`` receives provisional labels; ``parent`` the union–find forest in which every root is
    the smallest provisional label of its component (created first, so at the component's first
    voxel in C order); ``first[l]`` the C-order index in the slab where label l was created.
    ``offs`` lists the (dz, dy, dx) neighbours that precede a voxel in raster order, except the
    left one (0, 0, −1); ``right`` those of them that are not also neighbours of the left voxel:
    when the left voxel is labelled, the others were already united with it. ``parent`` and
    ``first`` grow when full; returns (n, parent, first).
    """
    nz, ny, nx = codes.shape
    c = codes.ravel()
    o = out.ravel()
    n = 0
    for z in range(nz):
        for y in range(ny):
            row = (z * ny + y) * nx
            inner = z > 0 and 0 < y < ny - 1
            for x in range(nx):
                i = row + x
                if c[i] != 3:
                    o[i] = 0
                    continue
                lab = 0
                last = 0
                nb = offs
                if x > 0 and o[i - 1] != 0:
                    last = o[i - 1]
                    lab = _find(parent, last)
                    nb = right
                interior = inner and 0 < x < nx - 1
                for k in range(nb.shape[0]):
                    dz, dy, dx = nb[k, 0], nb[k, 1], nb[k, 2]
                    if not interior:
                        zz, yy, xx = z + dz, y + dy, x + dx
                        if zz < 0 or yy < 0 or yy >= ny or xx < 0 or xx >= nx:
                            continue
                    v = o[i + (dz * ny + dy) * nx + dx]
                    if v == 0 or v == last:
                        continue
                    last = v
                    r = _find(parent, v)
                    if lab == 0:
                        lab = r
                    elif r < lab:
                        parent[lab] = r
                        lab = r
                    elif r > lab:
                        parent[r] = lab
                if lab == 0:
                    n += 1
                    if n >= parent.size:
                        bigger = np.empty(2 * parent.size, parent.dtype)
                        bigger[:n] = parent[:n]
                        parent = bigger
                        wider = np.empty(2 * first.size, first.dtype)
                        wider[:n] = first[:n]
                        first = wider
                    parent[n] = n
                    first[n] = i
                    lab = n
                o[i] = lab
    return n, parent, first


@njit(cache=True, nogil=True)
def _row_runs(line, starts, ends, lab, nr):
    """Append the runs of code 3 of one row; returns the new run count (capacity checked by the
    caller: a row holds at most (nx + 1) // 2 runs)."""
    nx = line.size
    x = 0
    while x < nx:
        if line[x] != 3:
            x += 1
            continue
        x0 = x
        while x < nx and line[x] == 3:
            x += 1
        starts[nr] = x0
        ends[nr] = x
        lab[nr] = 0
        nr += 1
    return nr


@njit(cache=True, nogil=True)
def _unite_rows(r0, r1, p, p1, starts, ends, lab, parent, reach):
    """Unite runs r0 … r1 − 1 of a row with the runs p … p1 − 1 of a preceding row they touch."""
    for r in range(r0, r1):
        s0, s1 = starts[r], ends[r]
        while p < p1 and ends[p] + reach <= s0:
            p += 1
        k = p
        while k < p1 and starts[k] < s1 + reach:
            rv = _find(parent, lab[k])
            cur = lab[r]
            if cur == 0:
                lab[r] = rv
            else:
                rc = _find(parent, cur)
                if rv < rc:
                    parent[rc] = rv
                    lab[r] = rv
                elif rc < rv:
                    parent[rv] = rc
            k += 1


@njit(cache=True, nogil=True)
def _new_labels(r0, r1, row, nx, starts, lab, parent, first, n):
    """A new label for every run of r0 … r1 − 1 that touches no earlier run; returns n."""
    for r in range(r0, r1):
        if lab[r] == 0:
            n += 1
            parent[n] = n
            first[n] = row * nx + starts[r]
            lab[r] = n
    return n


@njit(cache=True, nogil=True)
def _grown(arr, need):
    """``arr`` itself when it holds ``need`` elements, else a copy at least twice as long."""
    if need <= arr.size:
        return arr
    bigger = np.empty(max(2 * arr.size, need), arr.dtype)
    bigger[:arr.size] = arr
    return bigger


@njit(cache=True, nogil=True)
def _scan_runs(codes, starts, ends, rowptr, lab, parent, first, reach):
    """Raster-scan union–find labelling of code 3 in a contiguous slab, run by run.

    Each row's runs of code 3 along x are found first (run r spans x ∈ [starts[r], ends[r]) of row
    (z, y), runs ``rowptr[z·ny + y]`` … ``rowptr[z·ny + y + 1] − 1``); a run is then united with
    the runs it touches in the preceding rows (z, y − 1) and, with ``reach`` = 1
    (26-connectivity), (z − 1, y − 1 … y + 1), or only (z − 1, y) with ``reach`` = 0
    (6-connectivity). A run that touches none gets a new provisional label, so labels are created
    in C order at the first voxel of their run and — as in :func:`_scan_labels` — the root of
    every set is its smallest label, created at the component's first voxel in C order;
    ``first[l]`` is that voxel's C-order index in the slab. ``lab[r]`` is a label of run r's set.
    Arrays grow when full; returns (n labels, runs, starts, ends, lab, parent, first).
    """
    nz, ny, nx = codes.shape
    nr = 0
    n = 0
    for z in range(nz):
        for y in range(ny):
            row = z * ny + y
            rowptr[row] = nr
            need = nr + (nx + 1) // 2 + 1
            starts, ends, lab = _grown(starts, need), _grown(ends, need), _grown(lab, need)
            nr = _row_runs(codes[z, y], starts, ends, lab, nr)
            r0, r1 = rowptr[row], nr
            if r0 == r1:
                continue
            if y > 0:                            # (z, y − 1)
                _unite_rows(r0, r1, rowptr[row - 1], r0, starts, ends, lab, parent, reach)
            if z > 0:                            # (z − 1, y + dy)
                for yy in range(max(y - reach, 0), min(y + reach + 1, ny)):
                    nbr = (z - 1) * ny + yy
                    _unite_rows(r0, r1, rowptr[nbr], rowptr[nbr + 1], starts, ends, lab, parent,
                                reach)
            need = n + (r1 - r0) + 1
            parent, first = _grown(parent, need), _grown(first, need)
            n = _new_labels(r0, r1, row, nx, starts, lab, parent, first, n)
    rowptr[nz * ny] = nr
    return n, nr, starts, ends, lab, parent, first


@njit(cache=True, nogil=True)
def _paint_runs(out, z0, y0, ny, starts, ends, rowptr, lab, table):
    """Write ``table[lab[r]]`` over every run r of a box of rows and zero elsewhere: ``out`` has
    shape (planes, rows, nx) and element (k, i, x) is voxel x of row (z0 + k)·ny + y0 + i."""
    nk, nrows, nx = out.shape
    for k in range(nk):
        for i in range(nrows):
            line = out[k, i]
            row = (z0 + k) * ny + y0 + i
            x = 0
            for r in range(rowptr[row], rowptr[row + 1]):
                for u in range(x, starts[r]):
                    line[u] = 0
                v = table[lab[r]]
                for u in range(starts[r], ends[r]):
                    line[u] = v
                x = ends[r]
            for u in range(x, nx):
                line[u] = 0


@njit(cache=True, nogil=True)
def _compact(parent, first, n, base):
    """Provisional label -> local id 1..m in order of first voxel; first voxel (global C index)
    of each local id."""
    local = np.zeros(n + 1, np.int64)
    firsts = np.empty(n, np.int64)
    m = 0
    for i in range(1, n + 1):
        r = _find(parent, i)
        if r == i:
            m += 1
            local[i] = m
            firsts[m - 1] = base + first[i]
        else:
            local[i] = local[r]
    return local, firsts[:m]


@njit(cache=True, nogil=True)
def _roots(parent):
    out = np.empty(parent.size, np.int64)
    for i in range(parent.size):
        out[i] = _find(parent, i)
    return out


def _neighbour_offsets(connectivity: int) -> tuple[np.ndarray, np.ndarray]:
    """Neighbours preceding a voxel in raster order without the left one, nearest first; and the
    subset that is not a neighbour of the left voxel (see :func:`_scan_labels`)."""
    structure = _structure(connectivity)

    def adjacent(d):
        return max(map(abs, d)) <= 1 and structure[d[0] + 1, d[1] + 1, d[2] + 1]

    offs = [(dz, dy, dx) for dz in (-1, 0) for dy in (-1, 0, 1) for dx in (-1, 0, 1)
            if (dz, dy, dx) < (0, 0, -1) and adjacent((dz, dy, dx))][::-1]
    right = [d for d in offs if not adjacent((d[0], d[1], d[2] + 1))]
    return np.array(offs, np.int64), np.array(right, np.int64).reshape(-1, 3)


def _check_codes(planes: np.ndarray) -> None:
    if planes.size and ((planes.dtype.kind == "i" and planes.min() < 0) or planes.max() > 3):
        raise WetpathError("labels must hold canonical phase codes 0..3", step="clusters")


@njit(cache=True, nogil=True)
def _unite_faces(lower, upper, off_lower, off_upper, parent, firsts, reach):
    """Unite pieces adjacent across a z face: voxel (y, x) of the lower plane (local ids, global
    piece id = off_lower + id) with (y + dy, x + dx) of the upper plane, |dy|, |dx| ≤ reach.
    The root of a set is the piece whose first voxel comes first in C order."""
    ny, nx = lower.shape
    for y in range(ny):
        for x in range(nx):
            a = lower[y, x]
            if a == 0:
                continue
            for yy in range(max(y - reach, 0), min(y + reach + 1, ny)):
                for xx in range(max(x - reach, 0), min(x + reach + 1, nx)):
                    b = upper[yy, xx]
                    if b == 0:
                        continue
                    ra = _find(parent, off_lower + a)
                    rb = _find(parent, off_upper + b)
                    if ra != rb:
                        if firsts[ra] < firsts[rb]:
                            parent[rb] = ra
                        else:
                            parent[ra] = rb


def cluster_dtype(n: int) -> np.dtype:
    """Smallest integer dtype that holds cluster ids 0..n: uint16 up to 65 535, else int32, else
    int64 (the cluster store is written in it: 2 bytes per voxel instead of 4 for most steps)."""
    if n <= np.iinfo(np.uint16).max:
        return np.dtype(np.uint16)
    return np.dtype(np.int32 if n <= np.iinfo(np.int32).max else np.int64)


def label_clusters(labels, *, connectivity: int = 26, chunks=None, threads: int | None = None,
                   out=None) -> tuple[np.ndarray, int]:
    """Label the connected components of the non-wetting phase, slab by slab.

    Parameters
    ----------
    labels : ndarray, zarr array or dask array, shape (z, y, x)
        Canonical phase codes (3 = non-wetting).
    connectivity : {26, 6}
        Voxel adjacency of a cluster.
    chunks : int or tuple, optional
        Slab depth in planes; default the chunk depth of ``out`` (zarr), else of ``labels``,
        else 64. The result does not depend on it.
    threads : int, optional
        Worker threads (None: all cores).
    out : ndarray, zarr array or callable, optional
        Integer array of the same shape to write into; a zarr array keeps the labels out of core
        (each slab is then scanned twice instead of held in memory). A callable ``out(n)`` is
        called once the number of clusters ``n`` is known (after the first pass) and returns the
        array to write into, e.g. a zarr array of :func:`cluster_dtype` ``(n)``.

    Returns
    -------
    cluster_labels : ndarray or zarr array of int32 (int64 above 2³¹ − 1 voxels)
        0 where not non-wetting, else the cluster id; ids 1..n in the order of each cluster's first
        voxel in C order. The dtype of ``out`` when given.
    n : int
        Number of clusters.

    References
    ----------
    Wu, Otoo & Suzuki (2009), Pattern Anal. Appl. 12, 117–135 (label equivalences by union–find).
    """
    src = _Source(labels, step="clusters")
    nz, ny, nx = src.shape
    dtype = np.int32 if nz * ny * nx < 2**31 - 1 else np.int64
    factory = out if callable(out) else None
    if factory is None:
        out = _check_out(np.empty(src.shape, dtype) if out is None else out, src.shape, 0)
        if chunks is None and not isinstance(out, np.ndarray):
            chunks = out.chunks[0]
    depth = _depth(chunks, src)
    starts = list(range(0, nz, depth))
    reach = 0 if connectivity == 6 else 1
    _structure(connectivity)

    # per-worker buffers, reused across slabs (first touch of fresh memory is slow)
    nw = resolve_threads(threads)
    states = [_ScanState(depth * ny + 1) for _ in range(nw)]
    # runs of the first pass kept for the second, up to RUN_BUDGET bytes (beyond it slabs are
    # read and scanned again: memory stays bounded whatever the volume size)
    kept: list[tuple[np.ndarray, ...] | None] = [None] * len(starts)
    kept_bytes = [0]
    lock = threading.Lock()
    pos_dtype = np.uint16 if nx <= np.iinfo(np.uint16).max else np.int32
    lab_dtype = np.int32 if depth * ny * nx < 2**31 - 1 else np.int64

    def scan(w: int, a: int) -> tuple[_ScanState, int]:
        """Runs and provisional labels of slab [a, a + depth); returns the worker state and the
        number of provisional labels."""
        st = states[w]
        planes = src.region((a, 0, 0), (min(a + depth, nz), ny, nx), st.scratch, "codes")
        _check_codes(planes)
        n, _, st.starts, st.ends, st.lab, st.parent, st.first = _scan_runs(
            planes.astype(np.uint8, copy=False), st.starts, st.ends, st.rowptr, st.lab,
            st.parent, st.first, reach)
        return st, n

    def first_pass(w, a):
        st, n = scan(w, a)
        t = min(a + depth, nz) - a
        local, first = _compact(st.parent, st.first, n, a * ny * nx)
        faces = np.empty((2, 1, ny, nx), np.int32)
        runs = st.starts, st.ends, st.rowptr, st.lab
        _paint_runs(faces[0], 0, 0, ny, *runs, local)
        _paint_runs(faces[1], t - 1, 0, ny, *runs, local)
        nr = int(st.rowptr[t * ny])
        size = nr * (2 * np.dtype(pos_dtype).itemsize + np.dtype(lab_dtype).itemsize) + 8 * t * ny
        with lock:
            keep = kept_bytes[0] + size <= RUN_BUDGET
            kept_bytes[0] += size if keep else 0
        if keep:
            kept[a // depth] = (st.starts[:nr].astype(pos_dtype), st.ends[:nr].astype(pos_dtype),
                                st.rowptr[:t * ny + 1].copy(), st.lab[:nr].astype(lab_dtype))
        return local, first, faces[0, 0], faces[1, 0]

    res = run_parallel(iter(starts), first_pass, threads)
    counts = np.array([r[1].size for r in res], np.int64)
    offsets = np.concatenate([[0], np.cumsum(counts)])
    total = int(offsets[-1])
    # union–find over pieces (id = slab offset + local id, 1-based) across slab faces
    firsts = np.concatenate([[-1]] + [r[1] for r in res]).astype(np.int64)
    parent = np.arange(total + 1, dtype=np.int64)
    for s in range(1, len(starts)):
        _unite_faces(res[s - 1][3], res[s][2], offsets[s - 1], offsets[s], parent, firsts,
                     0 if connectivity == 6 else 1)
    roots = _roots(parent)
    is_root = roots[1:] == np.arange(1, total + 1)
    ncomp = int(is_root.sum())
    rank = np.zeros(total + 1, np.int64)     # roots ordered by first voxel: final ids 1..n
    root_ids = np.flatnonzero(is_root) + 1
    rank[root_ids[np.argsort(firsts[root_ids], kind="stable")]] = np.arange(1, ncomp + 1)
    lut = rank[roots]
    if factory is not None:
        out = _check_out(factory(ncomp), src.shape, ncomp)
    else:
        _check_out(out, src.shape, ncomp)
    odtype = np.dtype(out.dtype)
    in_memory = isinstance(out, np.ndarray)

    def second_pass(w, s):
        a = starts[s]
        t = min(a + depth, nz) - a
        runs, kept[s] = kept[s], None
        if runs is None:
            st, _ = scan(w, a)
            runs = st.starts, st.ends, st.rowptr, st.lab
        local = res[s][0]
        table = np.where(local > 0, lut[np.where(local > 0, local + offsets[s], 0)], 0)
        table = table.astype(odtype)
        target = out[a:a + t] if in_memory else None
        if target is not None and target.flags.c_contiguous:
            _paint_runs(target, 0, 0, ny, *runs, table)
            return
        # a band of chunk rows at a time (zarr: whole chunks, bounded encoder memory)
        step = out.chunks[1] if not in_memory else ny
        for y0 in range(0, ny, step):
            band = states[w].scratch.get("out", (t, min(step, ny - y0), nx), odtype)
            _paint_runs(band, 0, y0, ny, *runs, table)
            out[a:a + t, y0:y0 + band.shape[1]] = band

    run_parallel(iter(range(len(starts))), second_pass, threads)
    return out, int(ncomp)


class _ScanState:
    """Reused buffers of one labelling worker: runs, union–find forest, slab reads."""

    def __init__(self, rows: int):
        self.starts = np.empty(1 << 16, np.int32)
        self.ends = np.empty(1 << 16, np.int32)
        self.lab = np.empty(1 << 16, np.int64)
        self.parent = np.empty(1 << 16, np.int64)
        self.first = np.empty(1 << 16, np.int64)
        self.rowptr = np.empty(rows, np.int64)
        self.scratch = Scratch()


def _check_out(out, shape: tuple[int, ...], largest: int):
    """``out`` must be an integer array of ``shape`` whose dtype holds ids up to ``largest``."""
    if tuple(out.shape) != shape or np.dtype(out.dtype).kind not in "iu":
        raise WetpathError(f"out must be an integer array of shape {shape}, got "
                           f"{tuple(out.shape)} {out.dtype}", step="clusters")
    if largest > np.iinfo(np.dtype(out.dtype)).max:
        raise WetpathError(f"out dtype {out.dtype} is too small for {largest} clusters",
                           step="clusters")
    return out


# ----------------------------------------------------------------------------- per-cluster measures
_ACC = 12   # voxels, Σz, Σy, Σx, nw×3 classes, ns×3 classes, 8·χ, touches


def _pair_table() -> tuple[np.ndarray, ...]:
    """The 28 corner pairs of a cube: slots s, t, direction class, ×4 weight."""
    s_, t_, c_, w_ = [], [], [], []
    for s in range(8):
        for t in range(s + 1, 8):
            steps = int(np.abs(CUBE_CORNERS[s] - CUBE_CORNERS[t]).sum())
            s_.append(s)
            t_.append(t)
            c_.append(steps - 1)
            w_.append((1, 2, 4)[steps - 1])
    return tuple(np.array(x, np.int64) for x in (s_, t_, c_, w_))


@njit(cache=True, nogil=True)
def _cluster_cubes(codes, clus, nk, zbase, j0, j1, cube, single, e8, ps, pt, pc, pw,
                   corners, acc, bbmin, bbmax):
    """Accumulate per-cluster sums over the cubes of one padded slab.

    ``codes``/``clus`` have shape (≥ nk + 1, ny + 2, nx + 2): padded index (k, j, i) is voxel
    (zbase − 1 + k, j − 1, i − 1); cubes with origin k ∈ [0, nk), j ∈ [j0, j1) are
    counted. ``cube[idx]`` holds the ×4 n–w and n–s pair counts per
    direction class, 8·χ of the n corners and "holds an excluded voxel" of configuration idx.
    ``single``: a cube holds at most one cluster (26-connectivity), so the label of its first n
    corner stands for all. Returns the number of n voxels without a cluster id.
    """
    ni = codes.shape[2] - 1
    bad = 0
    labs = np.zeros(8, np.int64)
    cods = np.zeros(8, np.int64)
    full = e8[255]                     # 8·χ of a cube of n voxels only (no pairs, no excluded)
    cm = np.zeros(ni + 1, np.uint8)
    for k in range(nk):
        for j in range(j0, j1):
            r0 = codes[k, j]
            r1 = codes[k, j + 1]
            r2 = codes[k + 1, j]
            r3 = codes[k + 1, j + 1]
            # n corners of every column of the row pair, one bit per slot (a simple loop the
            # compiler vectorises); cubes without n corners are skipped before their
            # configuration is built
            for i in range(ni + 1):
                cm[i] = ((r0[i] == 3) | ((r1[i] == 3) << 1) | ((r2[i] == 3) << 2)
                         | ((r3[i] == 3) << 3))
            for i in range(ni):
                m = np.int64(cm[i]) | (np.int64(cm[i + 1]) << 4)
                if m == 0:
                    continue
                idx = (np.int64(r0[i]) | (np.int64(r1[i]) << 2) | (np.int64(r2[i]) << 4)
                       | (np.int64(r3[i]) << 6) | (np.int64(r0[i + 1]) << 8)
                       | (np.int64(r1[i + 1]) << 10) | (np.int64(r2[i + 1]) << 12)
                       | (np.int64(r3[i + 1]) << 14))
                # far corner voxel: volume, centroid and box
                if r3[i + 1] == 3:
                    lab = clus[k + 1, j + 1, i + 1]
                    if lab <= 0:
                        bad += 1
                    else:
                        z = zbase + k
                        acc[lab, 0] += 1
                        acc[lab, 1] += z
                        acc[lab, 2] += j
                        acc[lab, 3] += i
                        bbmin[lab, 0] = min(bbmin[lab, 0], z)
                        bbmin[lab, 1] = min(bbmin[lab, 1], j)
                        bbmin[lab, 2] = min(bbmin[lab, 2], i)
                        bbmax[lab, 0] = max(bbmax[lab, 0], z)
                        bbmax[lab, 1] = max(bbmax[lab, 1], j)
                        bbmax[lab, 2] = max(bbmax[lab, 2], i)
                if single:
                    if m == 255:
                        lab = clus[k, j, i]
                        if lab > 0:
                            acc[lab, 10] += full
                        continue
                    s = 0
                    while not (m >> s) & 1:
                        s += 1
                    lab = clus[k + corners[s, 0], j + corners[s, 1], i + corners[s, 2]]
                    if lab > 0:
                        for q in range(7):
                            acc[lab, 4 + q] += cube[idx, q]
                        if cube[idx, 7]:
                            acc[lab, 11] = 1
                    continue
                first = -1
                mixed = False
                for s in range(8):
                    if (m >> s) & 1:
                        lab = clus[k + corners[s, 0], j + corners[s, 1], i + corners[s, 2]]
                        labs[s] = lab
                        if first < 0:
                            first = lab
                        elif lab != first:
                            mixed = True
                    else:
                        labs[s] = 0
                if not mixed:
                    if first <= 0:
                        continue
                    for q in range(7):
                        acc[first, 4 + q] += cube[idx, q]
                    if cube[idx, 7]:
                        acc[first, 11] = 1
                    continue
                # several clusters in one cube (possible with 6-connectivity only)
                for s in range(8):
                    cods[s] = (idx >> (2 * s)) & 3
                for s in range(8):
                    lab = labs[s]
                    if lab <= 0:
                        continue
                    seen = False
                    for u in range(s):
                        if labs[u] == lab:
                            seen = True
                    if seen:
                        continue
                    mask = 0
                    for u in range(8):
                        if labs[u] == lab:
                            mask |= 1 << u
                    acc[lab, 10] += e8[mask]
                    if cube[idx, 7]:
                        acc[lab, 11] = 1
                    for p in range(ps.size):
                        a, b = ps[p], pt[p]
                        if labs[a] == lab and labs[b] != lab:
                            other = cods[b]
                        elif labs[b] == lab and labs[a] != lab:
                            other = cods[a]
                        else:
                            continue
                        if other == 2:
                            acc[lab, 4 + pc[p]] += pw[p]
                        elif other == 1:
                            acc[lab, 7 + pc[p]] += pw[p]
    return bad


@njit(cache=True, nogil=True)
def _band_range(codes, ids):
    """Largest code, smallest and largest id of two equally shaped 3-D views (0s when empty)."""
    cmax = 0
    imin = 0
    imax = 0
    nz, ny, nx = codes.shape
    for z in range(nz):
        for y in range(ny):
            for x in range(nx):
                c = np.int64(codes[z, y, x])
                v = np.int64(ids[z, y, x])
                cmax = max(cmax, c)
                imin = min(imin, v)
                imax = max(imax, v)
    return cmax, imin, imax


def _sums(size: int, old: tuple[np.ndarray, ...] | None = None) -> tuple[np.ndarray, ...]:
    """Per-cluster sums, box minima and maxima for ids 0..size − 1, holding ``old``'s rows."""
    big = np.iinfo(np.int64).max
    new = (np.zeros((size, _ACC), np.int64), np.full((size, 3), big, np.int64),
           np.full((size, 3), -1, np.int64))
    if old is not None:
        for a, b in zip(new, old, strict=True):
            a[:b.shape[0]] = b
    return new


def cluster_lattice_measures(labels, cluster_labels, voxel_size: float = 1.0, *,
                             connectivity: int = 26, n: int | None = None, chunks=None,
                             threads: int | None = None) -> pd.DataFrame:
    """Per-cluster volumes, centroids, boxes, Crofton areas and Euler characteristics.

    Parameters
    ----------
    labels : ndarray, zarr array or dask array, shape (z, y, x)
        Canonical phase codes.
    cluster_labels : array of int, same shape
        Cluster ids (0 where not n) from :func:`label_clusters` with the same ``connectivity``
        (with 26, all n voxels of a 2×2×2 cube are taken to be one cluster).
    voxel_size : float
        Voxel edge length h; volumes in h³, areas in h².
    connectivity : {26, 6}
        Adjacency used for each cluster's χ (the complement takes the other one).
    n : int, optional
        Largest cluster id, if known: larger ids are an error.
    chunks, threads
        Slab depth and worker threads as in :func:`wetpath._lattice.lattice_measures`.

    Returns
    -------
    DataFrame
        One row per cluster id present: ``cluster, voxels, volume`` (h³), ``centroid_z/y/x``
        (mean voxel index), ``bbox_z0, bbox_y0, bbox_x0`` (first index) ``bbox_z1, bbox_y1,
        bbox_x1`` (one past the last), ``area_nw, area_ns`` (h², Crofton pairs attributed to the
        cluster on their n side), ``euler_n``, ``touches_border`` (the cluster is 26-adjacent to the
        array border or to an excluded voxel). Sums of the areas over clusters equal the state's
        ``area_nw`` and ``area_ns`` exactly.

    References
    ----------
    Ohser & Mücklich (2000), *Statistical Analysis of Microstructures in Materials Science*, Wiley;
    Ohser, Nagel & Schladitz (2003), Image Anal. Stereol. 22, 11–19.
    """
    h = _check_voxel_size(voxel_size)
    _structure(connectivity)
    e8 = euler_lut(connectivity)
    src = _Source(labels, step="clusters")
    csrc = _Source(cluster_labels, name="cluster_labels", step="clusters")
    if csrc.shape != src.shape:
        raise WetpathError(f"cluster_labels shape {csrc.shape} differs from labels shape "
                           f"{src.shape}", step="clusters")
    depth = _depth(chunks, src)
    nw = resolve_threads(threads)
    # per-worker sums, grown by each worker to the largest id read so far (no extra pass)
    size = 1 if n is None else n + 1
    accs = [_sums(size) for _ in range(nw)]
    pairs = _lut("pairs")
    nmask = _lut("masks")[:, 3].astype(np.int64)
    # compact per-configuration table (8 bytes a row): nw ×3, ns ×3, 8·χ_n, excluded; all entries
    # lie in −128..127 (×4 pair counts ≤ 24, 8·χ of 8 voxels ≤ 8 in magnitude)
    cube = np.ascontiguousarray(np.concatenate(
        [pairs[:, 0:3], pairs[:, 6:9], e8[nmask][:, None], (_lut("masks")[:, 0] > 0)[:, None]],
        axis=1).astype(np.int8))
    ps, pt, pc, pw = _pair_table()

    nz, ny, nx = src.shape
    # Two padded slab buffers, filled alternately by the producer while the workers read the
    # other one; each slab is cut into ``nw`` row ranges, one item per range. A buffer is refilled
    # only when no item of its previous slab is pending. Zero borders in y and x stay zero: only
    # interiors are written.
    bufs = [(np.zeros((depth + 1, ny + 2, nx + 2), np.uint8),
             np.zeros((depth + 1, ny + 2, nx + 2), csrc.dtype)) for _ in range(2)]
    cuts = np.linspace(0, ny + 1, nw + 1).round().astype(int)
    band = (csrc.chunk_shape() or (0, ny))[1]
    pending = [0, 0]
    cond = threading.Condition()
    scratch = Scratch()

    def items():
        top = 0
        for s, a in enumerate(range(0, nz + 1, depth)):
            b = min(a + depth, nz + 1)
            with cond:
                cond.wait_for(lambda i=s % 2: pending[i] == 0)
                pending[s % 2] = nw
            codes, clus = bufs[s % 2]
            if a == 0:
                codes[0] = 0
                clus[0] = 0
            else:                                # halo plane a − 1: last plane of the last slab
                prev_codes, prev_clus = bufs[(s - 1) % 2]
                codes[0] = prev_codes[depth]
                clus[0] = prev_clus[depth]
            hi = min(b, nz)
            for y0 in range(0, ny, band) if a < hi else ():    # chunk rows: bounded memory
                y1 = min(y0 + band, ny)
                # decoded straight into the padded buffers (zarr) or copied
                box = (a, y0, 0), (hi, y1, nx)
                if src.dtype == np.uint8:
                    fresh = src.read_into(*box, codes[1:1 + hi - a, 1 + y0:1 + y1, 1:-1])
                else:
                    fresh = src.region(*box, scratch, "codes")
                    _check_codes(fresh)
                    codes[1:1 + hi - a, 1 + y0:1 + y1, 1:-1] = fresh
                ids = csrc.read_into(*box, clus[1:1 + hi - a, 1 + y0:1 + y1, 1:-1])
                # value checks of both bands in one compiled pass (no strided numpy reductions)
                cmax, imin, imax = _band_range(codes[1:1 + hi - a, 1 + y0:1 + y1, 1:-1], ids)
                if cmax > 3:
                    _check_codes(fresh)
                top = max(top, imax)
                if (n is not None and top > n) or imin < 0:
                    raise WetpathError("cluster ids must not be negative" if n is None else
                                       f"cluster ids must lie in 0..{n}", step="clusters")
            if b > nz:
                codes[1 + nz - a] = 0
                clus[1 + nz - a] = 0
            for p in range(nw):
                yield s % 2, a, b - a, cuts[p], cuts[p + 1], top

    def work(w, item):
        which, a, nk, j0, j1, top = item
        codes, clus = bufs[which]
        if accs[w][0].shape[0] <= top:
            accs[w] = _sums(max(top + 1, 2 * accs[w][0].shape[0]), accs[w])
        try:
            bad = _cluster_cubes(codes, clus, nk, a, j0, j1, cube, connectivity == 26, e8, ps, pt,
                                 pc, pw, CUBE_CORNERS, *accs[w])
        finally:
            with cond:
                pending[which] -= 1
                cond.notify_all()
        if bad:
            raise WetpathError(f"{bad} non-wetting voxels have no cluster id in cluster_labels",
                               step="clusters")

    run_parallel(items(), work, threads, max_pending=nw)
    size = max(a[0].shape[0] for a in accs)
    accs = [_sums(size, a) for a in accs]
    acc = np.sum([a[0] for a in accs], axis=0)
    acc[:, 11] = np.max([a[0][:, 11] for a in accs], axis=0)
    bbmin = np.min([a[1] for a in accs], axis=0)
    bbmax = np.max([a[2] for a in accs], axis=0)
    ids = np.flatnonzero(acc[:, 0] > 0)
    a = acc[ids]
    vox = a[:, 0]
    f = _class_factors()
    return pd.DataFrame({
        "cluster": ids, "voxels": vox, "volume": vox * h**3,
        "centroid_z": a[:, 1] / vox, "centroid_y": a[:, 2] / vox, "centroid_x": a[:, 3] / vox,
        "bbox_z0": bbmin[ids, 0], "bbox_y0": bbmin[ids, 1], "bbox_x0": bbmin[ids, 2],
        "bbox_z1": bbmax[ids, 0] + 1, "bbox_y1": bbmax[ids, 1] + 1, "bbox_x1": bbmax[ids, 2] + 1,
        "area_nw": (a[:, 4:7] * f).sum(axis=1) * h * h,
        "area_ns": (a[:, 7:10] * f).sum(axis=1) * h * h,
        "euler_n": a[:, 10] // 8, "touches_border": a[:, 11] > 0,
    }, columns=CLUSTER_COLUMNS)
