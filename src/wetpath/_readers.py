"""Readers for the volume formats of micro-CT practice, lazy and plane-slab wise.

``read_volume`` opens a volume without reading its voxels and returns a :class:`Volume` whose
``read(z0, z1)`` loads planes ``z0:z1`` only, so a volume larger than memory can be streamed slab by
slab: multi-page TIFF and folders of 2D TIFF slices page by page (tifffile), raw binary and ``.npy``
memory-mapped, zarr arrays and HDF5 datasets through their own chunked access. Files are opened
read-only. Axis order is (z, y, x): TIFF pages and slice files are z planes.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping
from pathlib import Path

import numpy as np

from ._errors import WetpathError

__all__ = ["FORMATS", "Volume", "detect_format", "read_volume"]

FORMATS = ("tiff", "tiff-folder", "raw", "npy", "zarr", "hdf5")
_SUFFIX = {".tif": "tiff", ".tiff": "tiff", ".npy": "npy", ".zarr": "zarr", ".h5": "hdf5",
           ".hdf5": "hdf5", ".hdf": "hdf5", ".nxs": "hdf5", ".raw": "raw", ".bin": "raw",
           ".vol": "raw", ".dat": "raw"}
_STEP = "read"


class Volume:
    """A lazily read 3D volume: ``shape``, ``dtype``, ``path`` and ``read(z0, z1)``.

    ``np.asarray(volume)`` reads everything; ``volume[a:b]`` reads planes ``a:b`` (further indices
    are applied after reading those planes). Use as a context manager to close open files.
    """

    def __init__(self, path: Path, shape: tuple[int, int, int], dtype: np.dtype, reader,
                 closer=None):
        self.path, self.shape = path, tuple(int(n) for n in shape)
        self.dtype = np.dtype(dtype).newbyteorder("=")  # what read() returns
        self._reader, self._closer = reader, closer
        self.step = _STEP  # named in errors; read_volume sets the caller's step

    ndim = 3

    @property
    def nbytes(self) -> int:
        return int(np.prod(self.shape)) * self.dtype.itemsize

    def read(self, z0: int = 0, z1: int | None = None) -> np.ndarray:
        """Planes ``z0:z1`` as an in-memory array in native byte order."""
        z1 = self.shape[0] if z1 is None else min(z1, self.shape[0])
        try:
            out = np.asarray(self._reader(z0, z1))
        except WetpathError:
            raise
        except Exception as exc:  # e.g. a file truncated after its header: one line, the file
            raise WetpathError(f"cannot read planes {z0}:{z1}: {type(exc).__name__}: {exc}",
                               step=self.step, path=self.path) from exc
        if out.shape != (z1 - z0, *self.shape[1:]):
            raise WetpathError(f"planes {z0}:{z1} have shape {out.shape}, expected "
                               f"{(z1 - z0, *self.shape[1:])}", step=self.step, path=self.path)
        return out.astype(out.dtype.newbyteorder("="), copy=False)

    def __getitem__(self, key):
        key = key if isinstance(key, tuple) else (key,)
        first = key[0]
        if isinstance(first, slice) and first.step in (None, 1):
            z0, z1, _ = first.indices(self.shape[0])
            return self.read(z0, max(z0, z1))[(slice(None), *key[1:])]
        return np.asarray(self)[key]

    def __array__(self, dtype=None, copy=None):
        out = self.read(0, self.shape[0])
        return out if dtype is None else out.astype(dtype)

    def close(self) -> None:
        if self._closer is not None:
            self._closer()
            self._closer = None

    def __enter__(self) -> Volume:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Volume({str(self.path)!r}, shape={self.shape}, dtype={self.dtype})"


def detect_format(path: str | os.PathLike) -> str:
    """Guess the format from the name: suffix, or for a folder its content (zarr or TIFF slices)."""
    path = Path(path)
    if path.is_dir():
        if (path / "zarr.json").exists() or (path / ".zarray").exists() or \
                (path / ".zgroup").exists():
            return "zarr"
        if any(p.suffix.lower() in (".tif", ".tiff") for p in path.iterdir()):
            return "tiff-folder"
        raise WetpathError("folder holds neither a zarr array nor TIFF slices", step=_STEP,
                           path=path)
    fmt = _SUFFIX.get(path.suffix.lower())
    if fmt is None:
        raise WetpathError(f"cannot tell the format from the suffix {path.suffix!r}; give format "
                           f"= one of {', '.join(FORMATS)}", step=_STEP, path=path)
    return fmt


def read_volume(source: str | os.PathLike, *, format: str | None = None, dtype=None,
                shape=None, byte_order: str = "little", offset: int = 0,
                dataset: str | None = None, step: str = _STEP) -> Volume:
    """Open a 3D volume lazily.

    Parameters
    ----------
    source : str or path
        A multi-page TIFF, a folder of 2D TIFF slices (sorted by the numbers in their names), a raw
        binary file, a ``.npy`` file, a zarr array or group, or an HDF5 file.
    format : {"tiff", "tiff-folder", "raw", "npy", "zarr", "hdf5"}, optional
        Default: from the suffix (or folder content).
    dtype, shape : raw only
        Voxel type (e.g. ``"uint16"``) and shape (z, y, x) in voxels.
    byte_order : {"little", "big"}, raw only
        Byte order of multi-byte voxels.
    offset : int, raw only
        Header length in bytes before the first voxel.
    dataset : str, optional
        HDF5 dataset path, or array path inside a zarr group (default: the only 3D array, or the
        first multiscale level of an OME-Zarr image).
    step : str
        Named in error messages.

    Returns
    -------
    Volume
        Lazy volume; nothing is read until ``read`` is called.

    Raises
    ------
    WetpathError
        Missing or unreadable file, raw size not matching ``offset + prod(shape) * itemsize``,
        TIFF pages or slices of inconsistent shape, not a 3D volume.
    """
    path = Path(source)
    if not path.exists():
        raise WetpathError("input file does not exist", step=step, path=path)
    if not os.access(path, os.R_OK):
        raise WetpathError("input file is not readable (permissions)", step=step, path=path)
    fmt = format if format not in (None, "auto") else detect_format(path)
    readers = {"tiff": _tiff, "tiff-folder": _tiff_folder, "npy": _npy, "zarr": _zarr,
               "hdf5": _hdf5}
    try:
        if fmt == "raw":
            vol = _raw(path, dtype, shape, byte_order, offset, step)
        elif fmt in readers:
            vol = readers[fmt](path, dataset, step)
        else:
            raise WetpathError(f"unknown format {fmt!r}; known: {', '.join(FORMATS)}", step=step,
                               path=path)
    except WetpathError:
        raise
    except Exception as exc:  # a library's parse error: name the file and the cause, one line
        raise WetpathError(f"cannot read as {fmt}: {type(exc).__name__}: {exc}", step=step,
                           path=path) from exc
    if len(vol.shape) != 3 or min(vol.shape) < 1:
        vol.close()
        raise WetpathError(f"expected a 3D volume, got shape {vol.shape}", step=step, path=path)
    vol.step = step
    return vol


def _raw(path: Path, dtype, shape, byte_order: str, offset: int, step: str) -> Volume:
    if dtype is None or shape is None:
        raise WetpathError("raw input needs dtype and shape (z, y, x)", step=step, path=path)
    try:
        dt = np.dtype(dtype)
    except TypeError as exc:
        raise WetpathError(f"unknown raw dtype {dtype!r}", step=step, path=path) from exc
    if byte_order not in ("little", "big"):
        raise WetpathError(f"byte_order must be 'little' or 'big', not {byte_order!r}", step=step,
                           path=path)
    shape = tuple(int(n) for n in shape)
    if len(shape) != 3 or min(shape) < 1 or int(offset) < 0:
        raise WetpathError(f"raw shape must be three positive sizes (z, y, x) and offset >= 0, "
                           f"got shape {shape}, offset {offset}", step=step, path=path)
    dt = dt.newbyteorder("<" if byte_order == "little" else ">")
    expected = int(offset) + int(np.prod(shape)) * dt.itemsize
    actual = path.stat().st_size
    if actual != expected:
        raise WetpathError(f"raw file has {actual} bytes but dtype {dt.name} x shape "
                           f"{shape} + offset {offset} needs {expected} bytes", step=step,
                           path=path)
    mm = np.memmap(path, dtype=dt, mode="r", offset=int(offset), shape=shape)
    return Volume(path, shape, dt, lambda z0, z1: np.array(mm[z0:z1]))


def _npy(path: Path, dataset, step: str) -> Volume:
    arr = np.load(path, mmap_mode="r", allow_pickle=False)
    return Volume(path, arr.shape, arr.dtype, lambda z0, z1: np.array(arr[z0:z1]))


def _tiff(path: Path, dataset, step: str) -> Volume:
    import tifffile

    tf = tifffile.TiffFile(path)
    try:
        by_series = len(tf.series) == 1
        if by_series:
            series = tf.series[0]
            dtype, shape = series.dtype, tuple(series.shape)
            shape = (1, *shape) if len(shape) == 2 else shape
        else:  # pages written one by one: a volume if all are 2D planes of one shape
            shapes = [tuple(p.shape) for p in tf.pages]
            odd = next((i for i, s in enumerate(shapes) if s != shapes[0]), None)
            if odd is not None:
                raise WetpathError(f"TIFF pages of inconsistent shape: page 0 is {shapes[0]}, "
                                   f"page {odd} is {shapes[odd]}", step=step, path=path)
            if len(shapes[0]) != 2 or len(tf.series) != len(shapes):
                raise WetpathError(f"TIFF file holds {len(tf.series)} image series; expected "
                                   "one volume", step=step, path=path)
            dtype, shape = tf.pages[0].dtype, (len(shapes), *shapes[0])
        if len(shape) != 3:
            raise WetpathError(f"TIFF image has shape {shape}; expected planes (z, y, x)",
                               step=step, path=path)
        if by_series and len(series.pages) != shape[0]:  # one volumetric page: read it whole
            data = series.asarray().reshape(shape)
            tf.close()
            return Volume(path, shape, dtype, lambda z0, z1: data[z0:z1])
    except BaseException:
        tf.close()
        raise

    def read(z0, z1):  # page by page (ImageJ files beyond 4 GB included: virtual frames)
        if z1 <= z0:
            return np.empty((0, *shape[1:]), dtype)
        pages = tf.asarray(key=range(z0, z1), series=0 if by_series else None)
        return pages.reshape(z1 - z0, *shape[1:])

    return Volume(path, shape, dtype, read, tf.close)


def _natural_key(p: Path):
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", p.name)]


def _tiff_folder(path: Path, dataset, step: str) -> Volume:
    import tifffile

    files = sorted((p for p in path.iterdir() if p.suffix.lower() in (".tif", ".tiff")),
                   key=_natural_key)
    if not files:
        raise WetpathError("folder has no .tif/.tiff slices", step=step, path=path)
    first = None
    for f in files:
        with tifffile.TiffFile(f) as tf:
            page = tf.pages[0]
            meta = (tuple(page.shape), page.dtype, len(tf.pages))
        if meta[2] != 1 or len(meta[0]) != 2:
            raise WetpathError(f"slice {f.name} is not a single 2D plane (pages {meta[2]}, shape "
                               f"{meta[0]})", step=step, path=path)
        if first is None:
            first = meta
        elif meta[:2] != first[:2]:
            raise WetpathError(f"slices of inconsistent shape or dtype: {files[0].name} is "
                               f"{first[0]} {first[1]}, {f.name} is {meta[0]} {meta[1]}",
                               step=step, path=path)
    shape = (len(files), *first[0])

    def read(z0, z1):
        out = np.empty((max(z1 - z0, 0), *shape[1:]), first[1])
        for i, f in enumerate(files[z0:z1]):
            out[i] = tifffile.imread(f)
        return out

    return Volume(path, shape, first[1], read)


def _zarr(path: Path, dataset, step: str) -> Volume:
    import zarr

    node = zarr.open(str(path), mode="r")
    if isinstance(node, zarr.Group):
        if dataset is None:
            attrs = dict(node.attrs)
            ms = attrs.get("ome", attrs).get("multiscales")
            if ms:
                dataset = ms[0]["datasets"][0]["path"]
            else:
                arrays = [name for name, a in node.arrays() if a.ndim == 3]
                if len(arrays) != 1:
                    raise WetpathError(f"zarr group holds {len(arrays)} 3D arrays "
                                       f"{arrays[:5]}; give dataset", step=step, path=path)
                dataset = arrays[0]
        node = node[dataset]
    arr = node
    return Volume(path, arr.shape, arr.dtype, lambda z0, z1: arr[z0:z1])


def _hdf5(path: Path, dataset, step: str) -> Volume:
    import h5py

    fh = h5py.File(path, "r")
    try:
        if dataset is None:
            found: list[str] = []
            fh.visititems(lambda name, obj: found.append(name)
                          if isinstance(obj, h5py.Dataset) and obj.ndim == 3 else None)
            if len(found) != 1:
                raise WetpathError(f"HDF5 file holds {len(found)} 3D datasets {found[:5]}; give "
                                   "dataset", step=step, path=path)
            dataset = found[0]
        if dataset not in fh or not isinstance(fh[dataset], h5py.Dataset):
            raise WetpathError(f"HDF5 file has no dataset {dataset!r}", step=step, path=path)
        ds = fh[dataset]
    except BaseException:
        fh.close()
        raise
    return Volume(path, ds.shape, ds.dtype, lambda z0, z1: ds[z0:z1], fh.close)


def read_options(settings: Mapping | None) -> dict:
    """Reader keywords (format, dtype, shape, byte_order, offset, dataset) from a settings dict."""
    settings = dict(settings or {})
    out = {k: settings[k] for k in ("format", "dataset") if settings.get(k) is not None}
    raw = settings.get("raw") or {}
    out.update({k: raw[k] for k in ("dtype", "shape", "byte_order", "offset") if k in raw})
    return out
