"""Workflow stages: one function per Snakemake rule, reading stores and tables, calling the pure
array functions and writing results atomically. The CLI wraps each in a subcommand; nothing here
computes geometry itself.

Table units: lengths in µm (the step stores' voxel size), areas µm², volumes µm³, curvature 1/µm,
angles in degrees through the wetting phase; see ``docs/tables.md``.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from ._atomic import atomic_directory, atomic_write_table, atomic_write_text
from ._errors import WetpathError

__all__ = ["label_step", "measure_step", "track_step", "increment_step", "collect_angles",
           "history_series", "measure_paths"]

# largest chunk edge (voxels) of the mesh measures and geometric angles in the measure stage (each
# axis is split into equal parts no longer than this): each chunk is meshed with a halo of 23
# voxels (blur, smoothing rings, the fits' reach), so larger chunks waste less (volume meshed per
# voxel at 512³: 2.2 with 192-voxel chunks, 1.45 with 256) but hold more memory; a volume of
# fewer chunks than workers is cut into one slab along z per worker (from 160³ up; smaller ones
# are meshed whole)
MESH_CHUNKS = 256
# largest chunk box (core ± halo, voxels) one mesh worker holds: its peak is ~27 bytes per box
# voxel (the percolating cluster's mesh with the buffers the worker keeps: the box's codes, ids,
# wall distance and blur; 0.62 GB for a 285³ box) over its own ~0.1 GB, so that the stage stays
# under 2 GB with 2 workers (1.70 GB measured at 1024³) whatever the
# volume; the parts per axis are chosen to mesh the least volume under it (512³: 2 × 2 × 2 chunks,
# 1.41 voxels meshed per voxel; 1024³: 4 × 4 × 5)
MESH_BOX_VOXELS = 24_000_000
# state keys that are tables, not numbers
_TABLE_KEYS = ("blocks", "clusters")


def _voxel(opened, where: str) -> float:
    v = np.atleast_1d(np.asarray(opened.voxel_size_um, float))
    if np.ptp(v) > 1e-9 * v.max():
        raise WetpathError(f"anisotropic voxel size {tuple(v)} µm: resample to cubic voxels first",
                           step=where, path=opened.path)
    return float(v[0])


def _read_csv(path: str | os.PathLike, where: str, **kwargs) -> pd.DataFrame:
    """Read a table written by an earlier stage; a missing or unreadable file is one line."""
    if not Path(path).is_file():
        raise WetpathError("input table does not exist", step=where, path=path)
    try:
        return pd.read_csv(path, **kwargs)
    except Exception as exc:
        raise WetpathError(f"cannot read table ({type(exc).__name__}: {exc})", step=where,
                           path=path) from exc


def _code_columns(stage: str, settings: Mapping | None = None) -> dict:
    """Provenance columns of a per-step or per-increment row: package version, hash of the package
    sources and ``<stage>_settings_sha256``, the hash of the stage's settings."""
    from ._provenance import code_hash, config_hash, package_version

    return {"wetpath_version": package_version(), "code_sha256": code_hash(),
            f"{stage}_settings_sha256": config_hash(dict(settings or {}))}


def limit_threads(threads: int | None) -> None:
    """Cap numba's parallel kernels at ``threads`` (the rule's ``threads``; None: all cores), so
    that jobs running side by side do not oversubscribe the cores. Thread pools of the chunk
    passes take ``threads`` directly; BLAS/OpenMP pools follow ``OMP_NUM_THREADS`` and friends,
    which Snakemake sets to the rule's ``threads``."""
    if threads is None:
        return
    import numba

    numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))


