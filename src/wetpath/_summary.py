"""Per-step summary: voxel counts per phase, porosity and wetting saturation in the field of view.

Counts are accumulated block by block (``np.bincount`` per block), so any chunking gives the same
integers and the memory use is one block. Excluded voxels (code 0) are outside the field of view.
Porosity φ = (V_w + V_n) / (V_s + V_w + V_n); wetting saturation S_w = V_w / (V_w + V_n), both
counted inside the field of view (common practice in pore-scale imaging).
"""

from __future__ import annotations

import itertools
import os

import numpy as np
import pandas as pd

from ._errors import WetpathError

__all__ = ["SUMMARY_COLUMNS", "summarise_labels", "summarise_step"]

SUMMARY_COLUMNS = ["step", "voxels_excluded", "voxels_solid", "voxels_wetting",
                   "voxels_nonwetting", "voxels_fov", "porosity", "saturation_w",
                   "flag_no_pore_space", "shape_z", "shape_y", "shape_x", "voxel_size_um",
                   "bulk_volume_um3", "pore_volume_um3"]


def _blocks(shape, chunks):
    edges = [range(0, n, c) for n, c in zip(shape, chunks, strict=True)]
    for start in itertools.product(*edges):
        yield tuple(slice(s, min(s + c, n)) for s, c, n in zip(start, chunks, shape, strict=True))


def summarise_labels(labels, *, chunks=None) -> dict:
    """Voxel counts per canonical phase, porosity and wetting saturation.

    Parameters
    ----------
    labels : array-like (z, y, x) of canonical uint8 codes, or a zarr array
        Read block by block.
    chunks : int or triple, optional
        Block edge in voxels; default the array's own chunks (zarr) or 128.

    Returns
    -------
    dict
        ``voxels_excluded, voxels_solid, voxels_wetting, voxels_nonwetting, voxels_fov``
        (int), ``porosity`` and ``saturation_w`` (float, NaN when undefined) and
        ``flag_no_pore_space`` (True when the field of view holds no fluid voxel, so both
        fractions are undefined).

    Raises
    ------
    WetpathError
        If a value is not a canonical code (0–3).
    """
    shape = tuple(labels.shape)
    if chunks is None:
        chunks = getattr(labels, "chunks", None) or 128
    chunks = (int(chunks),) * 3 if np.isscalar(chunks) else tuple(int(c) for c in chunks)
    counts = np.zeros(4, np.int64)
    for block in _blocks(shape, chunks):
        part = np.asarray(labels[block])
        c = np.bincount(part.ravel(), minlength=4)
        if c.size > 4:
            raise WetpathError(f"labels hold non-canonical values up to {c.size - 1}",
                               step="summarise")
        counts += c
    excluded, solid, wet, nonwet = (int(v) for v in counts)
    fov, pore = solid + wet + nonwet, wet + nonwet
    return {"voxels_excluded": excluded, "voxels_solid": solid, "voxels_wetting": wet,
            "voxels_nonwetting": nonwet, "voxels_fov": fov,
            "porosity": pore / fov if fov else float("nan"),
            "saturation_w": wet / pore if pore else float("nan"),
            "flag_no_pore_space": pore == 0}


def summarise_step(store: str | os.PathLike, *, chunks=None, step: str | None = None,
                   same_shape_as: str | os.PathLike | None = None) -> pd.DataFrame:
    """One-row summary table of a step store, with its provenance.

    Columns: :data:`SUMMARY_COLUMNS` plus ``source_file, source_bytes, source_sha256,
    settings_sha256, wetpath_version, code_sha256`` (from the store's metadata). Volumes in µm³.

    ``same_shape_as`` names the step store of the series' first step: a volume of another shape
    fails here, before any per-step analysis runs, naming both source files.
    """
    from ._store import open_step

    opened = open_step(store)
    labels = opened.labels
    row = {"step": step or opened.attrs.get("step", os.path.basename(str(store)))}
    if same_shape_as is not None:
        _check_same_shape(opened, open_step(same_shape_as), row["step"])
    row.update(summarise_labels(labels, chunks=chunks))
    voxel = np.broadcast_to(np.asarray(opened.voxel_size_um, float), 3)
    row.update({"shape_z": labels.shape[0], "shape_y": labels.shape[1],
                "shape_x": labels.shape[2],
                "voxel_size_um": float(voxel[0]) if np.all(voxel == voxel[0]) else str(
                    tuple(voxel.tolist())),
                "bulk_volume_um3": row["voxels_fov"] * float(np.prod(voxel)),
                "pore_volume_um3": (row["voxels_wetting"] + row["voxels_nonwetting"])
                * float(np.prod(voxel))})
    src = (opened.attrs.get("inputs") or {}).get("source") or {}
    row.update({"source_file": src.get("file"), "source_bytes": src.get("bytes"),
                "source_sha256": src.get("sha256"),
                "settings_sha256": opened.attrs.get("settings_sha256"),
                "wetpath_version": opened.attrs.get("wetpath_version"),
                "code_sha256": opened.attrs.get("code_sha256")})
    return pd.DataFrame([row])


