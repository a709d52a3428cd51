"""Streaming 2×2×2 configuration histogram: volumes, Crofton pair areas, Euler characteristics.

One pass over a canonical label volume (0 excluded, 1 solid, 2 wetting, 3 non-wetting) counts the
4⁸ = 65 536 possible configurations of the eight voxels of every 2×2×2 lattice cube. Volumes,
pair areas and Euler characteristics are linear in that histogram, so they follow from it by lookup
tables, exactly and independently of how the volume was cut into slabs.

Conventions
-----------
* Axis order (z, y, x); lengths in the unit of ``voxel_size`` (isotropic).
* **Image border**: the array is surrounded by a virtual layer of excluded voxels. Cubes are
  indexed by their origin o ∈ [−1, N−1] along each axis, so every voxel is the far corner (o + 1)
  of exactly one cube and every lattice pair of real voxels lies in all the cubes that can hold it.
  Excluded and virtual voxels belong to no phase: no volume, no pair, and they are "not the phase"
  for χ. This is the zero padding that :func:`skimage.measure.euler_number` applies, so χ matches
  it on the array.
* **Slabs**: the volume is streamed as z-slabs of ``chunks`` planes (whole y, x extent) with a
  one-plane halo carried over from the previous slab, so each stored chunk is decoded once and peak
  memory is a few slabs. A cube belongs to the slab holding its far corner; counts are integers, so
  results are identical for every slab thickness.
* **Blocks**: per-block sums over fixed ``block``³ sub-volumes (a cube belongs to the block of its
  far corner, clamped to the last block) for bootstrap estimates over sub-volumes.

References
----------
Crofton pair counts: J. Ohser & F. Mücklich (2000), *Statistical Analysis of Microstructures in
Materials Science*, Wiley; C. Lang, J. Ohser & R. Hilfer (2001), J. Microsc. 203, 303–313;
K. Schladitz, J. Ohser & W. Nagel (2006), in *Discrete Geometry for Computer Imagery*, LNCS 4245,
247–258 (direction weights). Euler characteristic from 2×2×2 configurations with the complementary
(26, 6) adjacency pair: J. Ohser, W. Nagel & K. Schladitz (2003), Image Anal. Stereol. 22, 11–19.
"""

from __future__ import annotations

import math
import os
import queue
import threading
from collections.abc import Callable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from itertools import combinations

import numpy as np
import pandas as pd
from numba import njit

from ._errors import WetpathError

__all__ = ["lattice_measures", "lattice_histogram", "lattice_histogram_reference",
           "euler_lut", "CUBE_CORNERS", "NBINS"]

NBINS = 4**8
BLOCK_COLUMNS = ["block", "block_z", "block_y", "block_x", "bulk_volume", "pore_volume",
                 "volume_w", "volume_n", "area_nw", "area_ws", "area_ns"]

# Bin index of a cube: 2 bits per corner; corner slot s holds the voxel at offset
# (dz, dy, dx) = ((s >> 1) & 1, s & 1, s >> 2), i.e. idx = col(x) | col(x + 1) << 8 with
# col = v[z, y] | v[z, y+1] << 2 | v[z+1, y] << 4 | v[z+1, y+1] << 6.
CUBE_CORNERS = np.array([((s >> 1) & 1, s & 1, s >> 2) for s in range(8)], dtype=np.int64)
_FAR_CORNER = int(np.flatnonzero((CUBE_CORNERS == 1).all(axis=1))[0])

# Crofton direction classes: (lattice length |v|, weight W per ± direction, cubes holding a pair).
# Weights: Schladitz, Ohser & Nagel (2006) as quoted in METHODS.md §1; they sum to 1 over the 13
# directions.
_CLASSES = ((1.0, 0.0915558, 4), (math.sqrt(2.0), 0.0739613, 2), (math.sqrt(3.0), 0.0703913, 1))
_PAIR_TYPES = ((3, 2), (2, 1), (3, 1))          # nw, ws, ns
_PAIR_NAMES = ("nw", "ws", "ns")


def _class_factors() -> np.ndarray:
    """Area per unit of the ×4-scaled pair count of each class: 2 W / |v| / 4 (voxel units)."""
    return np.array([2 * w / length / 4 for length, w, _ in _CLASSES])


