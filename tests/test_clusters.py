"""Tests of slab-wise cluster labelling and per-cluster lattice measures."""

import numpy as np
import pytest
from scipy import ndimage
from skimage.measure import euler_number

from wetpath import WetpathError, synthetic
from wetpath._clusters import cluster_lattice_measures, label_clusters
from wetpath._lattice import lattice_measures


def _renumber_by_first_voxel(ref, n):
    """scipy labels renumbered 1..n by the C-order index of each label's first voxel."""
    u, first = np.unique(ref.ravel(), return_index=True)
    keep = u > 0
    order = u[keep][np.argsort(first[keep])]
    lut = np.zeros(n + 1, np.int64)
    lut[order] = np.arange(1, n + 1)
    return lut[ref]


@pytest.fixture(scope="module")
def medium():
    return synthetic.random_medium((96, 70, 80), seed=3, cylinder_fov=True)


@pytest.mark.parametrize("connectivity", [6, 26])
@pytest.mark.parametrize("chunks", [32, 64, None])
def test_labels_equal_scipy(medium, connectivity, chunks):
    # reference: scipy.ndimage.label on the whole array, up to renumbering
    structure = ndimage.generate_binary_structure(3, 1 if connectivity == 6 else 3)
    ref, n_ref = ndimage.label(medium == 3, structure)
    lab, n = label_clusters(medium, connectivity=connectivity,
                            chunks=chunks or medium.shape[0], threads=2)
    assert n == n_ref
    assert np.array_equal(lab, _renumber_by_first_voxel(ref, n_ref))


def test_labels_into_zarr(tmp_path, medium):
    zarr = pytest.importorskip("zarr")
    out = zarr.create_array(tmp_path / "c.zarr", shape=medium.shape, chunks=(24, 35, 40),
                            dtype="int32")
    lab, n = label_clusters(medium, out=out, threads=2)
    ref, n_ref = label_clusters(medium)
    assert n == n_ref and np.array_equal(lab[:], ref)


def test_labels_from_zarr_and_dask(tmp_path, medium):
    zarr = pytest.importorskip("zarr")
    da = pytest.importorskip("dask.array")
    z = zarr.create_array(tmp_path / "m.zarr", shape=medium.shape, chunks=(20, 70, 80),
                          dtype="uint8")
    z[:] = medium
    ref, n_ref = label_clusters(medium)
    for arr in (z, da.from_array(medium, chunks=(30, 35, 40))):
        lab, n = label_clusters(arr)
        assert n == n_ref and np.array_equal(lab, ref)


def test_no_nonwetting_phase():
    lab, n = label_clusters(np.full((5, 6, 7), 2, np.uint8), chunks=2)
    assert n == 0 and not lab.any()
    assert len(cluster_lattice_measures(np.full((5, 6, 7), 2, np.uint8), lab)) == 0


@pytest.mark.parametrize("connectivity", [6, 26])
def test_cluster_measures_against_references(medium, connectivity):
    lab, n = label_clusters(medium, connectivity=connectivity)
    df = cluster_lattice_measures(medium, lab, voxel_size=2.0, connectivity=connectivity,
                                  chunks=17)
    state = lattice_measures(medium, voxel_size=2.0)
    assert list(df.cluster) == list(range(1, n + 1))
    # per-cluster areas partition the state's n–w and n–s pair areas
    assert df.area_nw.sum() == pytest.approx(state["area_nw"], rel=1e-12)
    assert df.area_ns.sum() == pytest.approx(state["area_ns"], rel=1e-12)
    # voxel counts, centroids and boxes: scipy.ndimage reference
    idx = np.arange(1, n + 1)
    assert np.array_equal(df.voxels, ndimage.sum_labels(np.ones_like(lab), lab, idx))
    assert df.volume.sum() == state["volume_n"]
    com = np.array(ndimage.center_of_mass(np.ones_like(lab), lab, idx))
    assert np.allclose(df[["centroid_z", "centroid_y", "centroid_x"]], com)
    for row, sl in zip(df.itertuples(), ndimage.find_objects(lab), strict=True):
        assert (row.bbox_z0, row.bbox_z1, row.bbox_y0, row.bbox_y1, row.bbox_x0, row.bbox_x1) == (
            sl[0].start, sl[0].stop, sl[1].start, sl[1].stop, sl[2].start, sl[2].stop)
    # per-cluster χ: skimage.measure.euler_number of each cluster (every 4th, to stay fast)
    conn = 3 if connectivity == 26 else 1
    for row in df.iloc[::4].itertuples():
        sl = tuple(slice(max(a - 1, 0), b + 1) for a, b in (
            (row.bbox_z0, row.bbox_z1), (row.bbox_y0, row.bbox_y1), (row.bbox_x0, row.bbox_x1)))
        assert row.euler_n == euler_number(lab[sl] == row.cluster, connectivity=conn)
    # touches_border: 26-adjacent to the array border or an excluded voxel (binary dilation ref)
    excluded = np.pad(medium == 0, 1, constant_values=True)
    near = ndimage.binary_dilation(excluded, np.ones((3, 3, 3), bool))[1:-1, 1:-1, 1:-1]
    expected = np.zeros(n + 1, bool)
    expected[np.unique(lab[near & (lab > 0)])] = True
    assert np.array_equal(df.touches_border.to_numpy(), expected[1:])


