"""Workflow stages: one function per Snakemake rule, reading stores and tables, calling the pure
array functions and writing results atomically. The CLI wraps each in a subcommand; nothing here
computes geometry itself.

Table units: lengths in µm (the step stores' voxel size), areas µm², volumes µm³, curvature 1/µm,
angles in degrees through the wetting phase; see ``docs/tables.md``.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from ._atomic import atomic_directory, atomic_write_table
from ._errors import WetpathError

__all__ = ["label_step", "measure_step", "track_step", "increment_step", "collect_increments",
           "history_series", "measure_paths"]

# state keys that are tables, not numbers
_TABLE_KEYS = ("blocks", "clusters")


def _voxel(opened, where: str) -> float:
    v = np.atleast_1d(np.asarray(opened.voxel_size_um, float))
    if np.ptp(v) > 1e-9 * v.max():
        raise WetpathError(f"anisotropic voxel size {tuple(v)} µm: resample to cubic voxels first",
                           step=where, path=opened.path)
    return float(v[0])


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
    """Label the non-wetting clusters of one step store into ``out_store`` (int32 zarr, same
    chunks). Returns the number of clusters."""
    import zarr
    from zarr.codecs import BloscCodec

    from ._clusters import label_clusters
    from ._store import open_step

    limit_threads(threads)
    opened = open_step(store)
    labels = opened.labels
    with atomic_directory(out_store) as tmp:
        root = zarr.open_group(str(tmp), mode="w", zarr_format=3)
        out = root.create_array("clusters", shape=labels.shape, chunks=labels.chunks,
                                dtype="int32", fill_value=0, dimension_names=("z", "y", "x"),
                                compressors=[BloscCodec(cname="zstd", clevel=3)])
        _, n = label_clusters(labels, connectivity=connectivity, threads=threads, out=out)
        root.attrs.update({"wetpath": {"n_clusters": int(n), "connectivity": int(connectivity),
                                       "step": opened.attrs.get("step"),
                                       "voxel_size_um": opened.voxel_size_um}})
    return int(n)


def open_clusters(path: str | os.PathLike):
    """The cluster label array of a store written by :func:`label_step`."""
    import zarr

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
    from ._energy import perturb_fluid_boundary
    from ._geometric import geometric_angles, summarise_geometric
    from ._lattice import lattice_measures
    from ._measure import measure_clusters, state_from_clusters
    from ._store import open_step
    from ._topological import topological_from_clusters

    limit_threads(threads)
    opened = open_step(store)
    h = _voxel(opened, "measure")
    step = step or opened.attrs.get("step") or Path(store).stem
    labels = np.asarray(opened.labels[...])
    clusters = np.asarray(open_clusters(clusters_store)[...])
    lattice = lattice_measures(labels, h, threads=threads)
    table = measure_clusters(labels, h, clusters=clusters, sigma=sigma,
                             connectivity=connectivity, threads=threads)
    state = state_from_clusters(lattice, table)
    topo = topological_from_clusters(table)
    row = {"step": step, "voxel_size_um": h, **_scalars(state), **_scalars(topo)}
    paths = measure_paths(out_folder, step)
    per_cluster = topo["clusters"] if len(topo["clusters"]) else table
    if geometric:
        points = geometric_angles(labels, h, clusters=clusters, sigma=sigma, threads=threads)
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
        for kind, lab in zip(("dilated", "eroded"), perturb_fluid_boundary(labels), strict=True):
            m = lattice_measures(lab, h, threads=threads)
            # the ±1-voxel shift stands in for segmentation error of areas and volumes; the
            # curvature of the unperturbed state is kept (its shift, ~2/R², is negligible)
            perturbed.append({"perturbation": kind, **_scalars(m),
                              "curvature_nw": state["curvature_nw"]})
    atomic_write_table(pd.DataFrame(perturbed), paths["perturbed"])
    atomic_write_table(state["blocks"], paths["blocks"])
    atomic_write_table(per_cluster, paths["clusters"])
    atomic_write_table(pd.DataFrame([row]), paths["state"])
    return paths


def _read_state(folder: str | os.PathLike, step: str) -> tuple[dict, list[dict], pd.DataFrame]:
    paths = measure_paths(folder, step)
    for p in paths.values():
        if not p.is_file():
            raise WetpathError("measure output is missing", step="increment", path=p)
    state = pd.read_csv(paths["state"], dtype={"step": str}).iloc[0].to_dict()
    state["blocks"] = pd.read_csv(paths["blocks"])
    pert = pd.read_csv(paths["perturbed"]) if paths["perturbed"].stat().st_size > 1 else None
    perturbed = [] if pert is None or len(pert) == 0 else [
        {**r, "blocks": None} for r in pert.to_dict("records")]
    return state, perturbed, pd.read_csv(paths["clusters"])


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
    overlaps = pd.read_csv(overlaps_csv)
    events = pd.read_csv(events_csv, dtype={"parents": str, "children": str}).fillna(
        {"parents": "", "children": ""})
    result = energy_balance_angle(before, after, before_perturbed=pb or None,
                                  after_perturbed=pa or None, **settings)
    row = {"step_from": step_from, "step_to": step_to,
           **{k: v for k, v in result.items() if np.isscalar(v) or v is None}}
    row.update(increment_summary(overlaps, events, h))
    families = family_energy_angles(events, clusters_before, clusters_after)
    families.insert(0, "step_to", step_to)
    families.insert(0, "step_from", step_from)
    atomic_write_table(families, out_families)
    atomic_write_table(pd.DataFrame([row]), out_csv)
    return row


def collect_increments(states_csv: str | os.PathLike, increment_csvs: Sequence,
                       out_csv: str | os.PathLike, *, overlap_csvs: Sequence = (),
                       lineages_csv: str | os.PathLike | None = None) -> pd.DataFrame:
    """Concatenate per-increment rows in time order (``time_s`` of the later step) and, given the
    overlap tables in order, write the lineages of all clusters across the series."""
    from ._tracking import lineages

    states = pd.read_csv(states_csv, dtype={"step": str})
    rows = [pd.read_csv(f, dtype={"step_from": str, "step_to": str}) for f in increment_csvs]
    table = pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(
        columns=["step_from", "step_to"])
    times = dict(zip(states["step"], states["time_s"], strict=True))
    table.insert(2, "time_s", table["step_to"].map(times))
    order = {s: i for i, s in enumerate(states["step"])}
    table = table.sort_values("step_to", key=lambda s: s.map(order)).reset_index(drop=True)
    if lineages_csv is not None:
        tables = [pd.read_csv(f) for f in overlap_csvs]
        lin = lineages(tables)
        steps = list(states["step"])
        lin.insert(0, "step_name", [steps[i] for i in lin["step"]])
        atomic_write_table(lin, lineages_csv)
    atomic_write_table(table, out_csv)
    return table


def history_series(states_csv: str | os.PathLike, increments_csv: str | os.PathLike,
                   out_folder: str | os.PathLike, *, stores: Sequence = (),
                   config: Mapping | None = None, sigma_n_per_m: float | None = None,
                   static_tol: float = 0.005, title: str | None = None) -> Path:
    """Saturation-path history, branch summary, figures and the HTML report of one series."""
    from ._history import branch_summary, build_history, write_history_tables
    from ._plots import mid_plane_slices, plot_history
    from ._report import flag_warnings, write_report
    from ._store import open_step

    out = Path(out_folder)
    states = pd.read_csv(states_csv, dtype={"step": str})
    increments = pd.read_csv(increments_csv, dtype={"step_from": str, "step_to": str})
    history = build_history(states, increments, sigma_n_per_m=sigma_n_per_m,
                            static_tol=static_tol)
    branches = branch_summary(history)
    write_history_tables(out, history, branches)
    picked = _first_mid_last(list(stores))
    slices, axes = mid_plane_slices([(Path(p).stem, np.asarray(open_step(p).labels[...]))
                                     for p in picked]) if picked else (None, ("y", "x"))
    warnings = flag_warnings(increments)
    if "unresolved_clusters" in states:
        n = int(states["unresolved_clusters"].fillna(0).sum())
        if n:
            warnings.append(f"{n} cluster(s) over all states rise too little above the solid to "
                            "be resolved; they are left out of the topological angle")
    provenance = _provenance(states, config)
    return write_report(out / "report.html", history=history, branches=branches, states=states,
                        increments=increments, config=dict(config or {}),
                        provenance=provenance, warnings=warnings, slices=slices,
                        figures_dir=out / "figures", title=title, slice_axes=axes)


def _first_mid_last(items: list) -> list:
    if len(items) <= 3:
        return items
    return [items[0], items[len(items) // 2], items[-1]]


def _provenance(states: pd.DataFrame, config: Mapping | None) -> dict:
    from ._provenance import code_hash, config_hash, package_version

    cols = [c for c in ("step", "source_file", "source_bytes", "source_sha256") if c in states]
    return {"wetpath_version": package_version(), "code_sha256": code_hash(),
            "config_sha256": config_hash(dict(config or {})),
            "inputs": states[cols].to_dict("records") if cols else []}