# ----------------------------------------------------------------------------- lookup tables
def _binary_masks() -> np.ndarray:
    """(65536, 4) uint8: bit mask of the corners holding each code 0..3."""
    idx = np.arange(NBINS)
    codes = (idx[:, None] >> (2 * np.arange(8))[None, :]) & 3
    return np.stack([((codes == c) * (1 << np.arange(8))).sum(axis=1) for c in range(4)],
                    axis=1).astype(np.int64)


def euler_lut(connectivity: int = 26) -> np.ndarray:
    """8·χ contribution of a binary 2×2×2 configuration (256 entries, int64).

    For ``connectivity=26`` the foreground is the union of closed voxel cubes (26-adjacency, its
    complement 6-adjacent): around the lattice point shared by the eight voxels, count the
    incident cells of that complex — the point, 6 half-edges (each shared by 4 voxels), 12 quarter
    faces (shared by 2 voxels) and 8 voxels — with weights 1, −1/2, 1/4, −1/8 for the cells that
    lie in the set. For ``connectivity=6`` the voxels are vertices of the dual cubical complex
    (6-adjacency, complement 26-adjacent): 8 vertices (weight 1/8), 12 edges (−1/4), 6 squares
    (1/2), 1 cube (−1). Both give integers ×8 (Ohser, Nagel & Schladitz 2003).
    """
    if connectivity not in (6, 26):
        raise WetpathError(f"connectivity must be 6 or 26, got {connectivity}", step="lattice")
    pos = CUBE_CORNERS
    out = np.zeros(256, np.int64)
    for m in range(256):
        on = [(m >> s) & 1 for s in range(8)]
        if connectivity == 26:
            total = 8 * any(on) - sum(on)
            for ax in range(3):                      # half-edges: voxels on one side along ax
                for side in (0, 1):
                    total -= 4 * any(on[s] for s in range(8) if pos[s, ax] == side)
            for ax in range(3):                      # quarter faces in the plane normal to ax
                others = [a for a in range(3) if a != ax]
                for q0 in (0, 1):
                    for q1 in (0, 1):
                        total += 2 * any(on[s] for s in range(8)
                                         if pos[s, others[0]] == q0 and pos[s, others[1]] == q1)
        else:
            total = sum(on) - 8 * all(on)
            for s, t in combinations(range(8), 2):
                if np.abs(pos[s] - pos[t]).sum() == 1:
                    total -= 2 * (on[s] and on[t])
            for ax in range(3):
                for side in (0, 1):
                    total += 4 * all(on[s] for s in range(8) if pos[s, ax] == side)
        out[m] = total
    return out


def _pair_counts_lut() -> np.ndarray:
    """(65536, 9) int64: ×4-scaled pair counts per (pair type nw/ws/ns, direction class) of a cube.

    A pair along an axis lies in 4 cubes, a face diagonal in 2, a body diagonal in 1: weighting by
    4 / (cubes holding it) counts every lattice pair exactly 4 times over the whole cube lattice.
    """
    idx = np.arange(NBINS)
    codes = (idx[:, None] >> (2 * np.arange(8))[None, :]) & 3
    out = np.zeros((NBINS, 9), np.int64)
    for s, t in combinations(range(8), 2):
        steps = int(np.abs(CUBE_CORNERS[s] - CUBE_CORNERS[t]).sum())
        cls = steps - 1
        weight = 4 // _CLASSES[cls][2]
        for p, (a, b) in enumerate(_PAIR_TYPES):
            cs, ct = codes[:, s], codes[:, t]
            hit = ((cs == a) & (ct == b)) | ((cs == b) & (ct == a))
            out[:, 3 * p + cls] += weight * hit
    return out


def _block_lut() -> np.ndarray:
    """(65536, 16) int64 per-cube integer sums: far-corner voxel count per code (4), ×4 pair counts
    (9), 8·χ of s, w, n with 26-connectivity (3)."""
    far = (np.arange(NBINS) >> (2 * _FAR_CORNER)) & 3
    masks = _binary_masks()
    e26 = euler_lut(26)
    cols = [np.eye(4, dtype=np.int64)[far], _pair_counts_lut(),
            np.stack([e26[masks[:, c]] for c in (1, 2, 3)], axis=1)]
    return np.ascontiguousarray(np.concatenate(cols, axis=1))


