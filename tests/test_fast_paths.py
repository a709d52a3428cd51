"""The fast (compiled, threaded) paths equal their plain reference paths on small random media.

Oracles: ``wetpath._geometric._fit_quadrics_reference`` (batched numpy least squares) and a numpy
listing of solid–fluid voxel faces for the solid tangent planes (the compiled mesh kernels are
checked against their numpy oracles in ``test_mesh.py``). Where only the order
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
from wetpath._mesh import smoothed_mesh, vertex_measures, wall_distance


@pytest.fixture(scope="module", params=[3, 8])
def medium(request):
    # pores wide enough (grain and fluid scales 5 voxels) for interfaces that rise above the band
    lab = synthetic.random_medium((56, 52, 48), porosity=0.35, saturation_w=0.5, grain_scale=5.0,
                                  fluid_scale=5.0, seed=request.param)
    clusters, _ = label_clusters(lab)
    return lab, clusters


def _angles(lab, clusters, threads):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return geo.geometric_angles(lab, 1.0, clusters=clusters, threads=threads)


def _solid_planes_numpy(points, lab, radius):
    """Oracle of ``_geometric._solid_planes``: every solid–fluid voxel face listed by numpy, then a
    principal-axis plane per point through the face centres within ``radius``."""
    centres, dirs = [], []
    solid = lab == 1
    fluid = (lab == 2) | (lab == 3)
    for ax in range(3):
        for sgn in (-1, 1):
            nb = np.zeros_like(fluid)
            src = [slice(None)] * 3
            dst = [slice(None)] * 3
            src[ax] = slice(1, None) if sgn > 0 else slice(None, -1)
            dst[ax] = slice(None, -1) if sgn > 0 else slice(1, None)
            nb[tuple(dst)] = fluid[tuple(src)]
            vox = np.argwhere(solid & nb).astype(float)
            step = np.zeros(3)
            step[ax] = 0.5 * sgn
            centres.append(vox + step)
            dirs.append(np.repeat(2 * step[None], len(vox), axis=0))
    centres, dirs = np.concatenate(centres), np.concatenate(dirs)
    out_c, out_n, ok = [], [], []
    for p in points:
        near = np.sum((centres - p) ** 2, axis=1) <= radius * radius
        c = centres[near].mean(axis=0)
        w, v = np.linalg.eigh(np.cov((centres[near] - c).T, bias=True))
        n = v[:, 0] * np.sign(v[:, 0] @ dirs[near].sum(axis=0))
        out_c.append(c)
        out_n.append(n)
        ok.append(near.sum() >= 6)
    return np.array(out_c), np.array(out_n), np.array(ok)


def test_solid_planes_equal_numpy(medium):
    lab, _ = medium
    rng = np.random.default_rng(1)
    surface = np.argwhere((lab == 1) & (ndimage.binary_dilation(lab != 1) & (lab == 1)))
    pts = surface[rng.choice(len(surface), 50, replace=False)] + rng.uniform(-0.5, 0.5, (50, 3))
    got = geo._solid_planes(pts, lab, 4.0)
    ref = _solid_planes_numpy(pts, lab, 4.0)
    np.testing.assert_array_equal(got[2], ref[2])
    ok = ref[2]
    np.testing.assert_allclose(got[0][ok], ref[0][ok], rtol=1e-9, atol=1e-9)
    # the smallest axis is defined up to its sign, which both orient out of the solid
    np.testing.assert_allclose(got[1][ok], ref[1][ok], rtol=1e-6, atol=1e-6)


def test_quadric_fit_equals_reference(medium):
    lab, clusters = medium
    k = int(np.bincount(clusters.ravel())[1:].argmax()) + 1
    _, verts, faces = smoothed_mesh(clusters == k, 1.0)
    normals = -vertex_measures(verts, faces)[3]
    d = wall_distance(lab == 1, 20.0)
    d = ndimage.map_coordinates(d, verts.T, order=1, mode="nearest")
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
    monkeypatch.setattr(geo, "_solid_planes", _solid_planes_numpy)
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
    # Same points, same flags and fit counts; the angles and point coordinates agree to 1e-4
    # (degrees, voxels), the n–w areas to 1e-7 relative (measured: 1.8e-8). The halo
    # (``_mesh._halo``) covers the blur, the wall distances and the fits' reach but not the
    # full 20-ring reach of Taubin smoothing, whose influence has decayed to ~1e-5 voxel there
    # (measured here on the 60° cap: at most 1.0e-5° with the default halo, 2.5e-7° with 10
    # voxels more, 0 when the halo holds the whole box; on the random media at most 2.3e-5).
    floats = ["z", "y", "x", "theta_deg", "area_nw_vox2"]
    assert np.isfinite(whole["theta_deg"]).sum() > 20
    pd.testing.assert_frame_equal(whole.drop(columns=floats), chunked.drop(columns=floats))
    np.testing.assert_array_equal(whole["theta_deg"].isna(), chunked["theta_deg"].isna())
    np.testing.assert_allclose(chunked[["z", "y", "x", "theta_deg"]].to_numpy(float),
                               whole[["z", "y", "x", "theta_deg"]].to_numpy(float), rtol=0,
                               atol=1e-4)
    np.testing.assert_allclose(chunked["area_nw_vox2"], whole["area_nw_vox2"], rtol=1e-7)


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


def test_mesh_glue_kernels_equal_numpy(medium):
    # compiled edge list, trilinear sampling, ownership and voxel flux of ``_mesh`` against their
    # numpy/scipy oracles (``scipy.ndimage.map_coordinates`` for the sampling)
    from wetpath import _mesh as m

    lab, clusters = medium
    k = int(np.bincount(clusters.ravel())[1:].argmax()) + 1
    verts0, verts, faces = smoothed_mesh(clusters == k, 1.0)
    for got, ref in zip(m._edges(faces, len(verts)), m._edges_reference(faces, len(verts)),
                        strict=True):
        np.testing.assert_array_equal(got, ref)
    sd = wall_distance(lab == 1, 14.0)
    rng = np.random.default_rng(2)
    pts = np.concatenate([verts, rng.uniform(-1.5, np.array(lab.shape) + 0.5, (500, 3))])
    for got, ref in zip(m._sample_kernel(sd, pts), m._sample_reference(sd, pts), strict=True):
        np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-12)
    edges = m._edges(faces, len(verts))[0]
    lo, hi = np.array([5.0, 3.0, 7.0]), np.array([30.0, 40.0, 20.0])
    v_own, f_own, e_own = m._owned_kernel(verts0, faces, edges, lo, hi)

    def owned(p):
        c = np.floor(p + 1e-9)
        return np.all((c >= lo) & (c < hi), axis=1)

    np.testing.assert_array_equal(v_own, owned(verts0))
    np.testing.assert_array_equal(f_own, owned((verts0[faces[:, 0]] + verts0[faces[:, 1]]
                                                + verts0[faces[:, 2]]) / 3.0))
    np.testing.assert_array_equal(e_own, owned(0.5 * (verts0[edges[:, 0]] + verts0[edges[:, 1]])))
    levels = m.band_levels(1.0)
    args = (clusters, k, sd, np.array([-2, 1, 0]), np.array([0, 4, 3]), np.array([40, 45, 30]),
            levels)
    np.testing.assert_allclose(m._voxel_flux_kernel(*args), m._voxel_flux_reference(*args),
                               rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("threads", [1, 2])
def test_squared_distance_equals_scipy(medium, threads):
    # exact Euclidean distance transform (oracle: scipy.ndimage.distance_transform_edt), capped
    from wetpath._mesh import nearest_feature

    lab, _ = medium
    for feature in (lab == 1, lab[:9, :30, 5:7] == 1, np.zeros((5, 6, 7), bool)):
        ref = ndimage.distance_transform_edt(~feature) ** 2 if feature.any() else \
            np.full(feature.shape, np.inf)
        for cap in (3.0, 100.0):
            big = cap**2 + 1.0
            d2, rank = nearest_feature(feature, cap, threads)
            np.testing.assert_array_equal(d2, np.minimum(ref, big).astype(np.float32))
            # the feature voxels carry their C-order rank (numbered per thread from its planes'
            # offset); a voxel within the cap carries the rank of a voxel at its distance
            np.testing.assert_array_equal(rank[feature], np.arange(int(feature.sum())))
            near = d2 < big
            at = np.argwhere(feature)[rank[near]]
            np.testing.assert_allclose(np.sum((np.argwhere(near) - at) ** 2, axis=1),
                                       ref[near], atol=1e-9)


@pytest.mark.parametrize("cap", [3.0, 18.5])
def test_windowed_distance_passes_equal_lower_envelope(medium, cap):
    # the windowed minimum of the capped passes equals the lower-envelope transform (the path
    # of large caps, itself checked against scipy above): distances and nearest-voxel labels
    from wetpath import _mesh as m

    lab, _ = medium
    feature = np.ascontiguousarray(lab == 1)
    big = np.float32(cap**2 + 1.0)
    w = int(np.floor(np.sqrt(big)))
    out = []
    for envelope in (False, True):
        idx = np.empty(feature.shape, np.int32)
        d = np.empty(feature.shape, np.float32)
        m._edt_rows_binary(feature, d, idx, big, 0, d.shape[0], np.zeros(1, np.int64))
        for ax, n in ((1, d.shape[0]), (0, d.shape[1])):
            if envelope:
                m._edt_axis(d, idx, ax, 0, n)
            else:
                m._edt_window(d, idx, ax, 0, n, w)
        out.append((d, idx))
    (d_w, i_w), (d_e, i_e) = out
    near = d_e < big
    np.testing.assert_array_equal(np.minimum(d_w, big), np.minimum(d_e, big))
    np.testing.assert_array_equal(i_w[near], i_e[near])


def test_chunks_in_worker_processes_equal_serial(medium, monkeypatch):
    # the forked-process path (used from 160³ up) gives the same tables as one thread
    from wetpath import _mesh

    lab, clusters = medium
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        serial = geo.mesh_and_angles(lab, clusters=clusters, chunks=24, threads=1)
        monkeypatch.setattr(_mesh, "PROCESS_MIN_VOXELS", 0)
        forked = geo.mesh_and_angles(lab, clusters=clusters, chunks=24, threads=2)
    for a, b in zip(serial, forked, strict=True):
        pd.testing.assert_frame_equal(a, b, check_exact=True)


def test_perturbation_equals_scipy_dilation(medium):
    # compiled one-voxel boundary move against scipy.ndimage.binary_dilation (the oracle)
    from wetpath._energy import _perturb_reference, perturb_fluid_boundary

    lab, _ = medium
    rng = np.random.default_rng(5)
    noisy = rng.integers(0, 4, (9, 8, 7)).astype(np.uint8)     # every code, incl. excluded
    for labels in (lab, noisy):
        for got, ref in zip(perturb_fluid_boundary(labels), _perturb_reference(labels, 1),
                            strict=True):
            np.testing.assert_array_equal(got, ref)


def test_face_kernel_equals_numpy(medium):
    # per-face glue of the mesh measures against its numpy oracle (sums to 1e-12 relative: only
    # the order of the additions differs)
    from wetpath import _mesh as m

    lab, clusters = medium
    k = int(np.bincount(clusters.ravel())[1:].argmax()) + 1
    _, verts, faces = smoothed_mesh(clusters == k, 1.0)
    _, _, _, _, farea, fnorm = m._vertex_kernel(verts, faces)
    box = np.pad(lab, 2, constant_values=m._OUTSIDE)            # border faces too
    verts = verts + 2
    sd = wall_distance(box == 1, 14.0)
    d, grad = m._sample_kernel(sd, verts)
    f_own = np.random.default_rng(3).random(len(faces)) < 0.7
    got = m._face_kernel(verts, faces, fnorm, farea, box, f_own, d, grad)
    ref = m._face_reference(verts, faces, fnorm, farea, box, f_own, d, grad)
    for g, r in zip(got, ref, strict=True):
        np.testing.assert_allclose(g, r, rtol=1e-12, atol=1e-12)


def test_point_blur_equals_separable_passes(medium):
    # Gaussian blur and gradient at a few voxels against scipy's separable passes over the array
    from wetpath import _mesh as m

    lab, _ = medium
    codes = np.pad(lab, 3, constant_values=m._OUTSIDE)   # unknown shell, as outside the array
    known = (codes >= 1) & (codes <= 3)
    rng = np.random.default_rng(4)
    for count in (300, known.size // 50):              # the x sums at the points; over planes
        pts = np.argwhere(known)[np.sort(rng.choice(int(known.sum()), count, replace=False))]
        pts = np.concatenate([[[0, 0, 0]], pts, [np.array(known.shape) - 1]])  # edges continued
        got = m._blur_and_gradient_at(codes, 1, 3, pts)
        ref = m._blur_and_gradient(known, tuple(pts.T))
        for g, r in zip(got, ref, strict=True):
            np.testing.assert_allclose(g, r, rtol=0, atol=1e-6)  # float32 passes, float64 sums


def test_level_curves_kernel_equals_numpy(medium):
    # the compiled level curves at every band level against the numpy oracle `level_curve`
    # (lengths and line integrals to 1e-12: only the order of the additions differs; the
    # segments of the first level exactly)
    from wetpath import _mesh as m

    lab, clusters = medium
    k = int(np.bincount(clusters.ravel())[1:].argmax()) + 1
    _, verts, faces = smoothed_mesh(clusters == k, 1.0)
    edges, face_edges = m._edges(faces, len(verts))
    _, _, _, _, _, fnorm = m._vertex_kernel(verts, faces)
    d, grad = m._sample_kernel(wall_distance(lab == 1, 14.0), verts)
    nu = m._unit(grad)
    rng = np.random.default_rng(5)
    e_own, f_own = rng.random(len(edges)) < 0.8, rng.random(len(faces)) < 0.8
    levels = m.band_levels(1.0)
    got = m._level_curves_kernel(verts, face_edges, edges, e_own, d, nu, fnorm, f_own, levels)
    assert got[0][0] > 0                                        # the curve exists
    for i, lev in enumerate(levels):
        length, geo_s, nrm, pair = m.level_curve(verts, faces, edges, face_edges, d, nu, fnorm,
                                                 lev, e_own, f_own)
        np.testing.assert_allclose([got[0][i], got[1][i], got[2][i]],
                                   [length.sum(), geo_s, nrm], rtol=1e-12, atol=1e-12)
        if i == 0:
            np.testing.assert_array_equal(got[3], pair)


def test_near_unknown_equals_maximum_filter(medium):
    # voxels with an unknown voxel in their 9³ cube: oracle scipy.ndimage.maximum_filter
    from wetpath import _mesh as m

    lab, _ = medium
    codes = np.pad(lab, 3, constant_values=m._OUTSIDE)   # unknown shell, as outside the array
    codes[20, 20, 20] = 0                                # and one excluded voxel inside
    known = (codes >= 1) & (codes <= 3)
    pts = np.argwhere(np.ones(known.shape, bool))[::7]
    ref = ndimage.maximum_filter(~known, size=9, mode="constant", cval=False)[tuple(pts.T)]
    np.testing.assert_array_equal(m._near_unknown(codes, pts, 4), ref)
    shuffled = np.random.default_rng(2).permutation(len(pts))   # any order of the points
    np.testing.assert_array_equal(m._near_unknown(codes, pts[shuffled], 4), ref[shuffled])


def test_masked_marching_cubes_equals_full(medium):
    # marching cubes over the straddling cells only gives skimage's full mesh, bit for bit
    from skimage.measure import marching_cubes

    from wetpath import _mesh as m

    lab, clusters = medium
    sizes = np.bincount(clusters.ravel())[1:]
    for k in np.argsort(-sizes)[:3] + 1:
        blur = ndimage.gaussian_filter((clusters == k).astype(np.float32), 1.0, mode="constant")
        verts, faces, _, _ = marching_cubes(blur, 0.5, allow_degenerate=False)
        verts0, faces0, _, _ = m._raw_mesh(clusters == k, 1.0)
        np.testing.assert_array_equal(verts0, verts)
        np.testing.assert_array_equal(faces0, faces[:, ::-1])


@pytest.mark.parametrize("sigma", [1.0, 1.5])
def test_gaussian_blur_equals_scipy(medium, sigma):
    # the row-skipping compiled blur against ndimage.gaussian_filter, bit for bit: a cluster's
    # indicator (zeros beyond the box) and a float field (edge values continued)
    from wetpath import _mesh as m

    lab, clusters = medium
    ind = clusters == int(np.bincount(clusters.ravel())[1:].argmax()) + 1
    for box in (ind, ind[:, :, :20], ind[:20, :, :]):      # x shorter or longer than y
        np.testing.assert_array_equal(
            m.gaussian_blur(box, sigma, nearest=False),
            ndimage.gaussian_filter(box.astype(np.float32), sigma, mode="constant"))
    field = wall_distance(lab == 1, 8.0)
    ref = ndimage.gaussian_filter(field, sigma, mode="nearest")
    np.testing.assert_array_equal(m.gaussian_blur(field, sigma, nearest=True), ref)
    out = np.full(field.shape, np.nan, np.float32)              # a buffer given: same result
    assert m.gaussian_blur(field, sigma, nearest=True, out=out) is out
    np.testing.assert_array_equal(out, ref)


def test_point_blur_direct_equals_passes(medium):
    # the x sums at the points' windows only equal the passes over the array, bit for bit
    from wetpath import _mesh as m

    lab, _ = medium
    codes = np.pad(lab, 3, constant_values=m._OUTSIDE)
    rng = np.random.default_rng(6)
    pts = np.argwhere(codes != 0)[rng.choice(int((codes != 0).sum()), 200, replace=False)]
    pts = np.concatenate([pts, [[0, 0, 0], np.array(codes.shape) - 1]])
    w0, w1 = m._gauss_weights(0), m._gauss_weights(1)
    for lo, hi in ((1, 3), (2, 3)):                    # known voxels; pore
        np.testing.assert_array_equal(m._point_blur_direct(codes, lo, hi, pts, w0, w1),
                                      m._point_blur(codes, lo, hi, pts, w0, w1))


def test_boundary_voxels_equal_dilation(medium):
    # solid voxels with a fluid face-neighbour: oracle scipy.ndimage.binary_dilation (6-cross)
    from wetpath import _mesh as m

    lab, _ = medium
    solid, pore = lab == 1, np.isin(lab, (2, 3))
    ref = solid & ndimage.binary_dilation(pore, ndimage.generate_binary_structure(3, 1))
    bnd, n, any_solid, any_pore, all_known = m._boundary_voxels(lab)
    np.testing.assert_array_equal(bnd, ref)
    assert (n, any_solid, any_pore, all_known) == (ref.sum(), True, True, bool((solid | pore).all()))
    assert m._boundary_voxels(np.where(lab == 0, 1, lab).astype(np.uint8))[4]   # nothing excluded


def test_compact_equals_unique():
    # the marking path equals numpy's sorting one (np.unique with return_inverse)
    from wetpath._mesh import _compact

    rng = np.random.default_rng(3)
    for n, shape in ((50, (40, 3)), (7, (0, 3)), (1000, (5, 3))):
        index = rng.integers(0, n, size=shape)
        ref_u, ref_inv = np.unique(index, return_inverse=True)
        got_u, got_inv = _compact(index, n)
        np.testing.assert_array_equal(got_u, ref_u)
        np.testing.assert_array_equal(got_inv, ref_inv.reshape(shape))