def test_cluster_measures_chunk_invariant(medium):
    lab, _ = label_clusters(medium)
    whole = cluster_lattice_measures(medium, lab, chunks=1000, threads=1)
    for chunks in (13, 48, 64):
        assert cluster_lattice_measures(medium, lab, chunks=chunks, threads=2).equals(whole)


def test_ball_cluster_closed_form():
    # closed form: ball of radius 15: V = 4πR³/3, A = 4πR² within 2 % (METHODS.md §1, §5), χ = 1
    b = synthetic.ball(15, seed=2)
    lab, n = label_clusters(b)
    df = cluster_lattice_measures(b, lab)
    ex = synthetic.ball_exact(15)
    assert n == 1 and df.euler_n[0] == 1 and not df.touches_border[0]
    assert df.area_nw[0] == pytest.approx(ex["area"], rel=0.02)
    assert df.volume[0] == pytest.approx(ex["volume"], rel=0.01)


def test_errors():
    m = np.full((4, 4, 4), 3, np.uint8)
    with pytest.raises(WetpathError, match="connectivity"):
        label_clusters(m, connectivity=18)
    with pytest.raises(WetpathError, match="no cluster id"):
        cluster_lattice_measures(m, np.zeros((4, 4, 4), np.int32))
    with pytest.raises(WetpathError, match="differs"):
        cluster_lattice_measures(m, np.zeros((4, 4, 5), np.int32))
    with pytest.raises(WetpathError, match="canonical"):
        label_clusters(np.full((4, 4, 4), 9, np.uint8))


def test_int64_output_views_and_stored_inputs(tmp_path, medium):
    zarr = pytest.importorskip("zarr")
    ref, n_ref = label_clusters(medium)
    out = np.full(medium.shape, -5, np.int64)
    lab, n = label_clusters(medium, out=out, chunks=40)
    assert lab is out and n == n_ref and np.array_equal(out, ref)
    # a non-contiguous view (flipped) gives the labels of the flipped copy
    flipped, n_flip = label_clusters(medium[:, ::-1])
    assert np.array_equal(flipped, label_clusters(medium[:, ::-1].copy())[0]) and n_flip == n_ref
    # per-cluster measures read from zarr stores equal the in-memory ones
    zc = zarr.create_array(tmp_path / "c.zarr", shape=medium.shape, chunks=(30, 70, 80),
                           dtype="int32")
    zc[:] = ref
    zm = zarr.create_array(tmp_path / "m.zarr", shape=medium.shape, chunks=(30, 70, 80),
                           dtype="uint8")
    zm[:] = medium
    assert cluster_lattice_measures(zm, zc).equals(cluster_lattice_measures(medium, ref))


def test_cluster_ids_out_of_range():
    m = np.full((4, 4, 4), 3, np.uint8)
    with pytest.raises(WetpathError, match="cluster ids"):
        cluster_lattice_measures(m, np.full((4, 4, 4), 9, np.int32), n=2)