_LUTS: dict[str, np.ndarray] = {}


def _lut(name: str) -> np.ndarray:
    if name not in _LUTS:
        _LUTS["block"] = _block_lut()
        _LUTS["masks"] = _binary_masks()
        _LUTS["e26"] = euler_lut(26)
        _LUTS["e6"] = euler_lut(6)
        _LUTS["pairs"] = _pair_counts_lut()
    return _LUTS[name]


# ----------------------------------------------------------------------------- compiled kernels
@njit(cache=True, nogil=True, inline="always")
def _count_row(r0, r1, r2, r3, x0, x1, nx, hist):
    """Cubes with x origin in [x0, x1) on one row pair: r0 = (z, y), r1 = (z, y+1), r2 = (z+1, y),
    r3 = (z+1, y+1). Column x = −1 and x = nx are the virtual excluded layer."""
    if x0 >= 0:
        prev = (np.int64(r0[x0]) | (np.int64(r1[x0]) << 2) | (np.int64(r2[x0]) << 4)
                | (np.int64(r3[x0]) << 6))
    else:
        prev = np.int64(0)
    for x in range(x0 + 1, min(x1, nx - 1) + 1):
        c = (np.int64(r0[x]) | (np.int64(r1[x]) << 2) | (np.int64(r2[x]) << 4)
             | (np.int64(r3[x]) << 6))
        hist[prev | (c << 8)] += 1
        prev = c
    if x1 == nx:
        hist[prev] += 1


@njit(cache=True, nogil=True)
def _count_cubes(planes, z0, z1, y0, y1, x0, x1, hist, zero):
    """Add the cubes with origin z ∈ [z0, z1) (plane index; plane z + 1 must exist), y ∈ [y0, y1),
    x ∈ [x0, x1) to ``hist``. y and x may be −1 and reach ny − 1, nx − 1: rows and columns outside
    the array are the virtual excluded layer (``zero`` is a zero row of length ≥ nx)."""
    ny = planes.shape[1]
    nx = planes.shape[2]
    for z in range(z0, z1):
        for y in range(y0, y1):
            if y >= 0 and y + 1 < ny:
                _count_row(planes[z, y], planes[z, y + 1], planes[z + 1, y], planes[z + 1, y + 1],
                           x0, x1, nx, hist)
            elif y < 0 and ny > 0:
                _count_row(zero, planes[z, 0], zero, planes[z + 1, 0], x0, x1, nx, hist)
            elif y >= 0:
                _count_row(planes[z, y], zero, planes[z + 1, y], zero, x0, x1, nx, hist)


@njit(cache=True, nogil=True)
def _slab_blocks(planes, oz0, zsplit, ysplit, xsplit, lut, hist_total, hist, zero, out):
    """Histogram the cubes of one slab, block by block.

    ``planes[k]`` is voxel plane oz0 + k (global z); ``zsplit``/``ysplit``/``xsplit`` are the block
    boundaries of cube origins (global), so that sub-region (i, j, k) is
    [zsplit[i], zsplit[i+1]) × [ysplit[j], ysplit[j+1]) × [xsplit[k], xsplit[k+1]).
    ``out[i, j, k]`` receives the integer block sums ``hist_sub @ lut``; ``hist_total`` the counts.
    """
    ncol = lut.shape[1]
    for i in range(zsplit.size - 1):
        for j in range(ysplit.size - 1):
            for k in range(xsplit.size - 1):
                _count_cubes(planes, zsplit[i] - oz0, zsplit[i + 1] - oz0, ysplit[j],
                             ysplit[j + 1], xsplit[k], xsplit[k + 1], hist, zero)
                for b in range(hist.size):
                    h = hist[b]
                    if h != 0:
                        hist_total[b] += h
                        for c in range(ncol):
                            out[i, j, k, c] += h * lut[b, c]
                        hist[b] = 0


