"""Tracking non-wetting clusters between steps: overlap tables, displacement events, lineages.

Two cluster label volumes are compared voxel by voxel (after an optional integer rigid shift) in
one streaming pass that fills a hash table of (cluster_a, cluster_b) → overlapping voxels, so memory
grows with the number of overlapping pairs, not with the volume. Events are the connected
components of the bipartite overlap graph:

========== ==================== ==========================================
event      parents → children   meaning
========== ==================== ==========================================
continue   1 → 1                the cluster persists (it may grow or shrink)
coalesce   k → 1 (k > 1)        clusters merge
breakup    1 → m (m > 1)        a cluster splits (e.g. snap-off)
regroup    k → m (k, m > 1)     several clusters merge and split at once
appear     0 → 1                a new cluster overlaps no earlier one
vanish     1 → 0                a cluster overlaps no later one
========== ==================== ==========================================

Every cluster of either step belongs to exactly one event, so Σ (children − parents volume) over
the events equals the change in total non-wetting volume.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numba import njit
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from ._codes import PhaseCodes, to_canonical
from ._errors import WetpathError
from ._lattice import Scratch, _check_voxel_size, _Source, resolve_threads, run_parallel

__all__ = ["overlap_table", "overlap_table_reference", "events_from_overlaps", "lineages",
           "increment_summary", "track_clusters", "EVENT_KINDS"]

EVENT_KINDS = ("continue", "coalesce", "breakup", "regroup", "appear", "vanish")
EVENT_COLUMNS = ["event", "parents", "children", "n_parents", "n_children", "volume_parents",
                 "volume_children"]
_EMPTY = -1
_SHIFT = 32


@njit(cache=True, nogil=True)
def _insert(keys, vals, key, count):
    """Add ``count`` to ``key`` in an open-addressing table; returns 1 if the key is new."""
    mask = keys.size - 1
    i = np.int64((np.uint64(key) * np.uint64(0x9E3779B97F4A7C15)) >> np.uint64(40)) & mask
    while True:
        k = keys[i]
        if k == key:
            vals[i] += count
            return 0
        if k == _EMPTY:
            keys[i] = key
            vals[i] = count
            return 1
        i = (i + 1) & mask


@njit(cache=True, nogil=True)
def _grow(keys, vals):
    nk = np.full(keys.size * 2, _EMPTY, np.int64)
    nv = np.zeros(keys.size * 2, np.int64)
    for i in range(keys.size):
        if keys[i] != _EMPTY:
            _insert(nk, nv, keys[i], vals[i])
    return nk, nv


@njit(cache=True, nogil=True)
def _overlap_pass(a, b, keys, vals, used):
    """Count (a, b) label pairs over two equally shaped contiguous arrays (pairs (0, 0) skipped).
    Runs of equal pairs are counted before touching the table; returns the (grown) table and
    whether an id outside 0..2³¹ − 1 was met (counting stops there)."""
    fa = a.ravel()
    fb = b.ravel()      # views when contiguous (whole y, x extent), else copies
    last = np.int64(-1)
    run = 0
    limit = np.int64(1) << (_SHIFT - 1)
    for i in range(fa.size):
        x = np.int64(fa[i])
        y = np.int64(fb[i])
        if x == 0 and y == 0:
            continue
        if x < 0 or y < 0 or x >= limit or y >= limit:
            return keys, vals, used, True
        key = (x << _SHIFT) | y
        if key == last:
            run += 1
            continue
        if run > 0:
            used += _insert(keys, vals, last, run)
            if 2 * used > keys.size:
                keys, vals = _grow(keys, vals)
        last = key
        run = 1
    if run > 0:
        used += _insert(keys, vals, last, run)
        if 2 * used > keys.size:
            keys, vals = _grow(keys, vals)
    return keys, vals, used, False


def _shift3(shift) -> tuple[int, int, int]:
    if shift is None:
        return (0, 0, 0)
    s = tuple(int(v) for v in shift)
    if len(s) != 3 or any(v != w for v, w in zip(s, shift, strict=True)):
        raise WetpathError(f"shift must be three integers (dz, dy, dx), got {shift}",
                           step="track")
    return s


def _window(src: _Source, lo: tuple[int, ...], hi: tuple[int, ...], scratch: Scratch,
            key: str) -> np.ndarray:
    """Region [lo, hi) of a source in its own coordinates, zeros outside the array (read into the
    reused buffer ``key`` of ``scratch`` when the source is stored)."""
    if all(l >= 0 for l in lo) and all(h <= n for h, n in zip(hi, src.shape, strict=True)):
        return src.region(lo, hi, scratch, key)
    out = np.zeros(tuple(h - l for l, h in zip(lo, hi, strict=True)), src.dtype)
    clip_lo = [max(l, 0) for l in lo]
    clip_hi = [min(h, n) for h, n in zip(hi, src.shape, strict=True)]
    if all(c0 < c1 for c0, c1 in zip(clip_lo, clip_hi, strict=True)):
        data = src.region(clip_lo, clip_hi, scratch, key)
        dst = tuple(slice(c0 - l, c1 - l) for c0, c1, l in zip(clip_lo, clip_hi, lo, strict=True))
        out[dst] = data
    return out


def overlap_table(clusters_a, clusters_b, *, shift=None, chunks=None,
                  threads: int | None = None) -> pd.DataFrame:
    """Sparse overlap table of two cluster label volumes.

    Parameters
    ----------
    clusters_a, clusters_b : arrays of int (numpy, zarr or dask), shape (z, y, x)
        Cluster ids (0 = no cluster), ids below 2³¹.
    shift : (dz, dy, dx) ints, optional
        Rigid drift of step b relative to step a: voxel p of a is compared with voxel p + shift of
        b. Voxels that fall outside the other array count as overlapping its background.
    chunks : int or tuple, optional
        Slab depth in planes (default 64 or the stored chunk depth of ``clusters_a``).
    threads : int, optional
        Worker threads (None: all cores).

    Returns
    -------
    DataFrame
        ``cluster_a, cluster_b, voxels``: one row per overlapping pair, including overlaps with
        the other step's background (id 0), never (0, 0); sorted by (cluster_a, cluster_b). The
        marginal sums are the cluster voxel counts.
    """
    sa = _Source(clusters_a, name="clusters_a", step="track")
    sb = _Source(clusters_b, name="clusters_b", step="track")
    dz, dy, dx = _shift3(shift)
    lo = [min(0, -d) for d in (dz, dy, dx)]
    hi = [max(na, nb - d) for na, nb, d in zip(sa.shape, sb.shape, (dz, dy, dx), strict=True)]
    depth = int(chunks if np.isscalar(chunks) else chunks[0]) if chunks is not None \
        else sa.default_depth()
    nw = resolve_threads(threads)
    tables = [[np.full(1 << 12, _EMPTY, np.int64), np.zeros(1 << 12, np.int64), 0]
              for _ in range(nw)]
    scratch = [Scratch() for _ in range(nw)]

    # stored arrays are read in bands of one chunk row in y (bounded memory, each chunk decoded
    # once); in-memory arrays in whole slabs
    band = (sa.chunk_shape() or (0, hi[1] - lo[1]))[1]
    boxes = [(z0, y0) for z0 in range(lo[0], hi[0], depth) for y0 in range(lo[1], hi[1], band)]

    def work(w, box):
        z0, y0 = box
        z1, y1 = min(z0 + depth, hi[0]), min(y0 + band, hi[1])
        a = _window(sa, (z0, y0, lo[2]), (z1, y1, hi[2]), scratch[w], "a")
        b = _window(sb, (z0 + dz, y0 + dy, lo[2] + dx), (z1 + dz, y1 + dy, hi[2] + dx),
                    scratch[w], "b")
        t = tables[w]
        t[0], t[1], t[2], bad = _overlap_pass(a, b, t[0], t[1], t[2])
        if bad:
            raise WetpathError("cluster ids must lie in 0..2³¹ − 1", step="track")

    run_parallel(iter(boxes), work, threads)
    keys = np.concatenate([t[0][t[0] != _EMPTY] for t in tables])
    vals = np.concatenate([t[1][t[0] != _EMPTY] for t in tables])
    uk, inv = np.unique(keys, return_inverse=True)
    counts = np.bincount(inv, weights=vals, minlength=uk.size).astype(np.int64)
    return pd.DataFrame({"cluster_a": uk >> _SHIFT, "cluster_b": uk & ((1 << _SHIFT) - 1),
                         "voxels": counts})


def overlap_table_reference(clusters_a: np.ndarray, clusters_b: np.ndarray) -> pd.DataFrame:
    """Plain numpy overlap table of two equally shaped volumes without shift (test oracle)."""
    a = np.asarray(clusters_a).ravel().astype(np.int64)
    b = np.asarray(clusters_b).ravel().astype(np.int64)
    keep = (a > 0) | (b > 0)
    pairs, counts = np.unique(np.stack([a[keep], b[keep]]), axis=1, return_counts=True)
    return pd.DataFrame({"cluster_a": pairs[0], "cluster_b": pairs[1], "voxels": counts})


def _ids(values) -> str:
    return " ".join(str(int(v)) for v in values)


def events_from_overlaps(overlaps: pd.DataFrame, voxel_size: float = 1.0) -> pd.DataFrame:
    """Displacement events from an overlap table (connected components of the overlap graph).

    Returns
    -------
    DataFrame
        ``event`` (one of ``EVENT_KINDS``), ``parents``, ``children`` (ids as space-separated
        strings, ascending), ``n_parents``, ``n_children``, ``volume_parents``,
        ``volume_children`` (h³, whole cluster volumes). One row per event, ordered by the
        smallest parent id, then (for ``appear``) by the smallest child id.
    """
    h3 = _check_voxel_size(voxel_size) ** 3
    ov = overlaps
    vol_a = ov[ov.cluster_a > 0].groupby("cluster_a").voxels.sum()
    vol_b = ov[ov.cluster_b > 0].groupby("cluster_b").voxels.sum()
    ia, ib = vol_a.index.to_numpy(), vol_b.index.to_numpy()
    na, nb = ia.size, ib.size
    edges = ov[(ov.cluster_a > 0) & (ov.cluster_b > 0)]
    u = np.searchsorted(ia, edges.cluster_a.to_numpy())
    v = na + np.searchsorted(ib, edges.cluster_b.to_numpy())
    graph = coo_matrix((np.ones(u.size, np.int8), (u, v)), shape=(na + nb, na + nb))
    ncomp, comp = connected_components(graph, directed=False) if na + nb else (0, np.zeros(0))
    rows = []
    order_a = np.argsort(comp[:na], kind="stable")
    order_b = np.argsort(comp[na:], kind="stable")
    split_a = np.split(order_a, np.searchsorted(comp[:na][order_a], np.arange(1, ncomp)))
    split_b = np.split(order_b, np.searchsorted(comp[na:][order_b], np.arange(1, ncomp)))
    va, vb = vol_a.to_numpy(), vol_b.to_numpy()
    for pa, pb in zip(split_a, split_b, strict=True):
        k, m = pa.size, pb.size
        event = ("appear" if k == 0 else "vanish" if m == 0 else "continue" if k == m == 1
                 else "coalesce" if m == 1 else "breakup" if k == 1 else "regroup")
        rows.append((event, _ids(ia[pa]), _ids(ib[pb]), k, m, float(va[pa].sum()) * h3,
                     float(vb[pb].sum()) * h3,
                     ia[pa].min() if k else np.iinfo(np.int64).max, ib[pb].min() if m else 0))
    df = pd.DataFrame(rows, columns=EVENT_COLUMNS + ["_a", "_b"])
    return df.sort_values(["_a", "_b"], kind="stable").drop(columns=["_a", "_b"]).reset_index(
        drop=True)


def increment_summary(overlaps: pd.DataFrame, events: pd.DataFrame | None = None,
                      voxel_size: float = 1.0) -> dict:
    """Per-increment summary for the history and the report.

    Returns
    -------
    dict
        Counts ``n_continue … n_vanish``; ``n_clusters_a/b``; ``volume_n_a/b`` (total n
        volume, h³); ``volume_invaded`` (n in b where a had none), ``volume_withdrawn`` (n in a
        where b has none) and ``volume_moved`` (their sum); ``largest_share_a/b`` (largest
        cluster's share of the n volume, NaN without n); ``volume_balance`` (Σ children − parents
        over the events, equal to volume_n_b − volume_n_a).
    """
    h3 = _check_voxel_size(voxel_size) ** 3
    if events is None:
        events = events_from_overlaps(overlaps, voxel_size)
    vol_a = overlaps[overlaps.cluster_a > 0].groupby("cluster_a").voxels.sum() * h3
    vol_b = overlaps[overlaps.cluster_b > 0].groupby("cluster_b").voxels.sum() * h3
    out = {f"n_{k}": int((events.event == k).sum()) for k in EVENT_KINDS}
    ta, tb = float(vol_a.sum()), float(vol_b.sum())
    invaded = float(overlaps.voxels[overlaps.cluster_a == 0].sum()) * h3
    withdrawn = float(overlaps.voxels[overlaps.cluster_b == 0].sum()) * h3
    out |= {
        "n_clusters_a": int(vol_a.size), "n_clusters_b": int(vol_b.size),
        "volume_n_a": ta, "volume_n_b": tb,
        "volume_invaded": invaded, "volume_withdrawn": withdrawn,
        "volume_moved": invaded + withdrawn,
        "largest_share_a": float(vol_a.max() / ta) if ta > 0 else float("nan"),
        "largest_share_b": float(vol_b.max() / tb) if tb > 0 else float("nan"),
        "volume_balance": float((events.volume_children - events.volume_parents).sum()),
    }
    return out


def lineages(overlap_tables: list[pd.DataFrame]) -> pd.DataFrame:
    """Assign every cluster of every step to a lineage.

    A lineage is a chain of ``continue`` events: a child of a continue event keeps its parent's
    lineage; every other child (coalesce, breakup, regroup, appear) starts a new lineage, so that a
    ganglion cut off by a break-up is followed from that step to the end. Lineage ids are
    0, 1, 2, … in order of (step, cluster) of their first member.

    Parameters
    ----------
    overlap_tables : list of DataFrame
        ``overlap_table`` of steps (0, 1), (1, 2), … in order.

    Returns
    -------
    DataFrame
        ``step, cluster, lineage, event`` (how the lineage member arose: ``start`` at step 0 or the
        event kind), ``parent_lineages`` (space-separated lineages of the event's parents).
    """
    rows = []
    if not overlap_tables:
        return pd.DataFrame(columns=["step", "cluster", "lineage", "event", "parent_lineages"])
    first = overlap_tables[0]
    current: dict[int, int] = {}
    next_id = 0
    for c in np.unique(first.cluster_a[first.cluster_a > 0]):
        current[int(c)] = next_id
        rows.append((0, int(c), next_id, "start", ""))
        next_id += 1
    for step, ov in enumerate(overlap_tables, start=1):
        ids_a = set(int(c) for c in ov.cluster_a[ov.cluster_a > 0])
        if ids_a != set(current):
            raise WetpathError(f"overlap table {step - 1} does not start from the clusters the "
                               f"previous table ended with", step="track")
        new: dict[int, int] = {}
        for ev in events_from_overlaps(ov).itertuples():
            parents = [int(p) for p in ev.parents.split()]
            plin = _ids(sorted(current[p] for p in parents))
            for c in (int(x) for x in ev.children.split()):
                if ev.event == "continue":
                    new[c] = current[parents[0]]
                else:
                    new[c] = next_id
                    next_id += 1
                rows.append((step, c, new[c], ev.event, plin))
        current = new
    df = pd.DataFrame(rows, columns=["step", "cluster", "lineage", "event", "parent_lineages"])
    df = df.sort_values(["step", "cluster"], kind="stable").reset_index(drop=True)
    # renumber lineages by first appearance in (step, cluster) order
    _, first_seen = np.unique(df.lineage.to_numpy(), return_index=True)
    old = np.unique(df.lineage.to_numpy())
    remap = dict(zip(old[np.argsort(first_seen)], range(old.size), strict=True))
    df["lineage"] = df.lineage.map(remap)
    df["parent_lineages"] = df.parent_lineages.map(
        lambda s: _ids(sorted(remap[int(x)] for x in s.split())))
    return df


def track_clusters(labels_a, labels_b, codes: PhaseCodes | dict | None = None, *,
                   connectivity: int = 26, shift=None, voxel_size: float = 1.0,
                   clusters: bool = False, chunks=None, threads: int | None = None) -> pd.DataFrame:
    """Match the non-wetting clusters of two steps and classify the displacement events.

    Parameters
    ----------
    labels_a, labels_b : arrays of int, shape (z, y, x)
        Phase label volumes of steps t and t + 1 (mapped with ``codes``; labelled internally with
        :func:`wetpath.label_clusters`), or cluster label volumes when ``clusters=True``.
    codes : PhaseCodes or mapping, optional
        Phase codes of the inputs (default canonical).
    connectivity : {26, 6}
        Cluster adjacency.
    shift : (dz, dy, dx) ints, optional
        Rigid drift of step t + 1 relative to step t, applied before matching.
    voxel_size : float
        Voxel edge length h; volumes in h³.
    clusters : bool
        Inputs are already cluster labels.
    chunks, threads
        Slab depth and worker threads.

    Returns
    -------
    DataFrame
        Events as in :func:`events_from_overlaps`: ``event, parents, children, n_parents,
        n_children, volume_parents, volume_children``.

    Examples
    --------
    >>> import numpy as np
    >>> a = np.full((9, 9, 9), 2, np.uint8); a[1:3, 1:3, 1:3] = 3; a[5:7, 5:7, 5:7] = 3
    >>> b = np.full((9, 9, 9), 2, np.uint8); b[1:7, 1:7, 1:7] = 3
    >>> track_clusters(a, b).event.tolist()
    ['coalesce']
    """
    from ._clusters import label_clusters

    if not clusters:
        labels_a = _canonical(labels_a, codes)
        labels_b = _canonical(labels_b, codes)
        labels_a, _ = label_clusters(labels_a, connectivity=connectivity, chunks=chunks,
                                     threads=threads)
        labels_b, _ = label_clusters(labels_b, connectivity=connectivity, chunks=chunks,
                                     threads=threads)
    ov = overlap_table(labels_a, labels_b, shift=shift, chunks=chunks, threads=threads)
    return events_from_overlaps(ov, voxel_size)


def _canonical(labels, codes):
    if codes is None or PhaseCodes.from_mapping(codes).is_canonical:
        return labels
    return to_canonical(np.asarray(labels), codes, step="track")
