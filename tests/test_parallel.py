"""Forked workers: their results come back in task order, and the buffers a worker keeps; the
allocator settings of a streaming pass."""

import platform
import resource

import numpy as np
import pytest

from wetpath._parallel import map_forked, pass_in_heap, scratch


def _buffer(n: int, fill: float):
    a = scratch("test", (n,), np.float32)
    a[:] = fill
    return a.__array_interface__["data"][0], float(a.sum())


def test_worker_keeps_a_buffer_from_task_to_task():
    # one worker: the buffer of one name is the same memory for every task that fits in it,
    # grown for a larger one; the results come back in task order
    got = map_forked(_buffer, [], [(8, 1.0), (4, 2.0), (8, 3.0), (16, 1.0)], 1)
    assert [s for _, s in got] == [8.0, 8.0, 24.0, 16.0]
    assert got[0][0] == got[1][0] == got[2][0]


def test_outside_workers_every_call_is_a_new_array():
    a, b = scratch("test", (3, 4), np.int32), scratch("test", (3, 4), np.int32)
    assert a.shape == (3, 4) and a.dtype == np.int32 and a.flags.c_contiguous
    assert not np.shares_memory(a, b)


def _faults_of_second_block(n: int) -> int:
    a = np.ones(n)
    del a
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    b = np.ones(n)
    after = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    del b
    return after - before


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="tunes glibc's allocator only")
def test_a_pass_reuses_freed_blocks():
    # a 16 MiB block (the size zarr decodes a stored chunk into) freed and allocated again: in a
    # pass it is the same heap memory, its 4096 pages already touched (outside a pass glibc maps
    # such a block afresh); nested passes keep the settings until the outermost one ends
    with pass_in_heap():
        with pass_in_heap():
            pass
        inside = _faults_of_second_block(1 << 21)
    assert inside < 64