# ----------------------------------------------------------------------------- sources and slabs
class _Source:
    """Uniform read access to a numpy, zarr or dask array of shape (z, y, x)."""

    def __init__(self, arr, name: str = "labels", step: str = "lattice"):
        shape = getattr(arr, "shape", None)
        if shape is None or len(shape) != 3:
            arr = np.asarray(arr)
            shape = arr.shape
        if len(shape) != 3:
            raise WetpathError(f"{name} must be a 3D array (z, y, x), got shape {tuple(shape)}",
                               step=step)
        dtype = np.dtype(arr.dtype)
        if dtype.kind not in "iub":
            raise WetpathError(f"{name} must hold integers, got dtype {dtype}", step=step)
        self.arr, self.shape, self.dtype = arr, tuple(map(int, shape)), dtype
        self.name, self.step = name, step
        self.is_numpy = isinstance(arr, np.ndarray)
        self.is_dask = hasattr(arr, "dask") and hasattr(arr, "compute")
        # zarr arrays decode straight into a caller's buffer (no fresh allocation per read)
        self.into = (not self.is_numpy and not self.is_dask
                     and hasattr(arr, "get_basic_selection") and hasattr(arr, "metadata"))

    def default_depth(self, fallback: int = 64) -> int:
        chunks = self.chunk_shape()
        return fallback if chunks is None else chunks[0]

    def read(self, z0: int, z1: int) -> np.ndarray:
        """Planes [z0, z1) (clipped to the array), whole (y, x) extent, C-contiguous."""
        return self.region((z0, 0, 0), (z1,) + self.shape[1:])

    def region(self, lo, hi, scratch: Scratch | None = None, key: str = "region") -> np.ndarray:
        """Box [lo, hi) clipped to the array, C-contiguous (a view for numpy when possible).

        With ``scratch``, a zarr array is decoded into the reused buffer ``key`` of it and a view
        of that buffer is returned: valid until the next read into the same key. Newly allocated
        memory is slow to touch the first time, so passes reuse one buffer per worker.
        """
        sl = tuple(slice(max(a, 0), min(b, n)) for a, b, n in zip(lo, hi, self.shape, strict=True))
        if scratch is not None and self.into:
            from zarr.core.buffer import default_buffer_prototype

            shape = tuple(max(s.stop - s.start, 0) for s in sl)
            view = scratch.get(key, shape, self.dtype)
            if view.size:
                self.arr.get_basic_selection(
                    sl, out=default_buffer_prototype().nd_buffer.from_numpy_array(view))
            return view
        out = self.arr[sl]
        if self.is_dask:
            out = out.compute(scheduler="synchronous")
        return np.ascontiguousarray(out)

    def read_into(self, lo, hi, out: np.ndarray) -> np.ndarray:
        """Fill ``out`` (any strides, the array's dtype) with the box [lo, hi) inside the array;
        a zarr array decodes straight into it."""
        if self.into:
            from zarr.core.buffer import default_buffer_prototype

            sl = tuple(slice(a, b) for a, b in zip(lo, hi, strict=True))
            if out.size:
                self.arr.get_basic_selection(
                    sl, out=default_buffer_prototype().nd_buffer.from_numpy_array(out))
        else:
            out[...] = self.region(lo, hi)
        return out

    def chunk_shape(self) -> tuple[int, int, int] | None:
        """Stored chunk shape of a zarr/dask array (None for numpy)."""
        if self.is_dask:
            return tuple(int(c) for c in self.arr.chunksize)
        chunks = getattr(self.arr, "chunks", None)
        if self.is_numpy or chunks is None or len(chunks) != 3:
            return None
        return tuple(int(c) for c in chunks)


class Scratch:
    """Named reusable buffers of one worker: ``get(key, shape, dtype)`` returns a C-contiguous
    view of a flat buffer that grows when needed and is otherwise reused (its content is not
    cleared)."""

    def __init__(self):
        self._bufs: dict[str, np.ndarray] = {}

    def get(self, key: str, shape, dtype) -> np.ndarray:
        dtype = np.dtype(dtype)
        n = int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
        buf = self._bufs.get(key)
        if buf is None or buf.size < n:
            buf = self._bufs[key] = np.empty(max(n, 1), np.uint8)
        return buf[:n].view(dtype).reshape(shape)