def label_step(store: str | os.PathLike, out_store: str | os.PathLike, *, connectivity: int = 26,
               threads: int | None = None) -> int:
    """Label the non-wetting clusters of one step store into ``out_store`` (zarr, same chunks;
    uint16 ids when there are at most 65 535 clusters, else int32). Returns the number of
    clusters."""
    import zarr

    from ._clusters import label_clusters
    from ._store import create_cluster_array, open_step

    limit_threads(threads)
    opened = open_step(store)
    labels = opened.labels
    with atomic_directory(out_store) as tmp:
        root = zarr.open_group(str(tmp), mode="w", zarr_format=3)
        _, n = label_clusters(
            labels, connectivity=connectivity, threads=threads,
            out=lambda n: create_cluster_array(root, labels.shape, labels.chunks, n))
        root.attrs.update({"wetpath": {"n_clusters": int(n), "connectivity": int(connectivity),
                                       "step": opened.attrs.get("step"),
                                       "voxel_size_um": opened.voxel_size_um}})
    return int(n)


def open_clusters(path: str | os.PathLike):
    """The cluster label array of a store written by :func:`label_step` (lazy zarr array of
    uint16, or int32 above 65 535 clusters; 0 = not non-wetting)."""
    import zarr

    if not Path(path).is_dir():
        raise WetpathError("cluster label store does not exist", step="open", path=path)
    try:
        return zarr.open_group(str(path), mode="r")["clusters"]
    except Exception as exc:
        raise WetpathError(f"not a cluster label store ({type(exc).__name__})", step="open",
                           path=path) from exc


def measure_paths(folder: str | os.PathLike, step: str) -> dict[str, Path]:
    """Output files of :func:`measure_step` for one step."""
    folder = Path(folder)
    return {"state": folder / f"{step}.csv", "clusters": folder / f"{step}_clusters.csv",
            "blocks": folder / f"{step}_blocks.csv",
            "perturbed": folder / f"{step}_perturbed.csv",
            "points": folder / f"{step}_points.csv"}


def _scalars(mapping: Mapping) -> dict:
    return {k: v for k, v in mapping.items() if k not in _TABLE_KEYS and np.isscalar(v)}


