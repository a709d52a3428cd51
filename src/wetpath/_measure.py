"""Per-state geometry: joins the streaming lattice measures and the mesh measures of one label volume.

``measure_state`` gives the whole field of view, ``measure_clusters`` one row per non-wetting cluster.
Volumes, Crofton pair areas and Euler characteristics come from one streaming pass over 2×2×2
configurations (:mod:`wetpath._lattice`); curvature, band-extrapolated mesh areas, the Gauss curvature
integral and the contact line come from meshes of the non-wetting phase (:mod:`wetpath._mesh`).

References
----------
Ohser, J. & Mücklich, F. (2000). *Statistical Analysis of Microstructures in Materials Science*. Wiley.
Meyer, M., Desbrun, M., Schröder, P. & Barr, A. H. (2003). Discrete differential-geometry operators for
triangulated 2-manifolds. *Visualization and Mathematics III*, 35–57.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np
import pandas as pd

from ._codes import PhaseCodes, to_canonical
from ._errors import WetpathError

__all__ = ["measure_state", "measure_clusters", "state_from_clusters"]


def _voxel_length(voxel_size) -> float:
    sizes = np.atleast_1d(np.asarray(voxel_size, dtype=float))
    if sizes.size not in (1, 3) or not np.all(np.isfinite(sizes)) or np.any(sizes <= 0):
        raise WetpathError(f"voxel size must be a positive finite number, got {voxel_size!r}",
                           step="measure")
    if np.ptp(sizes) > 1e-9 * sizes.max():
        raise WetpathError(f"anisotropic voxel size {tuple(sizes)} is not supported by the geometry "
                           "estimators; resample to cubic voxels first", step="measure")
    return float(sizes[0])


def _prepare(labels, codes):
    """Canonical labels; arrays already canonical (zarr/dask from the workflow) pass untouched."""
    codes = PhaseCodes.from_mapping(codes)
    if codes.is_canonical and not isinstance(labels, np.ndarray) and hasattr(labels, "shape"):
        return labels
    return to_canonical(np.asarray(labels), codes, step="measure")


def measure_clusters(labels, voxel_size: float = 1.0, *, codes: PhaseCodes | Mapping | None = None,
                     connectivity: int = 26, clusters: np.ndarray | None = None, sigma: float = 1.0,
                     chunks: int | None = None, threads: int | None = None) -> pd.DataFrame:
    """Measure every non-wetting cluster of one state.

    Parameters
    ----------
    labels : array_like of int, shape (z, y, x)
        Phase labels (numpy, zarr or dask array).
    voxel_size : float
        Edge length of the cubic voxels; lengths are reported in this unit (µm in the workflow).
    codes : PhaseCodes or mapping, optional
        Input label values of each phase; default canonical (0 excluded, 1 s, 2 w, 3 n).
    connectivity : {6, 26}
        Connectivity of the non-wetting clusters.
    clusters : ndarray of int, optional
        Precomputed cluster labels (from :func:`wetpath.label_clusters`); computed when omitted.
    sigma : float
        Gaussian smoothing of the phase indicator before meshing, voxels.
    chunks : int, optional
        Chunk edge for the out-of-core passes, voxels.
    threads : int, optional
        Threads to use (default: all cores).

    Returns
    -------
    DataFrame
        One row per cluster: ``cluster, voxels, volume, centroid_z/y/x, bbox_*, area_nw, area_ns``
        (Crofton, length²), ``area_nw_mesh, area_ns_mesh`` (length²), ``curvature_nw,
        curvature_nw_std`` (1/length), ``curv_area_nw, curv_weight_nw``, ``gauss_nw`` (rad),
        ``euler_n, contact_loops, contact_length`` (length), ``touches_border, resolved``.
    """
    from ._clusters import label_clusters

    h = _voxel_length(voxel_size)
    labels = _prepare(labels, codes)
    if clusters is None:
        clusters, _ = label_clusters(labels, connectivity=connectivity, chunks=chunks, threads=threads)
    return cluster_tables(labels, h, clusters, sigma=sigma, chunks=chunks, threads=threads)[0]


def cluster_tables(labels, voxel_size: float, clusters, *, sigma: float = 1.0,
                   chunks: int | None = None, threads: int | None = None,
                   geometric: bool = False, max_box: int | None = None
                   ) -> tuple[pd.DataFrame, pd.DataFrame | None]:
    """The per-cluster table of :func:`measure_clusters` (canonical labels, given clusters) and,
    with ``geometric``, the contact-point table of :func:`wetpath.geometric_angles` from the same
    meshes (one meshing pass instead of two).

    ``labels`` and ``clusters`` may be numpy arrays or stored arrays (zarr, dask): the lattice pass
    streams slabs, and the mesh chunks read only their boxes (the cluster bounding boxes come from
    the lattice table), so a stored volume is never read whole. ``max_box`` bounds each mesh
    worker's chunk box (voxels; see :func:`wetpath._mesh.mesh_sums`).
    """
    from ._clusters import cluster_lattice_measures
    from ._geometric import mesh_and_angles
    from ._mesh import boxes_from_table, mesh_measures

    lat = cluster_lattice_measures(labels, clusters, voxel_size, threads=threads)
    boxes = boxes_from_table(lat)
    points = None
    if geometric:
        mesh, points = mesh_and_angles(labels, voxel_size, clusters=clusters, sigma=sigma,
                                       chunks=chunks, threads=threads, boxes=boxes,
                                       max_box=max_box)
    else:
        mesh = mesh_measures(labels, voxel_size, clusters=clusters, sigma=sigma, chunks=chunks,
                             threads=threads, boxes=boxes, max_box=max_box)
    return lat.merge(mesh, on="cluster", how="left", suffixes=("", "_mesh_dup")), points


def state_from_clusters(lattice: Mapping, clusters: pd.DataFrame) -> dict:
    """Combine whole-state lattice measures with the per-cluster mesh table into the state mapping.

    Curvature is the area-weighted mean over all clusters' n–w vertices away from the contact line;
    its spread is the area-weighted standard deviation pooled from the clusters' means and spreads.
    """
    out = {k: v for k, v in lattice.items() if k != "blocks"}
    n_clusters = len(clusters)
    out["n_clusters"] = n_clusters
    if n_clusters == 0:
        for key in ("area_nw_mesh", "area_ns_mesh", "gauss_nw", "contact_length"):
            out[key] = 0.0
        out["contact_loops"] = 0
        out["curvature_nw"] = out["curvature_nw_std"] = math.nan
        out["unresolved_clusters"] = 0
        out["flag_no_nonwetting"] = True
        out["blocks"] = lattice["blocks"].assign(curv_area_nw=0.0, curv_weight_nw=0.0)
        return out
    w = clusters["curv_weight_nw"].fillna(0).to_numpy(float)
    k = clusters["curvature_nw"].to_numpy(float)
    s = clusters["curvature_nw_std"].to_numpy(float)
    ok = (w > 0) & np.isfinite(k)
    if ok.any():
        mean = float(np.sum(w[ok] * k[ok]) / np.sum(w[ok]))
        var = np.sum(w[ok] * (np.nan_to_num(s[ok]) ** 2 + (k[ok] - mean) ** 2)) / np.sum(w[ok])
        out["curvature_nw"], out["curvature_nw_std"] = mean, float(np.sqrt(var))
    else:
        out["curvature_nw"] = out["curvature_nw_std"] = math.nan
    for key in ("area_nw_mesh", "area_ns_mesh", "gauss_nw", "contact_length"):
        out[key] = float(clusters[key].fillna(0).sum())
    out["contact_loops"] = int(clusters["contact_loops"].fillna(0).sum())
    out["unresolved_clusters"] = int((~clusters["resolved"].astype(bool)).sum())
    out["flag_no_nonwetting"] = False
    out["blocks"] = _blocks_with_curvature(lattice, clusters)
    return out


def _blocks_with_curvature(lattice: Mapping, clusters: pd.DataFrame) -> pd.DataFrame:
    """Add each cluster's curvature sums to the block holding its centroid (sub-volumes for the
    bootstrap of the energy-balance interval)."""
    blocks = lattice["blocks"].copy()
    size = lattice.get("block_size_voxels", 64)
    nb = (blocks[["block_z", "block_y", "block_x"]].max().to_numpy() + 1).astype(int)
    ids = {(int(a), int(b), int(c)): i for i, (a, b, c)
           in enumerate(blocks[["block_z", "block_y", "block_x"]].to_numpy())}
    area = np.zeros(len(blocks))
    weight = np.zeros(len(blocks))
    vox = lattice.get("voxel_size", 1.0)
    for row in clusters.itertuples(index=False):
        key = tuple(int(min(max(getattr(row, f"centroid_{a}") / vox // size, 0), n - 1))
                    for a, n in zip("zyx", nb, strict=True))
        i = ids.get(key)
        if i is not None and np.isfinite(row.curv_area_nw):
            area[i] += row.curv_area_nw
            weight[i] += row.curv_weight_nw
    return blocks.assign(curv_area_nw=area, curv_weight_nw=weight)


def measure_state(labels, voxel_size: float = 1.0, *, codes: PhaseCodes | Mapping | None = None,
                  connectivity: int = 26, clusters: np.ndarray | None = None, sigma: float = 1.0,
                  chunks: int | None = None, threads: int | None = None,
                  return_clusters: bool = False) -> dict:
    """Measure the geometry of one three-phase state.

    Parameters
    ----------
    labels : array_like of int, shape (z, y, x)
        Phase labels (numpy, zarr or dask array); excluded voxels are ignored everywhere.
    voxel_size : float
        Edge length of the cubic voxels; lengths are reported in this unit (µm in the workflow).
    codes : PhaseCodes or mapping, optional
        Input label values of each phase; default canonical.
    connectivity : {6, 26}
        Connectivity of the non-wetting clusters.
    clusters : ndarray of int, optional
        Precomputed cluster labels; computed when omitted.
    sigma : float
        Gaussian smoothing before meshing, voxels.
    chunks, threads : int, optional
        Chunk edge (voxels) and threads for the out-of-core passes.
    return_clusters : bool
        Also return the per-cluster table under the key ``"clusters"``.

    Returns
    -------
    dict
        ``bulk_volume, pore_volume, volume_s, volume_w, volume_n`` (length³), ``porosity,
        saturation_w`` (–), ``area_nw, area_ws, area_ns`` (Crofton, length²), ``a_nw, a_ws, a_ns``
        (1/length), ``area_nw_mesh, area_ns_mesh`` (length²), ``curvature_nw, curvature_nw_std``
        (κ = k1 + k2, 1/length, positive when convex toward w), ``gauss_nw`` (∫_nw K dA, rad),
        ``euler_n, euler_w, euler_s``, ``contact_loops``, ``contact_length`` (length),
        ``n_clusters, unresolved_clusters, flag_no_nonwetting`` and ``blocks`` (per-block additive
        sums for the sub-volume bootstrap). Undefined values are NaN.

    Examples
    --------
    >>> from wetpath import measure_state, synthetic
    >>> m = measure_state(synthetic.ball(15, seed=0))
    >>> round(m["curvature_nw"] * 15, 1)  # κ = 2/R for a ball of n
    2.0
    """
    from ._clusters import label_clusters
    from ._lattice import lattice_measures

    h = _voxel_length(voxel_size)
    labels = _prepare(labels, codes)
    lattice = lattice_measures(labels, h, chunks=chunks, threads=threads)
    lattice.setdefault("voxel_size", h)
    if clusters is None:
        clusters, _ = label_clusters(labels, connectivity=connectivity, chunks=chunks, threads=threads)
    table = measure_clusters(labels, h, connectivity=connectivity, clusters=clusters, sigma=sigma,
                             chunks=chunks, threads=threads)
    out = state_from_clusters(lattice, table)
    if return_clusters:
        out["clusters"] = table
    return out
