"""Cluster tracking on the embedded demo series (issue: fluid clusters, demo checks).

The demo's invented drainage/imbibition sequence must show coalescence and break-up events, and
for every increment the events' volume ledger must close: Σ child volumes − Σ parent volumes equals
the change of the total non-wetting volume (mass balance of the overlap graph: each cluster belongs
to exactly one event, so the sums telescope — exact, integer voxel counts).
"""

import numpy as np
import pytest

from wetpath import track_clusters
from wetpath._codes import NONWETTING
from wetpath._demo import demo_series


@pytest.fixture(scope="module")
def series():
    return demo_series(seed=2026, size=112)


def test_events_include_coalescence_and_breakup(series):
    kinds = set()
    for a, b in zip(series.labels[:-1], series.labels[1:], strict=True):
        kinds |= set(track_clusters(a, b)["event"])
    assert {"coalesce", "breakup"} <= kinds


def test_volume_balance_closes_for_every_increment(series):
    for a, b in zip(series.labels[:-1], series.labels[1:], strict=True):
        events = track_clusters(a, b, voxel_size=4.0)
        ledger = events["volume_children"].sum() - events["volume_parents"].sum()
        change = (np.count_nonzero(b == NONWETTING) - np.count_nonzero(a == NONWETTING)) * 4.0**3
        assert ledger == pytest.approx(change, abs=1e-6)