def measure_step(store: str | os.PathLike, clusters_store: str | os.PathLike,
                 out_folder: str | os.PathLike, *, step: str | None = None, sigma: float = 1.0,
                 connectivity: int = 26, perturb: bool = True, geometric: bool = True,
                 threads: int | None = None) -> dict[str, Path]:
    """Geometry and per-state angles of one step.

    Writes ``<step>.csv`` (one row: the state measures of :func:`wetpath.measure_state`, the
    topological angle and the geometric-angle summary), ``<step>_clusters.csv`` (per cluster),
    ``<step>_blocks.csv`` (per-block sums for the interval bootstrap), ``<step>_perturbed.csv``
    (the state with its fluid boundary moved by ±1 voxel, for the energy-balance interval) and
    ``<step>_points.csv`` (geometric contact angles at contact-line points).
    """
    from ._energy import PerturbedView
    from ._geometric import summarise_geometric
    from ._lattice import lattice_measures
    from ._measure import cluster_tables, state_from_clusters
    from ._parallel import fix_mmap_threshold
    from ._store import open_step
    from ._topological import topological_from_clusters

    limit_threads(threads)
    fix_mmap_threshold()      # the mesh results arrive in many pieces: give freed blocks back
    opened = open_step(store)
    h = _voxel(opened, "measure")
    step = step or opened.attrs.get("step") or Path(store).stem
    # nothing is read whole: the lattice passes stream slabs from the stores (memory grows with
    # the plane area) and every mesh chunk reads its own box (core ± halo, at most
    # MESH_BOX_VOXELS whatever the volume)
    labels = opened.labels
    clusters = open_clusters(clusters_store)
    lattice = lattice_measures(labels, h, threads=threads)
    # chunked meshing bounds memory (a percolating cluster's box is the whole volume); the sums
    # agree with whole-cluster meshing to ~1e-6 relative
    # (the geometric angles come from the same meshes)
    table, points = cluster_tables(labels, h, clusters, sigma=sigma, chunks=MESH_CHUNKS,
                                   threads=threads, geometric=geometric,
                                   max_box=MESH_BOX_VOXELS)
    state = state_from_clusters(lattice, table)
    topo = topological_from_clusters(table)
    topo["topo_flag"] = topo.pop("flag")
    row = {"step": step, "voxel_size_um": h, **_scalars(state), **_scalars(topo)}
    provenance = _code_columns("measure", {"sigma": sigma, "connectivity": connectivity,
                                           "perturb": perturb, "geometric": geometric})
    paths = measure_paths(out_folder, step)
    per_cluster = topo["clusters"] if len(topo["clusters"]) else table
    if geometric:
        geo = summarise_geometric(points)
        row.update({"theta_geom_median_deg": geo["median_deg"], "theta_geom_q25_deg":
                    geo["q25_deg"], "theta_geom_q75_deg": geo["q75_deg"],
                    "theta_geom_mean_deg": geo["mean_deg"], "theta_geom_sem_deg": geo["sem_deg"],
                    "theta_geom_count": geo["count"]})
        per = geo["clusters"]
        if len(per):
            keep = ["cluster", "count", "median_deg", "q25_deg", "q75_deg", "mean_deg", "sem_deg"]
            per = per[[c for c in keep if c in per.columns]].rename(
                columns={c: f"theta_geom_{c}" for c in keep[1:]})
            per_cluster = per_cluster.merge(per, on="cluster", how="left")
        atomic_write_table(points, paths["points"])
    else:
        atomic_write_table(pd.DataFrame(columns=["cluster", "z", "y", "x", "theta_deg"]),
                           paths["points"])
    perturbed = []
    if perturb:
        for kind in ("dilated", "eroded"):
            # perturbed slab by slab as the lattice pass reads it (equal to perturbing the whole)
            m = lattice_measures(PerturbedView(labels, kind), h, threads=threads)
            # the ±1-voxel shift stands in for segmentation error of areas and volumes; the
            # curvature of the unperturbed state is kept (its shift, ~2/R², is negligible)
            perturbed.append({"perturbation": kind, **_scalars(m),
                              "curvature_nw": state["curvature_nw"]})
    atomic_write_table(pd.DataFrame(perturbed), paths["perturbed"])
    atomic_write_table(state["blocks"], paths["blocks"])
    atomic_write_table(per_cluster, paths["clusters"])
    atomic_write_table(pd.DataFrame([{**row, **provenance}]), paths["state"])
    return paths


def _read_state(folder: str | os.PathLike, step: str) -> tuple[dict, list[dict], pd.DataFrame]:
    paths = measure_paths(folder, step)
    for p in paths.values():
        if not p.is_file():
            raise WetpathError("measure output is missing", step="increment", path=p)
    state = _read_csv(paths["state"], "increment", dtype={"step": str}).iloc[0].to_dict()
    state["blocks"] = _read_csv(paths["blocks"], "increment")
    pert = (_read_csv(paths["perturbed"], "increment") if paths["perturbed"].stat().st_size > 1
            else None)
    perturbed = [] if pert is None or len(pert) == 0 else [
        {**r, "blocks": None} for r in pert.to_dict("records")]
    return state, perturbed, _read_csv(paths["clusters"], "increment")


def track_step(clusters_a: str | os.PathLike, clusters_b: str | os.PathLike,
               out_overlaps: str | os.PathLike, out_events: str | os.PathLike, *,
               voxel_size_um: float, shift: Sequence[int] | None = None,
               threads: int | None = None) -> pd.DataFrame:
    """Overlap table and displacement events between the clusters of two successive steps."""
    from ._tracking import events_from_overlaps, overlap_table

    limit_threads(threads)
    overlaps = overlap_table(open_clusters(clusters_a), open_clusters(clusters_b), shift=shift,
                             threads=threads)
    events = events_from_overlaps(overlaps, voxel_size_um)
    atomic_write_table(overlaps, out_overlaps)
    atomic_write_table(events, out_events)
    return events


