"""Provenance: package version, hash of the package sources, configuration hashes, input checksums.

The code hash is given to every workflow rule as a ``params`` value: Snakemake tracks a rule's shell
text, params and inputs but not the code of an installed package, so a change to any source file of
wetpath changes the hash and reruns the rules on the next run.
"""

from __future__ import annotations

import functools
import hashlib
import json
import os
from collections.abc import Mapping
from pathlib import Path

__all__ = ["code_hash", "config_hash", "input_record", "package_version", "sha256_path"]

_PACKAGE_DIR = Path(__file__).resolve().parent
_BLOCK = 8 * 1024 * 1024


def package_version() -> str:
    """The installed wetpath version string."""
    from . import __version__

    return __version__


@functools.cache
def code_hash(package_dir: str | None = None) -> str:
    """SHA-256 (hex, first 16 characters) of every ``*.py`` file of the package, by relative path.

    Parameters
    ----------
    package_dir : str, optional
        Folder to hash; default the folder this module was imported from.
    """
    root = Path(package_dir) if package_dir else _PACKAGE_DIR
    digest = hashlib.sha256()
    for file in sorted(root.rglob("*.py")):
        if "__pycache__" in file.parts:
            continue
        digest.update(file.relative_to(root).as_posix().encode())
        digest.update(b"\0")
        digest.update(file.read_bytes())
        digest.update(b"\0")
    return digest.hexdigest()[:16]


def config_hash(settings: Mapping | list | str | float | None) -> str:
    """SHA-256 (hex, first 16 characters) of a JSON-serialisable value, independent of key order."""
    text = json.dumps(settings, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def sha256_path(path: str | os.PathLike) -> tuple[int, str]:
    """Size in bytes and SHA-256 of a file, or of a folder (its files by sorted relative path).

    Read in 8 MiB blocks, so memory use does not grow with the file.
    """
    path = Path(path)
    digest = hashlib.sha256()
    files = [path] if path.is_file() else sorted(p for p in path.rglob("*") if p.is_file())
    size = 0
    for file in files:
        if path.is_dir():
            digest.update(file.relative_to(path).as_posix().encode() + b"\0")
        with open(file, "rb") as fh:
            while block := fh.read(_BLOCK):
                digest.update(block)
                size += len(block)
    return size, digest.hexdigest()


def input_record(path: str | os.PathLike) -> dict[str, str | int]:
    """``{"file", "bytes", "sha256"}`` of one input (file or folder)."""
    size, digest = sha256_path(path)
    return {"file": str(path), "bytes": size, "sha256": digest}
