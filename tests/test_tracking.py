"""Tests of cluster tracking: overlap tables, displacement events, lineages, summaries.

The synthetic cases are built from balls and rods whose overlaps are known by construction
(closed-form shapes: which clusters touch which is decided by the geometry, not by the code).
"""

import numpy as np
import pytest

from wetpath import WetpathError, synthetic
from wetpath._clusters import label_clusters
from wetpath._tracking import (
    events_from_overlaps,
    increment_summary,
    lineages,
    overlap_table,
    overlap_table_reference,
    track_clusters,
)

SHAPE = (40, 40, 90)


def _scene(balls=(), rods=()):
    """Wetting background with non-wetting balls (centre, radius) and rods (p, q, radius)."""
    z, y, x = np.meshgrid(*(np.arange(n, dtype=float) for n in SHAPE), indexing="ij")
    p = np.stack([z, y, x], axis=-1)
    out = np.full(SHAPE, 2, np.uint8)
    for c, r in balls:
        out[((p - c) ** 2).sum(-1) < r * r] = 3
    for a, b, r in rods:
        a, b = np.asarray(a, float), np.asarray(b, float)
        t = np.clip(((p - a) @ (b - a)) / ((b - a) @ (b - a)), 0, 1)
        out[((p - a - t[..., None] * (b - a)) ** 2).sum(-1) < r * r] = 3
    return out


L, R = (20, 20, 25), (20, 20, 65)
TWO = dict(balls=[(L, 9), (R, 9)])
DUMBBELL = dict(balls=[(L, 9), (R, 9)], rods=[(L, R, 4)])


def _balance_closes(a, b, events):
    # every cluster is in exactly one event: Σ children − parents = change in total n volume
    dv = float(np.count_nonzero(b == 3)) - float(np.count_nonzero(a == 3))
    assert (events.volume_children - events.volume_parents).sum() == pytest.approx(dv)


def test_two_balls_coalesce_into_dumbbell():
    a, b = _scene(**TWO), _scene(**DUMBBELL)
    ev = track_clusters(a, b)
    assert ev.event.tolist() == ["coalesce"]
    assert ev.parents[0] == "1 2" and ev.children[0] == "1"      # both parents named
    assert ev.volume_parents[0] == np.count_nonzero(a == 3)
    _balance_closes(a, b, ev)


def test_dumbbell_breaks_up():
    a, b = _scene(**DUMBBELL), _scene(**TWO)
    ev = track_clusters(a, b)
    assert ev.event.tolist() == ["breakup"] and ev.children[0] == "1 2"
    _balance_closes(a, b, ev)


def test_vanishing_and_new_ball():
    a, b = _scene(**TWO), _scene(balls=[(L, 9)])
    ev = track_clusters(a, b)
    assert ev.event.tolist() == ["continue", "vanish"] and ev.parents[1] == "2"
    _balance_closes(a, b, ev)
    ev = track_clusters(b, a)
    assert ev.event.tolist() == ["continue", "appear"] and ev.children[1] == "2"
    assert ev.n_parents[1] == 0 and ev.volume_parents[1] == 0
    _balance_closes(b, a, ev)


def test_shifted_ball_continues():
    a = _scene(balls=[(L, 8)])
    b = _scene(balls=[(np.add(L, (3, -2, 4)), 8)])
    ev = track_clusters(a, b)
    assert ev.event.tolist() == ["continue"]
    # far drift: no overlap without the shift, a perfect match with it
    far = _scene(balls=[(np.add(L, (0, 0, 40)), 8)])
    assert track_clusters(a, far).event.tolist() == ["vanish", "appear"]
    la, _ = label_clusters(a)
    lb, _ = label_clusters(far)
    ov = overlap_table(la, lb, shift=(0, 0, 40))
    pair = ov[(ov.cluster_a == 1) & (ov.cluster_b == 1)]
    assert pair.voxels.iloc[0] == np.count_nonzero(a == 3) and len(ov) == 1
    assert track_clusters(a, far, shift=(0, 0, 40)).event.tolist() == ["continue"]


