"""OME-Zarr step stores: one canonical label volume per time step.

A step store is a zarr v3 group laid out as an OME-Zarr (NGFF 0.5) multiscale image so that general
viewers open it: array ``0`` holds the canonical ``uint8`` labels at full resolution, array ``1`` a
2× downsampled level (mode of each 2×2×2 block, ties to the lower code). Both are chunked (default
128³ voxels) and compressed with Blosc-Zstandard (bit shuffle). The voxel size is recorded in
micrometres as the ``scale`` of each level; wetpath's own metadata (codes, source file and checksum,
settings hash, versions) sits under the ``wetpath`` attribute.

References
----------
Moore, J. et al. (2023). OME-Zarr: a cloud-optimized bioimaging file format with international
community support. *Histochemistry and Cell Biology* 160, 223–251. (NGFF specification 0.5,
https://ngff.openmicroscopy.org/0.5/)
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ._errors import WetpathError

__all__ = ["StepStore", "create_cluster_array", "create_step_store", "downsample_mode", "open_step",
           "voxel_triple"]

NGFF_VERSION = "0.5"
DEFAULT_CHUNKS = 128


@dataclass(frozen=True)
class StepStore:
    """An opened step store.

    Attributes
    ----------
    labels : zarr.Array
        Level-0 canonical labels, shape (z, y, x), uint8.
    voxel_size_um : float or tuple of float
        Voxel edge length in µm (a (z, y, x) triple when anisotropic).
    attrs : dict
        wetpath metadata (``step``, ``kind``, ``source``, ``settings_sha256``, versions ...).
    path : Path
        The store folder.
    """

    labels: object
    voxel_size_um: float | tuple[float, float, float]
    attrs: dict = field(default_factory=dict)
    path: Path | None = None


def voxel_triple(voxel_size_um, *, path=None, step: str = "store") -> tuple[float, float, float]:
    """Check a voxel size (scalar or (z, y, x) triple) and return it as a triple of floats in µm.

    Raises
    ------
    WetpathError
        If it is missing, not a number, zero, negative, infinite or NaN.
    """
    if voxel_size_um is None:
        raise WetpathError("voxel size (voxel_size_um) is missing", step=step, path=path)
    values = np.atleast_1d(np.asarray(voxel_size_um, dtype=object))
    if values.size == 1:
        values = np.repeat(values, 3)
    try:
        out = tuple(float(v) for v in values)
    except (TypeError, ValueError) as exc:
        raise WetpathError(f"voxel size {voxel_size_um!r} is not a number", step=step,
                           path=path) from exc
    if len(out) != 3 or not all(math.isfinite(v) and v > 0 for v in out):
        raise WetpathError(f"voxel size must be one or three finite positive numbers in µm, got "
                           f"{voxel_size_um!r}", step=step, path=path)
    return out


def _chunk_triple(chunks) -> tuple[int, int, int]:
    c = (int(chunks),) * 3 if np.isscalar(chunks) else tuple(int(n) for n in chunks)
    if len(c) != 3 or min(c) < 1:
        raise WetpathError(f"chunks must be one or three positive integers, got {chunks!r}",
                           step="store")
    return c


def _multiscales(name: str, voxel: tuple[float, float, float]) -> dict:
    axes = [{"name": a, "type": "space", "unit": "micrometer"} for a in "zyx"]
    datasets = []
    for level in (0, 1):
        f = 2**level
        transforms = [{"type": "scale", "scale": [v * f for v in voxel]}]
        if level:  # a coarse voxel's centre sits half a fine voxel further on
            transforms.append({"type": "translation",
                               "translation": [v * (f - 1) / 2 for v in voxel]})
        datasets.append({"path": str(level), "coordinateTransformations": transforms})
    return {"name": name, "axes": axes, "datasets": datasets, "type": "mode",
            "metadata": {"description": "level 1: mode of each 2x2x2 block, ties to the lower "
                                        "phase code"}}


def create_step_store(path: str | os.PathLike, shape, voxel_size_um, *, chunks=DEFAULT_CHUNKS,
                      name: str = "labels", attrs: Mapping | None = None):
    """Create an empty step store (group with levels ``0`` and ``1``) at ``path``.

    Call it on a temporary path (see :func:`wetpath._atomic.atomic_directory`) and fill the arrays
    before the rename. Returns ``(level0, level1)`` zarr arrays.
    """
    import zarr
    from zarr.codecs import BloscCodec

    voxel = voxel_triple(voxel_size_um, path=path)
    chunk = _chunk_triple(chunks)
    shape = tuple(int(n) for n in shape)
    root = zarr.open_group(str(path), mode="w", zarr_format=3)
    levels = []
    for level, shp in enumerate((shape, tuple((n + 1) // 2 for n in shape))):
        levels.append(root.create_array(
            str(level), shape=shp, chunks=tuple(min(c, n) for c, n in zip(chunk, shp, strict=True)),
            dtype="uint8", fill_value=0, dimension_names=("z", "y", "x"),
            compressors=[BloscCodec(cname="zstd", clevel=5, shuffle="bitshuffle")]))
    meta = {"voxel_size_um": list(voxel), "chunks": list(chunk), **dict(attrs or {})}
    root.attrs.update({"ome": {"version": NGFF_VERSION, "multiscales": [_multiscales(name, voxel)]},
                       "wetpath": meta})
    return levels[0], levels[1]


def create_cluster_array(group, shape, chunks, n: int):
    """The ``clusters`` array of a cluster label store, for ids 0..n, in ``group``.

    Stored in the smallest dtype that holds n (:func:`wetpath._clusters.cluster_dtype`: uint16 up
    to 65 535 clusters, else int32) and compressed with Blosc-LZ4 (bit shuffle): a 1024³ step's
    labels are written and read several times faster than as Zstandard-compressed int32.
    All-zero chunks are stored too (a few hundred bytes each).
    Readers take whatever integer dtype the array has.
    """
    from zarr.codecs import BloscCodec

    from ._clusters import cluster_dtype

    return group.create_array(
        "clusters", shape=tuple(int(v) for v in shape), chunks=tuple(int(c) for c in chunks),
        dtype=cluster_dtype(n), fill_value=0, dimension_names=("z", "y", "x"),
        compressors=[BloscCodec(cname="lz4", clevel=5, shuffle="bitshuffle")],
        # every chunk is written: skipping empty ones costs a full comparison per chunk, more
        # than the encoding itself
        config={"write_empty_chunks": True})


def downsample_mode(labels: np.ndarray) -> np.ndarray:
    """2× downsampling of canonical labels by the mode of each 2×2×2 block (ties to the lower code).

    Odd sizes are padded by repeating the last plane, row or column. Codes must be 0–3.
    """
    labels = np.asarray(labels)
    pad = [(0, n % 2) for n in labels.shape]
    if any(p[1] for p in pad):
        labels = np.pad(labels, pad, mode="edge")
    parts = [labels[i::2, j::2, k::2] for i in (0, 1) for j in (0, 1) for k in (0, 1)]
    counts = np.zeros((4, *parts[0].shape), np.uint8)
    for part in parts:
        for code in (1, 2, 3):
            counts[code] += part == code
    counts[0] = 8 - counts[1:].sum(axis=0, dtype=np.uint8)
    return np.argmax(counts, axis=0).astype(np.uint8)  # argmax keeps the first (lowest) on ties


def open_step(path: str | os.PathLike) -> StepStore:
    """Open a step store written by :func:`wetpath.ingest_volume`.

    Parameters
    ----------
    path : str or path
        The ``<step>.zarr`` folder.

    Returns
    -------
    StepStore
        Level-0 labels (lazy zarr array), voxel size in µm and wetpath attributes.

    Raises
    ------
    WetpathError
        If the path does not exist or is not a wetpath step store.
    """
    import zarr

    path = Path(path)
    if not path.is_dir():
        raise WetpathError("step store does not exist", step="open", path=path)
    try:
        root = zarr.open_group(str(path), mode="r")
        attrs = dict(root.attrs)
        meta = dict(attrs["wetpath"])
        level0 = root[attrs["ome"]["multiscales"][0]["datasets"][0]["path"]]
    except Exception as exc:
        raise WetpathError(f"not a wetpath step store ({type(exc).__name__}: {exc})",
                           step="open", path=path) from exc
    voxel = tuple(float(v) for v in meta["voxel_size_um"])
    return StepStore(labels=level0, voxel_size_um=voxel[0] if len(set(voxel)) == 1 else voxel,
                     attrs=meta, path=path)
