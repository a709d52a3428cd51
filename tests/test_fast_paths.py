"""The fast (compiled, threaded) paths equal their plain reference paths on small random media.

Oracles: ``scipy.ndimage.distance_transform_edt`` (exact Euclidean distance transform),
``numpy.add.at`` accumulation, ``wetpath._mesh.taubin_smooth`` (sparse-matrix Taubin smoothing) and
``wetpath._geometric._fit_quadrics_reference`` (batched numpy least squares). Where only the order
of floating-point summation differs the tolerance is 1e-9 relative; everything else is exact.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import ndimage

from wetpath import _geometric as geo
from wetpath import synthetic
from wetpath._clusters import label_clusters
from wetpath._mesh import taubin_smooth


@pytest.fixture(scope="module", params=[3, 8])
def medium(request):
    lab = synthetic.random_medium((44, 40, 36), porosity=0.35, saturation_w=0.5,
                                  seed=request.param)
    clusters, _ = label_clusters(lab)
    return lab, clusters


def _angles(lab, clusters, threads):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return geo.geometric_angles(lab, 1.0, clusters=clusters, threads=threads)


def test_distance_transform_equals_scipy(medium):
    lab, _ = medium
    solid = lab == 1
    np.testing.assert_array_equal(geo._distance_to(solid),
                                  ndimage.distance_transform_edt(~solid))
    box = solid[:9, :30, 5:7]
    np.testing.assert_array_equal(geo._distance_to(box), ndimage.distance_transform_edt(~box))


def test_mesh_kernels_equal_numpy(medium):
    lab, _ = medium
    field = ndimage.gaussian_filter((lab == 3).astype(np.float32), 1.0, mode="nearest")
    from skimage.measure import marching_cubes

    verts, faces, _, _ = marching_cubes(field, 0.5, allow_degenerate=False)
    faces = faces.astype(np.int64)
    smooth = geo._smooth(verts, faces)
    np.testing.assert_allclose(smooth, taubin_smooth(verts, faces), rtol=1e-9, atol=1e-9)
    fn = np.cross(smooth[faces[:, 1]] - smooth[faces[:, 0]], smooth[faces[:, 2]] - smooth[faces[:, 0]])
    ref = np.zeros_like(smooth)
    for k in range(3):
        np.add.at(ref, faces[:, k], fn)
    ref /= np.where((n := np.linalg.norm(ref, axis=1, keepdims=True)) > 0, n, 1.0)
    np.testing.assert_array_equal(geo._vertex_normals(smooth, faces), ref)


def test_quadric_fit_equals_reference(medium):
    lab, clusters = medium
    k = int(np.bincount(clusters.ravel())[1:].argmax()) + 1
    field = ndimage.gaussian_filter((clusters == k).astype(np.float32), 1.0, mode="nearest")
    verts, faces, normals = geo._mesh(field, toward_high=True)
    dist = (geo._distance_to(lab == 1) - 0.5).astype(np.float32)
    d = geo._sample(dist, verts)
    rng = np.random.default_rng(0)
    pts = verts[rng.choice(len(verts), 60, replace=False)] + rng.normal(0, 0.5, (60, 3))
    fast = geo._fit_quadrics(pts, verts, normals, d, 10.0, geo._SLOPE_SCALE)
    ref = geo._fit_quadrics_reference(pts, verts, normals, d, 10.0, geo._SLOPE_SCALE)
    np.testing.assert_allclose(fast[0], ref[0], rtol=1e-9, atol=1e-9)
    for a, b in zip(fast[1], ref[1], strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-9, atol=1e-12)
    np.testing.assert_array_equal(fast[2], ref[2])
    np.testing.assert_array_equal(fast[3], ref[3])


def test_geometric_angles_fast_equals_reference(medium, monkeypatch):
    lab, clusters = medium
    fast = _angles(lab, clusters, threads=2)
    monkeypatch.setattr(geo, "_fit_quadrics", geo._fit_quadrics_reference)
    monkeypatch.setattr(geo, "_smooth", taubin_smooth)
    monkeypatch.setattr(geo, "_distance_to", lambda f: ndimage.distance_transform_edt(~f))
    ref = _angles(lab, clusters, threads=1)
    assert np.isfinite(fast["theta_deg"]).sum() > 20
    floats = ["z", "y", "x", "theta_deg", "area_nw_vox2"]
    pd.testing.assert_frame_equal(fast.drop(columns=floats), ref.drop(columns=floats))
    np.testing.assert_allclose(fast[floats].to_numpy(float), ref[floats].to_numpy(float),
                               rtol=1e-9, atol=1e-9)


def test_geometric_angles_do_not_depend_on_threads(medium):
    lab, clusters = medium
    pd.testing.assert_frame_equal(_angles(lab, clusters, 1), _angles(lab, clusters, 2),
                                  check_exact=True)


def _assert_chunked_equal(whole, chunked):
    # Same points, same flags and fit counts; the angles and point coordinates agree to 1e-6
    # (degrees, voxels), the n–w areas to 1e-12 relative. Inside a chunk's halo everything is
    # computed from the same voxels; what differs is the order of floating-point summation in
    # batched numpy reductions, which a poorly conditioned fit amplifies (measured here: at most
    # 9.3e-7° and 2.2e-7 voxel on a 60×56×52 random medium, 0 for most points).
    floats = ["z", "y", "x", "theta_deg", "area_nw_vox2"]
    assert np.isfinite(whole["theta_deg"]).sum() > 20
    pd.testing.assert_frame_equal(whole.drop(columns=floats), chunked.drop(columns=floats))
    np.testing.assert_array_equal(whole["theta_deg"].isna(), chunked["theta_deg"].isna())
    np.testing.assert_allclose(chunked[["z", "y", "x", "theta_deg"]].to_numpy(float),
                               whole[["z", "y", "x", "theta_deg"]].to_numpy(float), rtol=0,
                               atol=1e-6)
    np.testing.assert_allclose(chunked["area_nw_vox2"], whole["area_nw_vox2"], rtol=1e-12)


def test_geometric_angles_chunked_equal_whole_boxes(medium):
    lab, clusters = medium
    whole = _angles(lab, clusters, threads=2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        chunked = geo.geometric_angles(lab, 1.0, clusters=clusters, chunks=16, threads=2)
    _assert_chunked_equal(whole, chunked)


def test_geometric_angles_chunked_cap_on_plate():
    # A 60° cap of radius 20 on a plate (box 62³ with pad 10) split into 24-voxel chunks: the
    # contact line crosses chunk borders; closed-form angle 60° (synthetic.cap_on_plate).
    lab = synthetic.cap_on_plate(20, 60.0, pad=10, offset=(0.5, 0.1, -0.2))
    assert min(lab.shape) > 2 * 24
    whole = geo.geometric_angles(lab)
    chunked = geo.geometric_angles(lab, chunks=24)
    _assert_chunked_equal(whole, chunked)
    assert np.nanmedian(chunked["theta_deg"]) == pytest.approx(60.0, abs=3.0)
