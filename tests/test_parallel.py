"""Forked workers: their results come back in task order, and the buffers a worker keeps."""

import numpy as np

from wetpath._parallel import map_forked, scratch


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