@pytest.mark.parametrize("connectivity", [6, 26])
def test_run_scan_equals_voxel_scan(medium, connectivity):
    # oracle: the voxel-by-voxel raster scan (_scan_labels); both must give the same local ids
    # (components numbered by first voxel in C order) and the same first voxels
    from wetpath._clusters import (
        _compact,
        _neighbour_offsets,
        _paint_runs,
        _scan_labels,
        _scan_runs,
        _ScanState,
    )

    slab = np.ascontiguousarray(medium[10:50])
    offs, right = _neighbour_offsets(connectivity)
    prov = np.empty(slab.shape, np.int64)
    n_ref, parent, first = _scan_labels(slab, prov, np.empty(4, np.int64), np.empty(4, np.int64),
                                        offs, right)
    local_ref, first_ref = _compact(parent, first, n_ref, 7)
    st = _ScanState(slab.shape[0] * slab.shape[1] + 1)
    n, _, st.starts, st.ends, st.lab, st.parent, st.first = _scan_runs(
        slab, st.starts, st.ends, st.rowptr, st.lab, st.parent, st.first,
        0 if connectivity == 6 else 1)
    local, firsts = _compact(st.parent, st.first, n, 7)
    painted = np.empty(slab.shape, np.int64)
    _paint_runs(painted, 0, 0, slab.shape[1], st.starts, st.ends, st.rowptr, st.lab, local)
    assert np.array_equal(painted, local_ref[prov])
    assert np.array_equal(firsts, first_ref)


def test_cluster_dtype_and_callable_out(tmp_path):
    zarr = pytest.importorskip("zarr")
    from wetpath._clusters import cluster_dtype
    from wetpath._store import create_cluster_array

    assert cluster_dtype(65535) == np.uint16 and cluster_dtype(65536) == np.int32
    # isolated n voxels at even coordinates: 42³ = 74 088 clusters (no two are 26-adjacent)
    m = np.full((84, 84, 84), 2, np.uint8)
    m[::2, ::2, ::2] = 3
    group = zarr.open_group(tmp_path / "c.zarr", mode="w")
    seen = []

    def create(n):
        seen.append(n)
        return create_cluster_array(group, m.shape, (32, 84, 84), n)

    lab, n = label_clusters(m, out=create, threads=2)
    assert seen == [42**3] and n == 42**3 and lab.dtype == np.int32
    ref, _ = label_clusters(m)
    assert np.array_equal(lab[:], ref)
    with pytest.raises(WetpathError, match="too small"):
        label_clusters(m, out=np.zeros(m.shape, np.uint16))


def test_cluster_store_uint16_readers(tmp_path, medium):
    # label_step writes uint16 ids; per-cluster measures and overlaps read from the store equal
    # those of the in-memory int32 labels
    from wetpath._ingest import ingest_volume
    from wetpath._stages import label_step, open_clusters
    from wetpath._tracking import overlap_table

    np.save(tmp_path / "m.npy", medium)
    step = ingest_volume(tmp_path / "m.npy", tmp_path / "s.zarr", voxel_size_um=2.0, chunks=32)
    n = label_step(step, tmp_path / "c.zarr", threads=2)
    stored = open_clusters(tmp_path / "c.zarr")
    ref, n_ref = label_clusters(medium)
    assert n == n_ref and stored.dtype == np.uint16 and np.array_equal(stored[:], ref)
    assert cluster_lattice_measures(medium, stored).equals(cluster_lattice_measures(medium, ref))
    shifted = np.roll(ref, 3, axis=0)
    assert overlap_table(stored, shifted).equals(overlap_table(ref, shifted))


@pytest.mark.parametrize("budget", [0, 3 * 2**20])
def test_labels_with_runs_scanned_again(tmp_path, monkeypatch, medium, budget):
    # beyond the run budget, slabs are read and scanned again in the second pass: same labels
    zarr = pytest.importorskip("zarr")
    from wetpath import _clusters

    ref, n_ref = label_clusters(medium)
    monkeypatch.setattr(_clusters, "RUN_BUDGET", budget)
    out = zarr.create_array(tmp_path / "c.zarr", shape=medium.shape, chunks=(16, 35, 40),
                            dtype="uint16")
    for target in (None, out, np.zeros(medium.shape, np.int64)[:, ::-1]):
        lab, n = label_clusters(medium, connectivity=26, chunks=16, threads=2, out=target)
        assert n == n_ref and np.array_equal(lab[:], ref)