def _depth(chunks, src: _Source) -> int:
    if chunks is None:
        return src.default_depth()
    depth = int(chunks if np.isscalar(chunks) else chunks[0])
    if depth < 1:
        raise WetpathError(f"chunk depth must be at least 1, got {depth}", step=src.step)
    return depth


def _as_codes(planes: np.ndarray, src: _Source) -> np.ndarray:
    if planes.dtype == np.uint8:
        return planes
    if planes.size and (planes.min() < 0 or planes.max() > 3):
        _bad_codes(src)
    return planes.astype(np.uint8)


def _bad_codes(src: _Source):
    raise WetpathError(f"{src.name} must hold canonical phase codes 0..3 (map them with "
                       "to_canonical first)", step=src.step)


def iter_slabs(src: _Source, depth: int,
               convert: Callable[[np.ndarray], np.ndarray] | None = None, ring: int = 0
               ) -> Iterator[tuple[int, int, np.ndarray]]:
    """Stream an array as z-slabs of cubes with a one-plane halo.

    Yields ``(a, b, planes)`` for far-corner ranges [a, b) tiling [0, N + 1): ``planes`` holds voxel
    planes [a − 1, b) with virtual zero planes outside the array. Each stored chunk is read once:
    the halo plane is carried over from the previous slab, not re-read. With ``ring`` > 0 the
    slabs of a stored array are decoded into a ring of that many reused buffers: a slab stays
    valid until ``ring`` − 1 more slabs have been produced, so ``threads`` + 1 suffice for
    :func:`run_parallel` (at most ``threads`` items pending while the next one is produced).
    """
    nz = src.shape[0]
    conv = convert or (lambda p: p)
    dtype = np.dtype(np.uint8) if convert else src.dtype
    bufs = [np.empty((depth + 1,) + src.shape[1:], dtype) for _ in range(ring)] \
        if ring and not src.is_numpy else []
    carry, carry_at = None, None
    for i, a in enumerate(range(0, nz + 1, depth)):
        b = min(a + depth, nz + 1)
        lo, hi = a - 1, b
        if src.is_numpy and lo >= 0 and hi <= nz:
            yield a, b, conv(src.read(lo, hi))
            continue
        start = max(lo, 0)
        if bufs:
            planes = bufs[i % ring][:hi - lo]
            if lo < 0:
                planes[0] = 0
            elif carry is not None and carry_at == lo:
                planes[0] = carry
                start = lo + 1
            if start < min(hi, nz):
                view = planes[start - lo:min(hi, nz) - lo]
                if src.into and src.dtype == dtype:
                    src.read_into((start, 0, 0), (min(hi, nz),) + src.shape[1:], view)
                else:
                    view[...] = conv(src.read(start, min(hi, nz)))
            if hi > nz:
                planes[nz - lo] = 0
            carry, carry_at = planes[-1], hi - 1
            yield a, b, planes
            continue
        zero = np.zeros((1,) + src.shape[1:], dtype)
        parts = [zero] if lo < 0 else []
        if carry is not None and carry_at == lo:
            parts.append(carry)
            start = lo + 1
        if start < min(hi, nz):
            parts.append(conv(src.read(start, min(hi, nz))))
        if hi > nz:
            parts.append(zero)
        planes = np.concatenate(parts) if len(parts) > 1 else parts[0]
        carry, carry_at = planes[-1:].copy(), hi - 1
        yield a, b, planes


def run_parallel(items: Iterator, work: Callable, threads: int | None,
                 max_pending: int | None = None):
    """Apply ``work(worker_index, item)`` to items of a sequential iterator on ``threads`` threads,
    at most ``max_pending`` (default ``threads``) items in flight besides the one being produced
    (bounds memory). Items are retired in order: the next item is produced only once every item
    ``max_pending`` or more places before it has finished, so a producer that reuses a ring of
    ``max_pending`` + 1 buffers (:func:`iter_slabs`) never overwrites one still being read, even
    when later items finish first. Each worker index is used by one thread at a time, so
    per-worker buffers need no lock. Results are returned in item order."""
    n = resolve_threads(threads)
    free: queue.Queue[int] = queue.Queue()
    for w in range(n):
        free.put(w)

    def run(item):
        w = free.get()
        try:
            return work(w, item)
        finally:
            free.put(w)

    if n == 1:
        return [work(0, item) for item in items]
    limit = max_pending or n
    futures: list[Future] = []
    with ThreadPoolExecutor(n) as pool:
        for k, item in enumerate(items):
            futures.append(pool.submit(run, item))
            if k >= limit:
                futures[k - limit].result()     # wait for the oldest, not for any one
        return [f.result() for f in futures]


