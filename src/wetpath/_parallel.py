"""Chunk-parallel work in forked worker processes.

Meshing holds the GIL for much of its time (marching cubes, numpy glue), so threads over chunks
use little more than one core. Forked worker processes do not share a GIL and see the parent's
input arrays copy-on-write, without pickling them; only the small per-chunk results travel back.
Fork is safe here because the functions run in the workers use no OpenMP-parallel compiled
kernels (a forked child must not enter the parent's OpenMP runtime) and start no threads of their
own before they finish.
"""

from __future__ import annotations

import itertools
import multiprocessing as mp
import threading
from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import ProcessPoolExecutor

_INPUTS: tuple = ()
"""The arrays of the running :func:`map_forked` call, inherited by its workers."""
_LOCK = threading.Lock()


def _call(fn: Callable, task: tuple):
    return fn(*_INPUTS, *task)


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
            with ProcessPoolExecutor(workers, mp_context=mp.get_context("fork")) as pool:
                return list(pool.map(_call, itertools.repeat(fn), tasks))
        finally:
            _INPUTS = ()