def _source(opened) -> str:
    src = (opened.attrs.get("inputs") or {}).get("source") or {}
    return str(src.get("file") or opened.path)


def _check_same_shape(opened, first, step: str) -> None:
    shape, ref = tuple(opened.labels.shape), tuple(first.labels.shape)
    if shape != ref:
        raise WetpathError(f"volumes of different shapes within one series: shape {shape} but "
                           f"the first step {first.attrs.get('step')} ({_source(first)}) has "
                           f"{ref}", step=f"summarise {step}", path=_source(opened))


def join_states(times: pd.DataFrame, tables, *, series: str | None = None) -> pd.DataFrame:
    """Join per-step tables into one row per step: the series' ``states.csv``.

    Parameters
    ----------
    times : DataFrame
        ``step, time_s`` (as from :func:`wetpath._ingest.read_step_table`), in time order.
    tables : iterable of path
        Per-step CSV files, each with a ``step`` column. A table is named by its folder
        (``summaries/step_000.csv`` belongs to table ``summaries``); tables are joined in order of
        first appearance, so a later per-step table (e.g. ``measures``) joins by adding its files.
    series : str, optional
        Named in error messages.

    Returns
    -------
    DataFrame
        ``step, time_s`` then the columns of each table. A column that an earlier table already
        has is dropped when equal in every row, else kept as ``<column>_<table>``.

    Raises
    ------
    WetpathError
        A step missing from a table or listed twice; volumes of different shapes in one series.
    """
    from pathlib import Path

    where = f"states {series}" if series else "states"
    out = times[["step", "time_s"]].reset_index(drop=True).copy()
    groups: dict[str, list[Path]] = {}
    for f in tables:
        groups.setdefault(Path(f).parent.name, []).append(Path(f))
    for name, files in groups.items():
        part = pd.concat([pd.read_csv(f, dtype={"step": str}) for f in files], ignore_index=True)
        if "step" not in part.columns:
            raise WetpathError(f"table {name} has no step column", step=where, path=files[0])
        dup = part["step"][part["step"].duplicated()].tolist()
        missing = sorted(set(out["step"]) - set(part["step"]))
        if dup or missing:
            raise WetpathError(f"table {name}: steps missing {missing[:5]}, duplicated "
                               f"{dup[:5]}", step=where, path=files[0].parent)
        part = out[["step"]].merge(part, on="step", how="left")
        for col in [c for c in part.columns if c != "step"]:
            if col in out.columns:
                same = out[col].equals(part[col]) or (
                    pd.api.types.is_numeric_dtype(part[col])
                    and np.allclose(out[col], part[col], equal_nan=True, rtol=0, atol=0))
                if not same:
                    out[f"{col}_{name}"] = part[col].to_numpy()
            else:
                out[col] = part[col].to_numpy()
    if {"shape_z", "shape_y", "shape_x"} <= set(out.columns):
        shapes = list(zip(out["shape_z"], out["shape_y"], out["shape_x"], strict=True))
        odd = [i for i, s in enumerate(shapes) if s != shapes[0]]
        if odd:
            i = odd[0]
            raise WetpathError(f"volumes of different shapes within one series: step "
                               f"{out['step'][i]} is {shapes[i]} but step {out['step'][0]} is "
                               f"{shapes[0]}", step=where)
    return out
