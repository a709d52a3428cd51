"""Atomic writes: a file, table or directory store appears complete under its name or not at all.

Everything is first written under a hidden temporary sibling name (same folder, same file system)
and then renamed. A writer killed mid-way leaves only a ``.<name>.tmp-*`` sibling, which no reader
and no Snakemake rule takes for a result; the next writer of the same target removes such leftovers.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import uuid
from collections.abc import Iterator
from pathlib import Path

import pandas as pd

__all__ = ["atomic_directory", "atomic_write_bytes", "atomic_write_text", "atomic_write_table",
           "temporary_sibling"]


def temporary_sibling(path: str | os.PathLike) -> Path:
    """A fresh hidden name next to ``path``: ``.<name>.tmp-<pid>-<random>``."""
    path = Path(path)
    return path.with_name(f".{path.name}.tmp-{os.getpid()}-{uuid.uuid4().hex[:8]}")


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        with contextlib.suppress(FileNotFoundError):
            path.unlink()


def _remove_leftovers(path: Path) -> None:
    """Delete temporaries of earlier, interrupted writers of the same target."""
    if path.parent.is_dir():
        for old in path.parent.glob(f".{path.name}.tmp-*"):
            _remove(old)


def _fsync_dir(folder: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically (temporary sibling, fsync, rename)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    _remove_leftovers(path)
    tmp = temporary_sibling(path)
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        _remove(tmp)
        raise
    _fsync_dir(path.parent)
    return path


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """Write UTF-8 ``text`` to ``path`` atomically."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_table(table: pd.DataFrame, path: str | os.PathLike) -> Path:
    """Write a DataFrame as CSV (no index, ``float`` written with full precision) atomically.

    The same table always gives the same bytes, so reruns can be compared byte by byte.
    """
    return atomic_write_text(path, table.to_csv(index=False, lineterminator="\n"))


@contextlib.contextmanager
def atomic_directory(path: str | os.PathLike) -> Iterator[Path]:
    """Context manager for writing a directory (e.g. a zarr store) atomically.

    Yields a temporary sibling path to write into. On normal exit an existing ``path`` is replaced
    by it; on an exception (or a kill) the temporary is removed and ``path`` is left as it was.

    Examples
    --------
    >>> with atomic_directory("out/step_000.zarr") as tmp:   # doctest: +SKIP
    ...     write_store(tmp)
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    _remove_leftovers(path)
    tmp = temporary_sibling(path)
    try:
        yield tmp
        if not tmp.exists():
            raise FileNotFoundError(f"nothing was written to {tmp}")
        if path.exists():
            trash = temporary_sibling(path)
            os.replace(path, trash)
            os.replace(tmp, path)
            _remove(trash)
        else:
            os.replace(tmp, path)
    except BaseException:
        _remove(tmp)
        raise
    _fsync_dir(path.parent)