def resolve_threads(threads: int | None) -> int:
    if threads is None:
        return max(1, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                   else os.cpu_count() or 1)
    if int(threads) < 1:
        raise WetpathError(f"threads must be at least 1, got {threads}", step="lattice")
    return int(threads)


def _splits(lo: int, hi: int, block: int, n: int) -> np.ndarray:
    """Cube-origin boundaries in [lo, hi) at block edges; block b holds origins
    [b·block − 1, (b + 1)·block − 1), the last block up to n − 1."""
    nb = max(1, -(-n // block))
    edges = [e * block - 1 for e in range(1, nb)]
    return np.array([lo] + [e for e in edges if lo < e < hi] + [hi], dtype=np.int64)


def _block_of(origin: int, block: int, n: int) -> int:
    nb = max(1, -(-n // block))
    return min((origin + 1) // block, nb - 1)


# ----------------------------------------------------------------------------- public functions
def _histogram_pass(labels, *, chunks, threads, block):
    src = _Source(labels)
    nz, ny, nx = src.shape
    depth = _depth(chunks, src)
    if block < 1:
        raise WetpathError(f"block must be at least 1, got {block}", step="lattice")
    lut = _lut("block")
    nbz, nby, nbx = (max(1, -(-n // block)) for n in src.shape)
    nw = resolve_threads(threads)
    hist_total = [np.zeros(NBINS, np.int64) for _ in range(nw)]
    scratch = [(np.zeros(NBINS, np.int64), np.zeros(nx + 1, np.uint8))
               for _ in range(nw)]
    blocks = np.zeros((nbz, nby, nbx, lut.shape[1]), np.int64)
    ysplit, xsplit = _splits(-1, ny, block, ny), _splits(-1, nx, block, nx)
    # blocks are disjoint between slabs only up to a shared z-block: guard the sum with a lock
    lock = threading.Lock()

    def work(w, item):
        a, b, planes = item
        hist, zero = scratch[w]
        if planes.size and planes.max() > 3:
            _bad_codes(src)
        zsplit = _splits(a - 1, b - 1, block, nz)
        out = np.zeros((zsplit.size - 1, ysplit.size - 1, xsplit.size - 1, lut.shape[1]), np.int64)
        _slab_blocks(planes, a - 1, zsplit, ysplit, xsplit, lut, hist_total[w], hist, zero, out)
        bz = [_block_of(int(z), block, nz) for z in zsplit[:-1]]
        with lock:
            for i, zb in enumerate(bz):
                blocks[zb] += _merge_xy(out[i], ysplit, xsplit, block, ny, nx, nby, nbx)

    # ring of reused slab buffers: at most ``nw`` slabs in flight besides the one being read
    run_parallel(iter_slabs(src, depth, convert=lambda p: _as_codes(p, src), ring=nw + 1), work,
                 threads)
    return src, np.sum(hist_total, axis=0), blocks


def _merge_xy(out, ysplit, xsplit, block, ny, nx, nby, nbx):
    res = np.zeros((nby, nbx, out.shape[-1]), np.int64)
    by = [_block_of(int(y), block, ny) for y in ysplit[:-1]]
    bx = [_block_of(int(x), block, nx) for x in xsplit[:-1]]
    for j, yb in enumerate(by):
        for k, xb in enumerate(bx):
            res[yb, xb] += out[j, k]
    return res


def lattice_histogram(labels, *, chunks=None, threads: int | None = None) -> np.ndarray:
    """Histogram of the 4⁸ configurations of all 2×2×2 cubes (compiled, streamed by slabs).

    Parameters
    ----------
    labels : ndarray, zarr array or dask array of uint8, shape (z, y, x)
        Canonical phase codes 0..3.
    chunks : int or tuple, optional
        Slab depth in planes (first element of a tuple); default the stored chunk depth or 64.
    threads : int, optional
        Worker threads (None: all cores).

    Returns
    -------
    ndarray of int64, shape (65536,)
        Cube counts by bin index (see ``CUBE_CORNERS`` for the bit layout), including the cubes that
        reach into the virtual excluded layer around the array; sums to (nz+1)(ny+1)(nx+1).
    """
    return _histogram_pass(labels, chunks=chunks, threads=threads, block=1 << 30)[1]


def lattice_histogram_reference(labels: np.ndarray) -> np.ndarray:
    """Plain numpy version of :func:`lattice_histogram` (test oracle): pad with one excluded layer,
    build every cube's bin index from shifted slices, ``np.bincount``."""
    v = np.pad(np.asarray(labels).astype(np.int64), 1)
    idx = np.zeros(tuple(n - 1 for n in v.shape), np.int64)
    for s, (dz, dy, dx) in enumerate(CUBE_CORNERS):
        idx |= v[dz:dz + idx.shape[0], dy:dy + idx.shape[1], dx:dx + idx.shape[2]] << (2 * s)
    return np.bincount(idx.ravel(), minlength=NBINS).astype(np.int64)


def measures_from_histogram(hist: np.ndarray, voxel_size: float = 1.0, *,
                            connectivity: int = 26) -> dict:
    """Volumes, Crofton pair areas and Euler characteristics from a configuration histogram.

    χ of each phase uses ``connectivity`` for the phase (6 or 26) and the complementary adjacency
    for everything else (excluded voxels included).
    """
    h = _check_voxel_size(voxel_size)
    hist = np.asarray(hist, np.int64)
    counts = hist @ _lut("block")
    if connectivity not in (6, 26):
        raise WetpathError(f"connectivity must be 6 or 26, got {connectivity}", step="lattice")
    e = _lut(f"e{connectivity}")
    masks = _lut("masks")
    euler = {c: int(hist @ e[masks[:, c]]) // 8 for c in (1, 2, 3)}
    return _assemble(counts[:4], counts[4:13], h) | {
        "euler_s": euler[1], "euler_w": euler[2], "euler_n": euler[3]}


def _areas(pair_counts: np.ndarray, h: float) -> np.ndarray:
    """Areas (nw, ws, ns) from ×4-scaled pair counts (..., 9)."""
    f = _class_factors()
    pc = np.asarray(pair_counts, np.float64).reshape(pair_counts.shape[:-1] + (3, 3))
    return (pc * f).sum(axis=-1) * h * h


def _assemble(vox: np.ndarray, pair_counts: np.ndarray, h: float) -> dict:
    v3 = h**3
    volume_s, volume_w, volume_n = (float(vox[c]) * v3 for c in (1, 2, 3))
    pore = volume_w + volume_n
    bulk = pore + volume_s
    a_nw, a_ws, a_ns = (float(x) for x in _areas(pair_counts, h))
    porosity = pore / bulk if bulk > 0 else math.nan
    sat = volume_w / pore if pore > 0 else math.nan

    def spec(area):
        return area / bulk if bulk > 0 else math.nan

    return {
        "bulk_volume": bulk, "pore_volume": pore, "volume_s": volume_s, "volume_w": volume_w,
        "volume_n": volume_n, "porosity": porosity, "saturation_w": sat,
        "area_nw": a_nw, "area_ws": a_ws, "area_ns": a_ns,
        "a_nw": spec(a_nw), "a_ws": spec(a_ws), "a_ns": spec(a_ns),
        "flag_no_bulk": bool(bulk == 0), "flag_no_pore": bool(pore == 0),
    }


def _check_voxel_size(voxel_size) -> float:
    vs = np.atleast_1d(np.asarray(voxel_size, dtype=float))
    if vs.size == 3 and np.allclose(vs, vs[0]):
        vs = vs[:1]
    if vs.size != 1:
        raise WetpathError(f"voxel_size must be isotropic (one value), got {tuple(vs)}",
                           step="lattice")
    if not (vs[0] > 0 and np.isfinite(vs[0])):
        raise WetpathError(f"voxel_size must be positive, got {vs[0]}", step="lattice")
    return float(vs[0])


def lattice_measures(labels, voxel_size: float = 1.0, *, chunks=None, threads: int | None = None,
                     block: int = 64, connectivity: int = 26) -> dict:
    """Volumes, porosity, saturation, Crofton pair areas and Euler characteristics in one pass.

    Parameters
    ----------
    labels : ndarray, zarr array or dask array, shape (z, y, x)
        Canonical phase codes (0 excluded, 1 s, 2 w, 3 n). Excluded voxels are ignored everywhere.
    voxel_size : float
        Voxel edge length h (isotropic); lengths are in its unit (µm in the workflow).
    chunks : int or tuple, optional
        Slab depth in planes; default the stored chunk depth (zarr/dask) or 64. Results do not
        depend on it.
    threads : int, optional
        Worker threads (None: all cores). The compiled kernel releases the GIL.
    block : int
        Edge of the cubic sub-volumes of the ``blocks`` table, in voxels.
    connectivity : {26, 6}
        Adjacency of each phase for χ (its complement takes the other one).

    Returns
    -------
    dict
        ``bulk_volume, pore_volume, volume_s, volume_w, volume_n`` (h³), ``porosity``,
        ``saturation_w`` (NaN with ``flag_no_bulk`` / ``flag_no_pore`` when undefined),
        ``area_nw, area_ws, area_ns`` (h², Crofton), ``a_nw, a_ws, a_ns`` (1/h),
        ``euler_s, euler_w, euler_n`` and ``blocks``: DataFrame of additive per-block sums with
        columns ``block, block_z, block_y, block_x, bulk_volume, pore_volume, volume_w, volume_n,
        area_nw, area_ws, area_ns``.

    Notes
    -----
    A_ij = h² Σ_v 2 W_v N_ij(v) / |v| over the 13 lattice directions (METHODS.md §1), unbiased for
    isotropic surfaces, 0.93–1.02 by orientation. χ equals ``skimage.measure.euler_number`` of the
    phase with ``connectivity=3`` (26) or ``1`` (6).

    References
    ----------
    Ohser & Mücklich (2000), *Statistical Analysis of Microstructures in Materials Science*, Wiley;
    Lang, Ohser & Hilfer (2001), J. Microsc. 203, 303–313; Ohser, Nagel & Schladitz (2003), Image
    Anal. Stereol. 22, 11–19.

    Examples
    --------
    >>> from wetpath import synthetic
    >>> m = lattice_measures(synthetic.ball(10.0))
    >>> m["euler_n"]
    1
    """
    h = _check_voxel_size(voxel_size)
    if connectivity not in (6, 26):
        raise WetpathError(f"connectivity must be 6 or 26, got {connectivity}", step="lattice")
    _, hist, blocks = _histogram_pass(labels, chunks=chunks, threads=threads, block=int(block))
    result = measures_from_histogram(hist, h, connectivity=connectivity)
    result["blocks"] = _blocks_frame(blocks, h)
    return result


def _blocks_frame(blocks: np.ndarray, h: float) -> pd.DataFrame:
    nbz, nby, nbx, _ = blocks.shape
    flat = blocks.reshape(-1, blocks.shape[-1])
    bz, by, bx = np.unravel_index(np.arange(flat.shape[0]), (nbz, nby, nbx))
    v3 = h**3
    areas = _areas(flat[:, 4:13], h)
    vol = flat[:, :4].astype(np.float64) * v3
    return pd.DataFrame({
        "block": np.arange(flat.shape[0]), "block_z": bz, "block_y": by, "block_x": bx,
        "bulk_volume": vol[:, 1:].sum(axis=1), "pore_volume": vol[:, 2] + vol[:, 3],
        "volume_w": vol[:, 2], "volume_n": vol[:, 3],
        "area_nw": areas[:, 0], "area_ws": areas[:, 1], "area_ns": areas[:, 2],
    }, columns=BLOCK_COLUMNS)
