"""Mesh measures of the non-wetting phase against closed forms and reference libraries.

Closed forms: sphere, spherical shell, torus, cylinder and spherical cap (any geometry handbook,
e.g. Bronshtein et al. 2015, §3.3; `wetpath.synthetic.*_exact`). Reference libraries: scikit-image
(`euler_number`, `mesh_surface_area`), scipy (`distance_transform_edt`) and trimesh.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage
from skimage.measure import euler_number, mesh_surface_area

from wetpath import WetpathError, synthetic
from wetpath._mesh import (
    face_geometry,
    mesh_measures,
    mesh_totals,
    nearest_feature,
    smoothed_mesh,
    vertex_measures,
    wall_distance,
)


def _one(labels, **kw):
    table = mesh_measures(labels, threads=1, **kw)
    assert len(table) == 1
    return table.iloc[0]


def test_ball_area_curvature_gauss_euler():
    errors = []
    for radius in (8, 15, 30):
        labels = synthetic.ball(radius, seed=radius)
        row = _one(labels)
        exact = synthetic.ball_exact(radius)
        err = row.area_nw_mesh / exact["area"] - 1       # closed form A = 4πR²
        errors.append(abs(err))
        if radius >= 15:
            assert abs(err) <= 0.02
            # κ = k1 + k2 = 2/R, positive for a ball of n in w (METHODS.md §0)
            assert row.curvature_nw == pytest.approx(exact["curvature"], rel=0.03)
        assert row.curvature_nw > 0
        # Gauss–Bonnet: ∫K dA = 4π for a sphere (no solid: the band sums are the whole mesh)
        assert row.gauss_nw == pytest.approx(4 * math.pi, abs=1e-6)
        assert row.euler_n_mesh == exact["euler"] == euler_number(labels == 3, connectivity=3)
        assert row.contact_loops == 0 and row.contact_length == 0 and row.area_ns_mesh == 0
        assert row.resolved
    assert errors[0] > errors[1] > errors[2]             # area error shrinks with R


def test_shell_and_torus_euler():
    shell = synthetic.shell(9, 15, seed=1)
    torus = synthetic.torus(13, 5, axis=(1, 1, 0.3), seed=2)
    # closed forms: hollow shell χ = 2, solid torus χ = 0; reference: skimage (26-connectivity)
    assert _one(shell).euler_n_mesh == 2 == euler_number(shell == 3, connectivity=3)
    assert _one(torus).euler_n_mesh == 0 == euler_number(torus == 3, connectivity=3)
    # Gauss–Bonnet: ∫K dA = 4πχ
    assert _one(torus).gauss_nw == pytest.approx(0.0, abs=1e-6)


def test_cylinder_segment():
    r, length = 15.0, 60.0
    labels = synthetic.cylinder(r, length, axis=(1, 0.5, 0.2), seed=3)
    row = _one(labels)
    # closed form: lateral 2πrL plus two discs πr²; χ = 1. The blur rounds the two sharp rims
    # (measured here: about 1 voxel² lost per voxel of rim length, −2.6 % in total), so the bound
    # is 3 % rather than the 2 % of smooth surfaces.
    area = 2 * math.pi * r * length + 2 * math.pi * r * r
    assert row.area_nw_mesh == pytest.approx(area, rel=0.03)
    assert row.area_nw_mesh < area
    assert row.euler_n_mesh == 1 == euler_number(labels == 3, connectivity=3)
    # integral of mean curvature of a convex body (Steiner formula): ∫(k1 + k2) dA = 2πL over
    # the lateral surface + (π/2)(2πr) per right-angle rim; the per-vertex blur correction
    # under-weights the rims' concentrated curvature (measured −6 %), hence 8 %
    assert row.curv_area_nw == pytest.approx(2 * math.pi * length + 2 * math.pi**2 * r, rel=0.08)


@pytest.mark.parametrize("theta, normal", [(60, (1, 0, 0)), (90, (1, 0, 0)), (75, (1, 0.4, 0.25))])
def test_cap_on_plate(theta, normal):
    radius = 20
    labels = synthetic.cap_on_plate(radius, theta, normal=normal, seed=theta)
    row = _one(labels)
    exact = synthetic.cap_exact(radius, theta)          # METHODS.md §5 closed forms
    assert row.resolved
    assert row.contact_loops == 1
    assert row.area_nw_mesh == pytest.approx(exact["area_nw"], rel=0.03)
    # contact length 2πr within 3 % (issue 3); measured here +0.5 %, −0.2 %, +0.1 %; over 48 caps
    # per radius (θ_w 30°–135°, three plate normals) rms 0.5 % (R = 20) and 0.4 % (R = 30), worst
    # 1.4 % (fitting L itself rather than L² read 30° caps 3–4 % long, 135° caps up to 4.8 % short)
    assert row.contact_length == pytest.approx(exact["contact_length"], rel=0.015)
    # footprint area A_ns = π r² within 3 % (issue 3). Measured here: +0.4 %, −1.0 %, −0.3 % (the
    # tilted plate read −3.6 % with the voxel distance transform as wall distance). Over 48 caps
    # per radius (θ_w 30°–135°, three plate normals, two offsets): rms 1.1 % and 0.6 %, worst
    # 2.9 % (R = 20) and 2.2 % (R = 30).
    assert row.area_ns_mesh == pytest.approx(exact["area_ns"], rel=0.03)
    assert row.curvature_nw == pytest.approx(exact["curvature_nw"], rel=0.03)
    # a flat plate: ∫ k_n^s ds = 0 and ∫ k_g^s ds = 2π around the footprint (Gauss–Bonnet, disc)
    assert row.normal_curv_solid_line == pytest.approx(0.0, abs=0.05)
    assert row.geodesic_solid_line == pytest.approx(2 * math.pi, abs=0.05)
    assert row.euler_n_mesh == 1 == euler_number(labels == 3, connectivity=3)
    assert row.euler_nw_patch == 1 and row.euler_ns_patch == 1


def test_mesh_area_matches_skimage_and_trimesh():
    trimesh = pytest.importorskip("trimesh")
    labels = synthetic.torus(12, 5, seed=4)
    _, verts, faces = smoothed_mesh(labels == 3, 1.0)
    area, normal, *_ = face_geometry(verts, faces)
    # reference: skimage.measure.mesh_surface_area on the same vertices and faces
    assert area.sum() == pytest.approx(mesh_surface_area(verts, faces), rel=1e-12)
    mesh = trimesh.Trimesh(verts, faces, process=False)
    assert mesh.is_watertight
    assert mesh.area == pytest.approx(area.sum(), rel=1e-12)
    assert mesh.euler_number == 0                       # trimesh: V − E + F of the closed surface
    _, _, deficit, _, _, _ = vertex_measures(verts, faces)
    # angle deficits: trimesh's vertex_defects (2π − Σ angles)
    np.testing.assert_allclose(deficit, mesh.vertex_defects, atol=1e-9)
    # outward normals: positive enclosed volume by the divergence theorem (trimesh)
    assert mesh.volume > 0


def test_distance_transform_matches_scipy():
    labels = synthetic.random_medium((30, 37, 41), seed=3)
    solid = labels == 1
    # reference: scipy's exact Euclidean distance transform
    ref = ndimage.distance_transform_edt(~solid) ** 2
    np.testing.assert_allclose(nearest_feature(solid, 100.0)[0], ref, atol=1e-9)
    capped = nearest_feature(solid, 2.0)[0]
    np.testing.assert_allclose(np.minimum(capped, 4.0), np.minimum(ref, 4.0), atol=1e-9)
    # nearest feature voxel: scipy's feature transform (ties may pick another voxel at the same
    # distance, so compare the distance to the voxel returned)
    d2, rank = nearest_feature(solid, 100.0)
    coords = np.argwhere(solid)[rank]
    grid = np.indices(solid.shape).transpose(1, 2, 3, 0)
    np.testing.assert_allclose(np.sum((grid - coords) ** 2, axis=-1), ref, atol=1e-9)
    np.testing.assert_allclose(d2, ref, atol=1e-9)


@pytest.mark.parametrize("normal", [(1, 0.35, 0.2), (0.3, 1, 0.5), (1, 1, 1), (1, 0, 0)])
def test_wall_distance_to_voxelised_planes(normal):
    # closed form: the height above the plane h = n·x − c of a half-space labelled by voxel
    # centres. Rational planes ((1, 0, 0), (1, 1, 1)) sit half-way between two lattice planes of
    # voxel centres (any plane in that gap gives the same voxels); others at random offsets.
    rng = np.random.default_rng(7)
    n = synthetic.unit(normal)
    rational = normal in ((1, 0, 0), (1, 1, 1))
    grid = np.indices((40, 40, 40), dtype=float) - 19.5     # centres at half-integers
    for _ in range(3):
        c = 0.0 if rational else rng.uniform(-0.5, 0.5)
        h = np.tensordot(n, grid, axes=1) - c
        d = wall_distance(h < 0, 14.0)
        core = (slice(10, 30),) * 3
        near = (h[core] >= 0) & (h[core] <= 8)       # the band and a margin above it
        err = (d - h)[core][near]
        # measured here: |mean| ≤ 0.043 voxel, worst 0.08 voxel. The voxel distance transform
        # minus half a voxel read 0.05–0.36 voxel low on the tilted planes, growing with height.
        assert abs(err.mean()) <= 0.05
        assert np.abs(err).max() <= 0.1


def test_voxel_size_scales_lengths():
    labels = synthetic.ball(10, seed=5)
    a, b = _one(labels), _one(labels, voxel_size=2.5)
    assert b.area_nw_mesh == pytest.approx(a.area_nw_mesh * 2.5**2, rel=1e-12)
    assert b.curvature_nw == pytest.approx(a.curvature_nw / 2.5, rel=1e-12)
    assert b.gauss_nw == pytest.approx(a.gauss_nw, rel=1e-12)


def test_flat_cap_is_unresolved():
    # a 150° cap of radius 20 rises only R(1 − cos 30°) ≈ 2.7 voxels above the plate
    row = _one(synthetic.cap_on_plate(20, 150, seed=6))
    assert not row.resolved
    assert math.isnan(row.gauss_nw) and row.contact_loops == 0


def test_speck_of_solid_is_not_extrapolated_below_zero():
    # n and w noise around a single solid voxel: the footprint's band sums extrapolated to the wall
    # read −98 voxel² before the guard; areas are non-negative by definition, so such a cluster is
    # unresolved and keeps its face-classified areas
    rng = np.random.default_rng(2)
    shape = tuple(rng.integers(12, 21, 3))
    vol = rng.choice(np.array([0, 2, 3], np.uint8), size=shape, p=[0.05, 0.25, 0.70])
    vol[tuple(rng.integers(0, s) for s in shape)] = 1
    table = mesh_measures(vol, 1.5)
    assert (table["area_ns_mesh"] >= 0).all() and (table["area_nw_mesh"] >= 0).all()
    assert (table["contact_length"].fillna(0) >= 0).all()


def test_chunk_invariance_random_medium():
    # coarse grains so that several clusters are resolved and the band sums are exercised too
    labels = synthetic.random_medium((160, 160, 160), seed=11, grain_scale=6, fluid_scale=8)
    ref = mesh_measures(labels)
    cols = [c for c in ref.columns if c not in ("cluster", "resolved", "contact_loops")]
    for chunks in (48, 64, 100):
        other = mesh_measures(labels, chunks=chunks)
        assert (other["resolved"] == ref["resolved"]).all()
        assert (other["contact_loops"] == ref["contact_loops"]).all()
        a, b = ref[cols].to_numpy(float), other[cols].to_numpy(float)
        np.testing.assert_array_equal(np.isnan(a), np.isnan(b))
        np.testing.assert_allclose(b, a, rtol=1e-4, atol=1e-6)
    assert ref["resolved"].sum() >= 3
    totals = mesh_totals(ref)
    assert totals["unresolved_clusters"] == int((~ref["resolved"]).sum())


def test_no_nonwetting_phase_and_bad_input():
    labels = np.full((8, 8, 8), 2, np.uint8)
    table = mesh_measures(labels)
    assert len(table) == 0
    assert math.isnan(mesh_totals(table)["curvature_nw"])
    with pytest.raises(WetpathError, match="isotropic"):
        mesh_measures(labels, voxel_size=(1.0, 1.0, 2.0))
    with pytest.raises(WetpathError, match="shape"):
        mesh_measures(labels, clusters=np.zeros((4, 4, 4), int))


def test_compiled_kernels_match_numpy_oracles():
    from wetpath import _mesh as m

    labels = synthetic.cap_on_plate(12, 70, normal=(1, 0.3, 0.2), seed=8)
    verts0, faces, edges, face_edges = m._raw_mesh(labels == 3, 1.0)
    smooth = m._taubin_kernel(verts0.copy(), edges, 10, m.TAUBIN_LAMBDA, m.TAUBIN_MU)
    np.testing.assert_allclose(smooth, m.taubin_smooth(verts0, faces), atol=1e-10)
    for got, ref in zip(m._vertex_kernel(smooth, faces), m.vertex_measures(smooth, faces),
                        strict=True):
        np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-9)
    rng = np.random.default_rng(0)
    nv, nf = len(verts0), len(faces)
    d = rng.uniform(0, 9, nv)
    d3 = np.sort(d[faces], axis=1)
    args = (d3, rng.uniform(0, 1, nf), rng.normal(size=nf), rng.random(nf) > 0.1,
            rng.normal(size=nv), d, rng.random(nv) > 0.1, m.band_levels(1.0))
    for got, ref in zip(m._band_kernel(*args), m._band_sums(*args), strict=True):
        np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-9)
    args = (d3.mean(axis=1), rng.random(nf) > 0.9, faces, face_edges, rng.random(nv) > 0.3,
            rng.random(len(edges)) > 0.3, rng.random(nf) > 0.3, m.band_levels(1.0), len(edges))
    np.testing.assert_array_equal(m._patch_euler_kernel(*args), m._patch_euler(*args))


def test_shared_blur_passes_match_scipy():
    from wetpath import _mesh as m

    mask = synthetic.random_medium((30, 33, 36), seed=2) != 1
    at = tuple(np.argwhere(mask).T)
    # reference: scipy's Gaussian filter and its derivatives along z, y, x
    for order, got in zip(((0, 0, 0), (1, 0, 0), (0, 1, 0), (0, 0, 1)),
                          m._blur_and_gradient(mask, at), strict=True):
        ref = ndimage.gaussian_filter(mask.astype(np.float32), m.SOLID_BLUR, order=order,
                                      mode="nearest")[at]
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-7)


def test_cluster_boxes_equal_find_objects():
    # oracle: scipy.ndimage.find_objects on the whole array; slabs of 5 planes do not divide 23
    from wetpath._mesh import cluster_boxes

    rng = np.random.default_rng(3)
    clusters = rng.choice(np.arange(9), size=(23, 11, 13), p=[0.9] + [0.0125] * 8)
    clusters[clusters == 4] = 0                      # an id without voxels
    got = cluster_boxes(clusters, depth=5)
    objs = ndimage.find_objects(clusters)
    assert len(got) == len(objs) == 8
    for row, o in zip(got, objs, strict=True):
        if o is None:
            assert (row[3:] <= row[:3]).all()
        else:
            assert list(row) == [s.start for s in o] + [s.stop for s in o]


def test_stored_arrays_equal_in_memory_arrays(tmp_path, monkeypatch):
    # the chunks read their boxes from zarr stores (threads, then forked workers) and give
    # bit-identical tables to the in-memory arrays; boxes from the lattice table change nothing
    import pandas as pd
    import zarr

    from wetpath import _mesh
    from wetpath._clusters import cluster_lattice_measures, label_clusters
    from wetpath._geometric import mesh_and_angles
    from wetpath._mesh import boxes_from_table

    labels = synthetic.random_medium((64, 64, 64), seed=3, grain_scale=5, fluid_scale=6)
    clusters, n = label_clusters(labels)
    root = zarr.open_group(tmp_path / "state.zarr", mode="w")
    zl = root.create_array("labels", shape=labels.shape, chunks=(32, 32, 32), dtype=np.uint8)
    zc = root.create_array("clusters", shape=labels.shape, chunks=(32, 32, 32), dtype=np.uint16)
    zl[...], zc[...] = labels, clusters
    ref = mesh_measures(labels, clusters=clusters, chunks=32, threads=2)
    assert n >= 5 and len(ref) == n
    boxes = boxes_from_table(cluster_lattice_measures(zl, zc))
    for kw in ({}, {"boxes": boxes}):
        pd.testing.assert_frame_equal(mesh_measures(zl, clusters=zc, chunks=32, threads=2, **kw),
                                      ref, check_exact=True)
    with pytest.warns(UserWarning):
        ref_geo = mesh_and_angles(labels, clusters=clusters, chunks=32, threads=2)
    monkeypatch.setattr(_mesh, "PROCESS_MIN_VOXELS", 0)      # forked workers read the stores
    with pytest.warns(UserWarning):
        got_geo = mesh_and_angles(zl, clusters=zc, chunks=32, threads=2, boxes=boxes)
    assert len(ref_geo[1]) > 0
    for a, b in zip(ref_geo, got_geo, strict=True):
        pd.testing.assert_frame_equal(b, a, check_exact=True)


def test_chunk_grid_under_a_box_bound_meshes_least():
    # brute force over part counts: the chosen grid keeps every box (core ± halo, as mesh_sums
    # cuts them) under the bound and no other grid under it meshes less volume
    import itertools

    from wetpath._mesh import _chunk_ranges, _parts_within

    halo, pad = 26, 6

    def boxes(shape, parts):
        ext = []
        for n, k in zip(shape, parts, strict=True):
            r = _chunk_ranges(n, None if k == 1 else -(-n // k), pad)
            ext.append([min(b + halo, n + pad) - max(a - halo, -pad) for a, b in r])
        vols = [a * b * c for a, b, c in itertools.product(*ext)]
        return max(vols), sum(vols)

    for shape, bound in (((512, 512, 512), 20_000_000), ((300, 200, 100), 3_000_000),
                         ((1024, 1024, 1024), 20_000_000)):
        got = _parts_within(shape, [1, 1, 1], halo, pad, bound)
        largest, total = boxes(shape, got)
        assert largest <= bound
        for parts in itertools.product(range(1, 9), repeat=3):
            big, vol = boxes(shape, parts)
            assert big > bound or vol >= total
    assert _parts_within((512,) * 3, [2, 2, 2], halo, pad, 20_000_000) == [2, 2, 3]
