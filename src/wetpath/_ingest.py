"""Ingest: one time step of an experiment → a validated canonical step store (`steps/<step>.zarr`).

Cheap checks come first (voxel size, phase codes, file present and readable, raw size, TIFF page
shapes, grayscale reference shape); then the volume is streamed slab by slab (one chunk depth of
planes at a time) into a temporary store that is renamed when complete. Unexpected label values are
tallied over the whole volume and reported with their counts; the temporary store is then removed,
so a failed ingest leaves nothing behind. Inputs are only ever opened read-only.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd

from ._atomic import atomic_directory
from ._codes import PHASE_NAMES, PhaseCodes, to_canonical
from ._errors import WetpathError
from ._provenance import code_hash, config_hash, input_record, package_version
from ._readers import read_volume
from ._store import DEFAULT_CHUNKS, create_step_store, downsample_mode, voxel_triple

__all__ = ["ingest_volume", "read_step_table"]

STEP_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")


def ingest_volume(source: str | os.PathLike, out_store: str | os.PathLike, *,
                  voxel_size_um, codes: PhaseCodes | Mapping | None = None,
                  chunks=DEFAULT_CHUNKS, kind: str = "labels", read: Mapping | None = None,
                  segment: Mapping | None = None, step: str | None = None) -> Path:
    """Validate one time-step volume and write it as a canonical OME-Zarr step store.

    Parameters
    ----------
    source : str or path
        The step's volume in any format :func:`wetpath.read_volume` reads.
    out_store : str or path
        Target ``<step>.zarr`` folder; written under a temporary name and renamed when complete
        (an existing store is replaced).
    voxel_size_um : float or (z, y, x) triple
        Voxel edge length in micrometres.
    codes : PhaseCodes or mapping, optional
        Input label values of each phase (labels only); default canonical 0/1/2/3.
    chunks : int or triple
        Chunk edge in voxels (default 128).
    kind : {"labels", "grayscale"}
        ``"grayscale"`` segments the scan with :func:`wetpath.segment_grayscale` against the dry
        reference named by ``segment["dry"]``.
    read : mapping, optional
        Reader options: ``format``, ``dataset``, and for raw files ``raw: {dtype, shape,
        byte_order, offset}`` (used for the dry reference too).
    segment : mapping, optional
        Grayscale only: ``dry`` (path) and the keywords of :func:`wetpath.segment_grayscale`.
    step : str, optional
        Step name for messages and metadata; default the store name without ``.zarr``.

    Returns
    -------
    Path
        ``out_store``.

    Raises
    ------
    WetpathError
        Bad voxel size, codes or kind; missing/unreadable file; raw size mismatch; inconsistent TIFF
        pages; grayscale scan and reference of different shapes; unexpected label values (listed
        with their voxel counts). Nothing is left at ``out_store`` (nor a temporary) on error.
    """
    from ._readers import read_options

    out_store = Path(out_store)
    name = step or out_store.name.removesuffix(".zarr")
    where = f"ingest {name}"
    voxel = voxel_triple(voxel_size_um, path=source, step=where)
    codes = PhaseCodes.from_mapping(codes)
    codes.lookup()
    if kind not in ("labels", "grayscale"):
        raise WetpathError(f"kind must be 'labels' or 'grayscale', not {kind!r}", step=where,
                           path=source)
    segment = dict(segment or {})
    opts = read_options({"raw": None, **dict(read or {})})
    settings = {"voxel_size_um": list(voxel), "codes": _codes_dict(codes), "chunks": chunks,
                "kind": kind, "read": dict(read or {}), "segment": segment}
    with read_volume(source, step=where, **opts) as vol:
        inputs = {"source": None, "dry": None}
        dry = None
        if kind == "grayscale":
            if not segment.get("dry"):
                raise WetpathError("grayscale ingest needs segment.dry, the dry reference scan",
                                   step=where, path=source)
            dry = read_volume(segment["dry"], step=where, **opts)
            if dry.shape != vol.shape:
                dry.close()
                raise WetpathError(f"scan shape {vol.shape} differs from the dry reference "
                                   f"{segment['dry']} shape {dry.shape}", step=where, path=source)
            inputs["dry"] = input_record(segment["dry"])
        inputs["source"] = input_record(source)
        attrs = {"step": name, "kind": kind, "codes": _codes_dict(PhaseCodes()),
                 "input_codes": _codes_dict(codes), "inputs": inputs,
                 "settings_sha256": config_hash(settings), "wetpath_version": package_version(),
                 "code_sha256": code_hash()}
        with atomic_directory(out_store) as tmp:
            level0, level1 = create_step_store(tmp, vol.shape, voxel, chunks=chunks, name=name,
                                               attrs=attrs)
            if kind == "grayscale":
                from ._segment import segment_grayscale

                knobs = {k: v for k, v in segment.items() if k != "dry"}
                with dry:
                    labels = segment_grayscale(np.asarray(vol), np.asarray(dry), **knobs)
                _write_levels(level0, level1, lambda z0, z1: labels[z0:z1], vol.shape)
            else:
                _write_labels(vol, codes, level0, level1, where)
    return out_store


def _codes_dict(codes: PhaseCodes) -> dict:
    return {k: (list(v) if isinstance(v, tuple) else v) for k, v in vars(codes).items()}


def _slab_depth(level0) -> int:
    depth = level0.chunks[0]
    return depth if depth % 2 == 0 else 2 * depth


def _write_levels(level0, level1, get_slab, shape) -> None:
    depth = _slab_depth(level0)
    for z0 in range(0, shape[0], depth):
        slab = get_slab(z0, min(z0 + depth, shape[0]))
        level0[z0:z0 + slab.shape[0]] = slab
        level1[z0 // 2:z0 // 2 + (slab.shape[0] + 1) // 2] = downsample_mode(slab)


def _write_labels(vol, codes: PhaseCodes, level0, level1, where: str) -> None:
    """Stream ``vol`` into the levels; tally unexpected values over the whole volume."""
    depth = _slab_depth(level0)
    known = np.array(sorted(codes.lookup()))
    unknown: dict[int, int] = {}
    for z0 in range(0, vol.shape[0], depth):
        raw = vol.read(z0, z0 + depth)
        if raw.dtype.kind not in "iub":
            raise WetpathError(f"label volume must hold integers, got dtype {raw.dtype}",
                               step=where, path=vol.path)
        if not unknown:
            try:
                slab = to_canonical(raw, codes, path=str(vol.path), step=where)
            except WetpathError:
                pass
            else:
                level0[z0:z0 + slab.shape[0]] = slab
                level1[z0 // 2:z0 // 2 + (slab.shape[0] + 1) // 2] = downsample_mode(slab)
                continue
        values, counts = np.unique(raw[~np.isin(raw, known)], return_counts=True)
        for v, c in zip(values.tolist(), counts.tolist(), strict=True):
            unknown[v] = unknown.get(v, 0) + c
    if unknown:
        listing = ", ".join(f"{v} ({c} voxels)" for v, c in sorted(unknown.items())[:10])
        more = "" if len(unknown) <= 10 else f" and {len(unknown) - 10} more values"
        table = codes.lookup()
        names = ", ".join(f"{v}={PHASE_NAMES[c]}" for v, c in sorted(table.items()))
        raise WetpathError(f"unexpected label values {listing}{more}; known codes are {names}",
                           step=where, path=vol.path)


def read_step_table(source: str | os.PathLike, *, times: str = "times.csv",
                    series: str | None = None) -> pd.DataFrame:
    """Read and check the list of time steps of a series.

    Parameters
    ----------
    source : str or path
        The series folder holding ``times`` (or the CSV itself). Columns: ``step`` (name, letters,
        digits, ``_ . -``), ``time_s`` (seconds since the start of the experiment) and ``file``
        (relative to the folder, or absolute).
    times : str
        File name of the step table inside the folder.
    series : str, optional
        Named in error messages.

    Returns
    -------
    DataFrame
        ``step, time_s, file`` (``file`` as a path string resolved against the folder), in time
        order. One step is allowed (state measures still work; increments need two).

    Raises
    ------
    WetpathError
        Missing table or columns, bad or duplicate step names, duplicate or non-increasing time
        stamps, a listed file that does not exist.
    """
    source = Path(source)
    csv = source / times if source.is_dir() or not source.suffix else source
    where = f"series {series}" if series else "series"
    if not csv.is_file():
        raise WetpathError("step table does not exist", step=where, path=csv)
    try:
        table = pd.read_csv(csv, dtype={"step": str, "file": str})
    except Exception as exc:
        raise WetpathError(f"cannot read step table: {exc}", step=where, path=csv) from exc
    missing = {"step", "time_s", "file"} - set(table.columns)
    if missing:
        raise WetpathError(f"step table lacks column(s) {sorted(missing)}", step=where, path=csv)
    if table.empty:
        raise WetpathError("step table lists no steps", step=where, path=csv)
    bad = [s for s in table["step"] if not isinstance(s, str) or not STEP_NAME.match(s)]
    if bad:
        raise WetpathError(f"bad step name(s) {bad[:5]}: use letters, digits, '_', '.', '-'",
                           step=where, path=csv)
    dup = table["step"][table["step"].duplicated()].tolist()
    if dup:
        raise WetpathError(f"duplicate step name(s) {dup[:5]}", step=where, path=csv)
    t = pd.to_numeric(table["time_s"], errors="coerce").to_numpy(float)
    if not np.all(np.isfinite(t)):
        raise WetpathError("time_s must be finite numbers in every row", step=where, path=csv)
    if np.any(np.diff(t) <= 0):
        i = int(np.flatnonzero(np.diff(t) <= 0)[0])
        raise WetpathError(f"time stamps must increase: step {table['step'][i + 1]} has time_s "
                           f"{t[i + 1]:g} after {t[i]:g} of step {table['step'][i]}",
                           step=where, path=csv)
    files = [str(f if Path(f).is_absolute() else csv.parent / f) for f in table["file"]]
    for s, f in zip(table["step"], files, strict=True):
        if not Path(f).exists():
            raise WetpathError(f"input of step {s} does not exist: {f}", step=where, path=csv)
    return pd.DataFrame({"step": table["step"], "time_s": t, "file": files})


