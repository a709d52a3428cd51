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
import multiprocessing as mp
import threading
from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import ProcessPoolExecutor

MMAP_THRESHOLD = 1 << 22
"""Bytes from which a worker's allocations are mapped (and unmapped when freed) on their own."""
_M_MMAP_THRESHOLD = -3      # mallopt parameter number (glibc malloc.h)

_INPUTS: tuple = ()
"""The arrays of the running :func:`map_forked` call, inherited by its workers."""
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
                                     initializer=fix_mmap_threshold) as pool:
                return list(pool.map(_call, itertools.repeat(fn), tasks))
        finally:
            _INPUTS = ()