def increment_step(measures: str | os.PathLike, step_from: str, step_to: str,
                   overlaps_csv: str | os.PathLike, events_csv: str | os.PathLike,
                   out_csv: str | os.PathLike, out_families: str | os.PathLike, *,
                   settings: Mapping | None = None) -> dict:
    """Energy-balance angle of the increment ``step_from → step_to`` for the field of view and
    for every tracked cluster family, with the increment's event counts."""
    from ._energy import energy_balance_angle, family_energy_angles
    from ._tracking import increment_summary

    settings = dict(settings or {})
    before, pb, clusters_before = _read_state(measures, step_from)
    after, pa, clusters_after = _read_state(measures, step_to)
    h = float(before["voxel_size_um"])
    overlaps = _read_csv(overlaps_csv, "increment")
    events = _read_csv(events_csv, "increment", dtype={"parents": str, "children": str}).fillna(
        {"parents": "", "children": ""})
    result = energy_balance_angle(before, after, before_perturbed=pb or None,
                                  after_perturbed=pa or None, **settings)
    row = {"step_from": step_from, "step_to": step_to,
           **{k: v for k, v in result.items() if np.isscalar(v) or v is None}}
    row.update(increment_summary(overlaps, events, h))
    row.update(_code_columns("energy", settings))
    families = family_energy_angles(events, clusters_before, clusters_after)
    families.insert(0, "step_to", step_to)
    families.insert(0, "step_from", step_from)
    atomic_write_table(families, out_families)
    atomic_write_table(pd.DataFrame([row]), out_csv)
    return row


ANGLE_STATE_COLUMNS = (
    "step", "time_s", "saturation_w", "n_clusters", "clusters_used", "theta_topo_deg",
    "theta_topo_median_deg", "theta_topo_lo_deg", "theta_topo_hi_deg", "theta_topo_corrected_deg",
    "topo_flag", "theta_geom_median_deg", "theta_geom_q25_deg", "theta_geom_q75_deg",
    "theta_geom_mean_deg", "theta_geom_sem_deg", "theta_geom_count")
ANGLE_CLUSTER_COLUMNS = (
    "cluster", "voxels", "volume", "touches_border", "resolved", "used", "euler_n",
    "contact_loops", "gauss_nw", "deficit", "curvature_nw", "theta_topo_deg",
    "theta_topo_corrected_deg", "theta_geom_count", "theta_geom_median_deg", "theta_geom_q25_deg",
    "theta_geom_q75_deg")


def collect_angles(states_csv: str | os.PathLike, out_folder: str | os.PathLike, *,
                   increment_csvs: Sequence = (), family_csvs: Sequence = (),
                   cluster_csvs: Sequence = (), overlap_csvs: Sequence = ()) -> dict[str, Path]:
    """The per-series angle tables.

    Writes into ``out_folder`` (``results/<series>/angles``): ``states.csv`` (per state: the
    topological and geometric angles), ``increments.csv`` (per increment, in time order, with the
    ``time_s`` of the later step: energy-balance angle, flags, event counts), ``families.csv``
    (per tracked cluster family and increment), ``clusters.csv`` (per cluster and state) and,
    given the overlap tables in time order, ``lineages.csv`` (every cluster of every step).
    ``cluster_csvs`` are the measure stage's ``<step>_clusters.csv`` in the order of the steps.
    """
    from ._tracking import lineages

    out = Path(out_folder)
    states = _read_csv(states_csv, "angles", dtype={"step": str})
    steps = list(states["step"])
    order = {s: i for i, s in enumerate(steps)}
    times = dict(zip(states["step"], states["time_s"], strict=True))

    def concat(files, columns):
        parts = [_read_csv(f, "angles", dtype={"step_from": str, "step_to": str}) for f in files]
        parts = [p for p in parts if len(p)]
        return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=columns)

    increments = concat(increment_csvs, ["step_from", "step_to"])
    increments.insert(2, "time_s", increments["step_to"].map(times))
    increments = increments.sort_values("step_to", key=lambda c: c.map(order), kind="stable")
    families = concat(family_csvs, ["step_from", "step_to"])
    clusters = []
    for step, f in zip(steps, cluster_csvs, strict=True):
        table = _read_csv(f, "angles")
        table = table[[c for c in ANGLE_CLUSTER_COLUMNS if c in table.columns]]
        table.insert(0, "step", step)
        clusters.append(table)
    paths = {"states": out / "states.csv", "increments": out / "increments.csv",
             "families": out / "families.csv", "clusters": out / "clusters.csv",
             "lineages": out / "lineages.csv"}
    atomic_write_table(states[[c for c in ANGLE_STATE_COLUMNS if c in states.columns]],
                       paths["states"])
    atomic_write_table(increments.reset_index(drop=True), paths["increments"])
    atomic_write_table(families, paths["families"])
    atomic_write_table(pd.concat(clusters, ignore_index=True) if clusters else pd.DataFrame(
        columns=["step", "cluster"]), paths["clusters"])
    lin = lineages([_read_csv(f, "angles") for f in overlap_csvs])
    lin.insert(0, "step_name", [steps[i] for i in lin["step"]])
    atomic_write_table(lin, paths["lineages"])
    return paths


