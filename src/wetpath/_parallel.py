"""Chunk-parallel work in forked worker processes.

Meshing holds the GIL for much of its time (marching cubes, numpy glue), so threads over chunks
use little more than one core. Forked worker processes do not share a GIL and see the parent's
input arrays copy-on-write, without pickling them; only the small per-chunk results travel back.
Fork is safe here because the functions run in the workers use no OpenMP-parallel compiled
kernels (a forked child must not enter the parent's OpenMP runtime) and start no threads of their
own before they finish. Workers may read zarr stores themselves: zarr resets its IO event loop in a
forked child (``zarr.core.sync.reset_resources_after_fork``, registered with
``os.register_at_fork``).

Memory: a worker allocates and frees arrays of every size chunk after chunk. glibc's allocator
serves blocks below its mmap threshold from the heap, and that threshold rises (up to 32 MB) after
each large block is freed, so the heap of a long-lived worker fills with freed blocks it does not
give back (measured: 0.83 GB above the start at the peak and 0.6 GB still held at the end of a
512³ mesh pass, against 0.58 and 0.03 GB with a fixed 1 MiB threshold). A low threshold costs CPU
instead: every block above it is mapped afresh and its pages are first touched again (on this VM
~0.4 GB/s); at 1 MiB the 512³ measure stage took 100 CPU-s against 77 with the rising threshold
(same code, same load). The workers therefore fix the threshold at :data:`MMAP_THRESHOLD` bytes
(4 MiB: the mesh arrays of most clusters come from the heap, the chunk-sized ones are mapped) and
give the heap's free blocks back after every task (``malloc_trim``): 512³ measure stage 73 CPU-s,
peak 1.5 GB.
"""

from __future__ import annotations

import ctypes
import itertools
import math
import multiprocessing as mp
import threading
from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import ProcessPoolExecutor

import numpy as np

MMAP_THRESHOLD = 1 << 22
"""Bytes from which a worker's allocations are mapped (and unmapped when freed) on their own."""
_M_MMAP_THRESHOLD = -3      # mallopt parameter number (glibc malloc.h)

_INPUTS: tuple = ()
"""The arrays of the running :func:`map_forked` call, inherited by its workers."""
_KEPT: dict | None = None
"""Buffers that a :func:`map_forked` worker keeps from task to task (``None`` elsewhere)."""
_LOCK = threading.Lock()


def _glibc(name: str, *args: int) -> None:
    """Call the C library's ``name(*args)`` if it has it (glibc's allocator settings; elsewhere
    nothing: they only tune memory use)."""
    try:
        getattr(ctypes.CDLL(None), name)(*args)
    except (OSError, AttributeError):
        return


def fix_mmap_threshold() -> None:
    """Fix glibc's mmap threshold of this process at :data:`MMAP_THRESHOLD` (elsewhere nothing):
    run in every worker, and by stages that gather many results of varying size (the parent of
    the mesh workers held 0.25–0.4 GB of freed blocks at 512³ without it, 0.15 GB with it)."""
    _glibc("mallopt", _M_MMAP_THRESHOLD, MMAP_THRESHOLD)


def _start_worker() -> None:
    global _KEPT
    _KEPT = {}
    fix_mmap_threshold()


def scratch(name: str, shape: tuple, dtype) -> np.ndarray:
    """An uninitialised C-contiguous array of ``shape`` and ``dtype``.

    In a :func:`map_forked` worker it is a view of a buffer that the worker keeps under ``name``
    from task to task (grown when too small), so that its pages stay mapped: memory that is given
    back and touched again costs page faults, and on this VM memory given back for more than about
    a second cost ~1.8 s per GB to touch again (measured, 500 MB: 0.06 s when touched again at
    once, 0.94 s after 5 s) — ~1 s of every 6.5 s meshing chunk at 512³. Elsewhere a new array.
    A task must not hold two arrays of one ``name`` at once.
    """
    dtype = np.dtype(dtype)
    size = math.prod(shape) * dtype.itemsize
    if _KEPT is None:
        return np.empty(shape, dtype)
    buf = _KEPT.get(name)
    if buf is None or buf.size < size:
        _KEPT.pop(name, None)
        buf = _KEPT[name] = np.empty(max(size, 1), np.uint8)
    return buf[:size].view(dtype).reshape(shape)


def _call(fn: Callable, task: tuple):
    out = fn(*_INPUTS, *task)
    _glibc("malloc_trim", 0)     # before the next task: its peak starts from the worker's base
    return out


def map_forked(fn: Callable, arrays: Sequence, tasks: Iterable[tuple], workers: int) -> list:
    """``[fn(*arrays, *task) for task in tasks]`` computed by ``workers`` forked processes.

    ``fn`` must be a module-level function (it is pickled by reference), as must everything in
    ``tasks``; ``arrays`` are inherited by the workers, not copied. Results come back in task
    order.
    """
    global _INPUTS
    with _LOCK:                  # one call at a time: the workers read the module global
        _INPUTS = tuple(arrays)
        try:
            with ProcessPoolExecutor(workers, mp_context=mp.get_context("fork"),
                                     initializer=_start_worker) as pool:
                return list(pool.map(_call, itertools.repeat(fn), tasks))
        finally:
            _INPUTS = ()