def test_three_to_two_regroup():
    c1, c2, c3 = (20, 20, 15), (20, 20, 45), (20, 20, 75)
    a = _scene(balls=[(c1, 9), (c2, 9), (c3, 9)])
    # the middle ball splits: its left half joins the first, its right half the third
    b = _scene(balls=[(c1, 9), (c3, 9)], rods=[(c1, (20, 20, 38), 5), ((20, 20, 52), c3, 5)])
    ev = track_clusters(a, b)
    assert ev.event.tolist() == ["regroup"]
    assert ev.parents[0] == "1 2 3" and ev.children[0] == "1 2"
    _balance_closes(a, b, ev)


def test_overlap_table_equals_numpy_reference():
    a = synthetic.random_medium((50, 44, 38), seed=4)
    b = synthetic.random_medium((50, 44, 38), seed=4, saturation_w=0.4)
    la, _ = label_clusters(a, connectivity=6)
    lb, _ = label_clusters(b, connectivity=6)
    ref = overlap_table_reference(la, lb)
    for chunks in (7, 50):
        assert overlap_table(la, lb, chunks=chunks, threads=2).equals(ref)
    # b moved by a rigid shift: matching with that shift gives the unshifted table
    moved = np.pad(lb, ((2, 0), (3, 0), (1, 0)))
    assert overlap_table(la, moved, shift=(2, 3, 1)).equals(ref)
    back = overlap_table(moved, la, shift=(-2, -3, -1))
    back = back.rename(columns={"cluster_a": "cluster_b", "cluster_b": "cluster_a"})
    back = back.sort_values(["cluster_a", "cluster_b"]).reset_index(drop=True)
    assert back[["cluster_a", "cluster_b", "voxels"]].equals(ref)


def test_volume_balance_and_summary_on_random_media():
    a = synthetic.random_medium((48, 48, 48), seed=5, saturation_w=0.6)
    b = synthetic.random_medium((48, 48, 48), seed=6, saturation_w=0.4)
    la, _ = label_clusters(a)
    lb, _ = label_clusters(b)
    ov = overlap_table(la, lb)
    ev = events_from_overlaps(ov, voxel_size=2.0)
    s = increment_summary(ov, ev, voxel_size=2.0)
    assert s["volume_balance"] == pytest.approx(s["volume_n_b"] - s["volume_n_a"])
    assert s["volume_n_a"] == 8 * np.count_nonzero(a == 3)
    assert s["volume_invaded"] == 8 * np.count_nonzero((a != 3) & (b == 3))
    assert s["volume_withdrawn"] == 8 * np.count_nonzero((a == 3) & (b != 3))
    assert sum(s[f"n_{k}"] for k in ("continue", "coalesce", "breakup", "regroup", "vanish")) \
        <= s["n_clusters_a"]
    assert 0 < s["largest_share_b"] <= 1


def test_lineage_follows_a_cut_off_ganglion():
    steps = [_scene(**DUMBBELL), _scene(**TWO), _scene(balls=[(L, 9), (R, 8)])]
    labs = [label_clusters(s)[0] for s in steps]
    tables = [overlap_table(labs[i], labs[i + 1]) for i in range(2)]
    lin = lineages(tables)
    assert lin.step.tolist() == [0, 1, 1, 2, 2]
    start = lin.lineage[0]
    s1 = lin[lin.step == 1]
    assert set(s1.event) == {"breakup"} and start not in set(s1.lineage)
    assert set(s1.parent_lineages) == {str(start)}
    s2 = lin[lin.step == 2]
    assert list(s2.lineage) == list(s1.lineage) and set(s2.event) == {"continue"}


def test_codes_and_errors():
    a, b = _scene(**TWO), _scene(**DUMBBELL)
    lut = np.array([0, 10, 20, 30], np.uint8)
    ev = track_clusters(lut[a], lut[b], codes={"excluded": 0, "solid": 10, "wetting": 20,
                                               "nonwetting": 30})
    assert ev.event.tolist() == ["coalesce"]
    with pytest.raises(WetpathError, match="shift"):
        overlap_table(a, b, shift=(1, 2))
    with pytest.raises(WetpathError, match="does not start"):
        lineages([overlap_table_reference(label_clusters(a)[0], label_clusters(b)[0]),
                  overlap_table_reference(label_clusters(a)[0], label_clusters(b)[0])])


def test_cluster_label_inputs():
    a, b = _scene(**TWO), _scene(**DUMBBELL)
    la, _ = label_clusters(a)
    lb, _ = label_clusters(b)
    assert track_clusters(la, lb, clusters=True).equals(track_clusters(a, b))