def history_series(states_csv: str | os.PathLike, increments_csv: str | os.PathLike,
                   out_folder: str | os.PathLike, *, stores: Sequence = (),
                   config: Mapping | None = None, sigma_n_per_m: float | None = None,
                   static_tol: float = 0.005, title: str | None = None) -> Path:
    """Saturation-path history, branch summary, figures and the HTML report of one series."""
    from ._history import branch_summary, build_history, write_history_tables
    from ._plots import mid_plane_slices
    from ._report import write_report
    from ._store import open_step

    out = Path(out_folder)
    states = _read_csv(states_csv, "history", dtype={"step": str})
    increments = _read_csv(increments_csv, "history", dtype={"step_from": str, "step_to": str})
    history = build_history(states, increments, sigma_n_per_m=sigma_n_per_m,
                            static_tol=static_tol)
    branches = branch_summary(history)
    provenance = _provenance(states, config)
    stamp = {k: provenance[k] for k in ("wetpath_version", "code_sha256", "config_sha256")}
    write_history_tables(out, history.assign(**stamp), branches.assign(**stamp))
    atomic_write_text(out / "provenance.json",
                      json.dumps(provenance, indent=1, sort_keys=True, default=str) + "\n")
    picked = _first_mid_last(list(stores))
    slices, axes = mid_plane_slices([(Path(p).stem, np.asarray(open_step(p).labels[...]))
                                     for p in picked]) if picked else (None, ("y", "x"))
    warnings = []
    if "unresolved_clusters" in states:
        n = int(states["unresolved_clusters"].fillna(0).sum())
        if n:
            warnings.append(f"{n} cluster(s) over all states rise too little above the solid to "
                            "be resolved; they are left out of the topological angle")
    return write_report(out / "report.html", history=history, branches=branches, states=states,
                        increments=increments, config=dict(config or {}),
                        provenance=provenance, warnings=warnings, slices=slices,
                        figures_dir=out / "figures", title=title, slice_axes=axes)


def _first_mid_last(items: list) -> list:
    if len(items) <= 3:
        return items
    return [items[0], items[len(items) // 2], items[-1]]


def _provenance(states: pd.DataFrame, config: Mapping | None) -> dict:
    """Version, source hash, hash of the series and analysis settings, and every input's size and
    SHA-256 (from the step stores' records, via the states table)."""
    from ._provenance import code_hash, config_hash, package_version

    cols = [c for c in ("step", "source_file", "source_bytes", "source_sha256") if c in states]
    return {"wetpath_version": package_version(), "code_sha256": code_hash(),
            "config_sha256": config_hash(dict(config or {})),
            "inputs": states[cols].to_dict("records") if cols else []}

