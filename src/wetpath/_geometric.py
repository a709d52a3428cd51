"""Geometric contact angle at contact-line points, by local fits of the n–w interface and the solid.

At a point of the contact line, cos θ_w = ν_s · ν_{w→n} (AlRatrout, Raeini, Bijeljic & Blunt
2017), with ν_s the solid normal pointing out of the solid into the pore and ν_{w→n} the n–w normal
pointing from w into n. Smoothing rounds the crease where the two surfaces meet, so normals read at
the line are biased toward θ/2; here both surfaces are fitted *away* from the line and the fits are
intersected:

1. per n cluster, on its bounding box (padded), the n and solid indicators are Gaussian-smoothed
   (σ voxels) and meshed by marching cubes at level 0.5 (Lorensen & Cline 1987), then
   Taubin-smoothed (Taubin 1995) — with ``chunks``, a box larger than a chunk is processed core by
   core with a halo, each point and face counted by the one core that owns it, so that peak memory
   is bounded by a chunk and not by a percolating cluster's box (the whole volume);
2. contact-line points are where the n fraction of the pore, G*n / G*(n ∪ w), crosses 1/2 on the
   solid mesh; they are thinned to one per cell of a ``spacing``-voxel lattice;
3. at each point a quadric height field h(u, v) in a local frame (normal e3 = the mean n–w normal of
   the patch) is fitted by least squares jointly to the positions and normals of the n–w mesh
   vertices that lie 2.5σ–9 voxels from the solid within ``fit_radius`` of the point, and a tangent
   plane is fitted to the solid mesh vertices near the point;
4. the quadric is intersected with the plane, and cos θ_w = ν_s · ν_{w→n} is read there from the
   quadric's normal and the plane's normal. Points whose fitted patch is too thin to extrapolate
   (an interface that barely rises above the rounded crease) get NaN and ``flag_unresolved``.

The fits run in a compiled kernel, one 6×6 normal-equation system per point, in parallel; the
batched numpy version is kept as the test oracle. Clusters run on ``threads`` worker threads.

References
----------
AlRatrout, A., Raeini, A. Q., Bijeljic, B. & Blunt, M. J. (2017). Automatic measurement of contact
angle in pore-space images. *Adv. Water Resour.* 109, 158–169.
Khanamiri, H. H., Slotte, P. A. & Berg, C. F. (2020). Contact angles in two-phase flow images.
*Transp. Porous Media* 135, 735–751 (angles on interfaces below ~1000 voxel² are unreliable).
Lorensen, W. E. & Cline, H. E. (1987). Marching cubes. *Computer Graphics* 21(4), 163–169.
Taubin, G. (1995). A signal processing approach to fair surface design. *Proc. SIGGRAPH '95*,
351–358.
"""

from __future__ import annotations

import itertools
import math
import warnings
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pandas as pd
from numba import njit, prange
from scipy import ndimage
from scipy.spatial import cKDTree

from ._codes import NONWETTING, SOLID, WETTING, PhaseCodes, to_canonical
from ._errors import WetpathError
from ._lattice import resolve_threads
from ._mesh import TAUBIN_ITERATIONS, TAUBIN_LAMBDA, TAUBIN_MU, _edges, _taubin_kernel, squared_distance

__all__ = ["geometric_angles", "summarise_geometric"]

_STEP = "geometric"
_K_FIT = 200
"""Most n–w vertices per fit (nearest first); a patch of radius 10 voxels holds fewer."""
_SLOPE_SCALE = 3.0
"""Weight (voxels) of the slope equations against the position equations in the joint fit."""
_MIN_FIT = 12
"""Fewest n–w vertices for a quadric fit (6 coefficients)."""
_MIN_SPAN = 1.5
"""Least spread (voxels) of the fitted n–w vertices' distances from the solid. Thinner patches
extrapolate a nearly flat strip: a 150° cap of radius 30 voxels (4 voxels high, span 1.3) read 166°;
a 135° cap of radius 15 (span 1.5) and a 150° cap of radius 40 (span 1.6) read within 2° (measured
here)."""
BIN_EDGES_DEG = np.arange(0.0, 180.0 + 5.0, 5.0)
"""Fixed 5° histogram bins from 0° to 180°."""

_COLUMNS = ["cluster", "z", "y", "x", "theta_deg", "n_fit", "area_nw_vox2",
            "flag_no_contact_line", "flag_unresolved", "flag_fit_failed", "flag_small_interface"]


def _smooth(verts: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """Taubin λ|μ smoothing (Taubin 1995) by the compiled kernel of :mod:`wetpath._mesh`; oracle:
    ``_mesh.taubin_smooth`` (equal up to the order of floating-point summation)."""
    return _taubin_kernel(verts.astype(np.float64), _edges(faces, len(verts))[0],
                          TAUBIN_ITERATIONS, TAUBIN_LAMBDA, TAUBIN_MU)


def _vertex_normals(verts: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """Area-weighted vertex normals, unit length (orientation from the face winding)."""
    fn = np.cross(verts[faces[:, 1]] - verts[faces[:, 0]], verts[faces[:, 2]] - verts[faces[:, 0]])
    # one bincount per axis over corners 0, 1, 2 in turn: the same additions in the same order as
    # ``np.add.at`` corner by corner, without its per-element overhead
    corners = faces.T.ravel()
    vn = np.stack([np.bincount(corners, np.tile(fn[:, c], 3), minlength=len(verts))
                   for c in range(3)], axis=1)
    norm = np.linalg.norm(vn, axis=1, keepdims=True)
    return vn / np.where(norm > 0, norm, 1.0)


def _sample(field: np.ndarray, pts: np.ndarray) -> np.ndarray:
    """Trilinear interpolation of ``field`` at voxel coordinates ``pts`` (N, 3)."""
    return ndimage.map_coordinates(field, pts.T, order=1, mode="nearest")


def _gradient_at(field: np.ndarray, pts: np.ndarray) -> np.ndarray:
    return np.stack([_sample(g, pts) for g in np.gradient(field)], axis=1)


def _mesh(field: np.ndarray, toward_high: bool, mask: np.ndarray | None = None
          ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Marching cubes at 0.5 (only where ``mask``) + Taubin; vertex normals oriented up (or down)
    the field gradient."""
    from skimage.measure import marching_cubes

    verts, faces, _, _ = marching_cubes(field, 0.5, allow_degenerate=False, mask=mask)
    faces = faces.astype(np.int64)
    verts = _smooth(verts, faces)
    normals = _vertex_normals(verts, faces)
    grad = _gradient_at(field, verts)
    sign = 1.0 if np.sum(normals * grad) >= 0 else -1.0
    return verts, faces, normals * (sign if toward_high else -sign)


def _contact_points(solid_verts, solid_faces, frac, spacing, offset):
    """Points where the n fraction ``frac`` crosses 1/2 along solid-mesh edges, thinned to one per
    cell of ``spacing`` voxels: in each cell the point first in (z, y, x) order, so that the choice
    does not depend on the order of the mesh. Returns the points and their cells, both on the
    lattice of the cluster box (``offset``: the mesh origin in box voxels), in cell order."""
    # every edge is met twice (once per face); its two identical points fall in one thinning cell
    e = solid_faces[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2)
    a, b = e[:, 0], e[:, 1]
    fa, fb = frac[a] - 0.5, frac[b] - 0.5
    cross = (fa * fb < 0) & np.isfinite(fa) & np.isfinite(fb)
    a, b, fa, fb = a[cross], b[cross], fa[cross], fb[cross]
    t = (fa / (fa - fb))[:, None]
    pts = solid_verts[a] * (1 - t) + solid_verts[b] * t + offset
    cell = np.floor(pts / spacing).astype(np.int64)
    order = np.lexsort((pts[:, 2], pts[:, 1], pts[:, 0], cell[:, 2], cell[:, 1], cell[:, 0]))
    pts, cell = pts[order], cell[order]
    first = np.ones(len(pts), bool)
    first[1:] = np.any(cell[1:] != cell[:-1], axis=1)
    return pts[first], cell[first]


def _frame(e3: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors completing each row of ``e3`` (P, 3) to an orthonormal frame."""
    helper = np.where(np.abs(e3[:, :1]) < 0.9, [[1.0, 0, 0]], [[0, 1.0, 0]])
    e1 = np.cross(e3, helper)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    return e1, np.cross(e3, e1)


def _solid_planes(points, solid_tree, solid_verts, solid_grad_out, radius):
    """Least-squares tangent plane of the solid mesh near each point: centroid and unit normal
    (smallest principal axis), oriented out of the solid."""
    dist, idx = solid_tree.query(points, k=48, distance_upper_bound=radius)
    valid = np.isfinite(dist)
    idx = np.where(valid, idx, 0)
    w = valid.astype(float)
    cnt = w.sum(axis=1)
    q = solid_verts[idx]
    centre = (q * w[..., None]).sum(axis=1) / np.maximum(cnt, 1)[:, None]
    d = (q - centre[:, None, :]) * w[..., None]
    cov = np.einsum("pki,pkj->pij", d, d)
    _, vecs = np.linalg.eigh(cov)
    normal = vecs[:, :, 0]
    normal *= np.sign(np.sum(normal * solid_grad_out, axis=1, keepdims=True) + 1e-300)
    return centre, normal, cnt >= 6


def _fit_neighbours(points, band_verts, fit_radius):
    """Indices of the (at most ``_K_FIT``) n–w vertices within ``fit_radius`` of each point and
    their validity mask (invalid slots hold index 0)."""
    k = min(_K_FIT, len(band_verts))
    dist, idx = cKDTree(band_verts).query(points, k=k, distance_upper_bound=fit_radius)
    if k == 1:
        dist, idx = dist[:, None], idx[:, None]
    valid = np.isfinite(dist)
    return np.where(valid, idx, 0), valid


def _fit_quadrics(points, band_verts, band_normals, band_dist, fit_radius, slope_scale):
    """Quadric height fields h(u,v) = β0 + β1 u + β2 v + β3 u² + β4 uv + β5 v² in a local frame at
    each point, fitted jointly to positions and normals (normal equations per point, compiled).

    Returns the coefficients, the frames, the number of vertices used and the span of their
    distances from the solid (voxels). Equals :func:`_fit_quadrics_reference` up to the order of
    floating-point summation."""
    idx, valid = _fit_neighbours(points, band_verts, fit_radius)
    beta, e1, e2, e3, count, lo, hi = _fit_kernel(
        np.ascontiguousarray(points, np.float64), np.ascontiguousarray(idx, np.int64), valid,
        np.ascontiguousarray(band_verts, np.float64),
        np.ascontiguousarray(band_normals, np.float64),
        np.ascontiguousarray(band_dist, np.float64), float(slope_scale))
    # lo and hi are elements of band_dist: the span is taken in its dtype, as in the reference
    dt = np.asarray(band_dist).dtype
    return beta, (e1, e2, e3), count, hi.astype(dt) - lo.astype(dt)


def _fit_quadrics_reference(points, band_verts, band_normals, band_dist, fit_radius, slope_scale):
    """Plain numpy oracle of :func:`_fit_quadrics`: batched (P, 3K, 6) design matrices."""
    idx, valid = _fit_neighbours(points, band_verts, fit_radius)
    w = valid.astype(float)
    x, nv = band_verts[idx], band_normals[idx]
    e3 = (nv * w[..., None]).sum(axis=1)
    e3 /= np.maximum(np.linalg.norm(e3, axis=1, keepdims=True), 1e-12)
    e1, e2 = _frame(e3)
    q = x - points[:, None, :]
    u, v, h = (np.einsum("pki,pi->pk", q, e) for e in (e1, e2, e3))
    nu, nvv, nh = (np.einsum("pki,pi->pk", nv, e) for e in (e1, e2, e3))
    ok_n = w * (nh > 0.3)
    nh_safe = np.where(nh > 0.3, nh, 1.0)
    one, zero = np.ones_like(u), np.zeros_like(u)
    rows_pos = np.stack([one, u, v, u * u, u * v, v * v], axis=-1)
    rows_su = np.stack([zero, one, zero, 2 * u, v, zero], axis=-1)
    rows_sv = np.stack([zero, zero, one, zero, u, 2 * v], axis=-1)
    a = np.concatenate([rows_pos, rows_su, rows_sv], axis=1)  # (P, 3K, 6)
    b = np.concatenate([h, -nu / nh_safe, -nvv / nh_safe], axis=1)
    wt = np.concatenate([w, ok_n * slope_scale**2, ok_n * slope_scale**2], axis=1)
    aw = np.swapaxes(a, 1, 2) * wt[:, None, :]  # (P, 6, 3K)
    m = aw @ a + 1e-9 * np.eye(6)
    beta = np.linalg.solve(m, aw @ b[..., None])[..., 0]
    dist_fit = band_dist[idx]
    span = (np.where(valid, dist_fit, -np.inf).max(axis=1)
            - np.where(valid, dist_fit, np.inf).min(axis=1))
    return beta, (e1, e2, e3), w.sum(axis=1).astype(int), span


@njit(cache=True, nogil=True, parallel=True, error_model="numpy")
def _fit_kernel(points, idx, valid, verts, normals, dist, slope_scale):  # pragma: no cover
    """Compiled :func:`_fit_quadrics_reference` after the neighbour query: per point, the frame,
    the 6×6 normal equations accumulated vertex by vertex (no (P, 3K, 6) design arrays), their
    solution, the vertex count and the least and greatest distance from the solid."""
    p_n, k_n = idx.shape
    beta = np.zeros((p_n, 6))
    e1 = np.zeros((p_n, 3))
    e2 = np.zeros((p_n, 3))
    e3 = np.zeros((p_n, 3))
    count = np.zeros(p_n, np.int64)
    lo_out = np.full(p_n, np.inf)
    hi_out = np.full(p_n, -np.inf)
    s2 = slope_scale * slope_scale
    for p in prange(p_n):
        a = np.zeros(3)
        for k in range(k_n):
            if valid[p, k]:
                for c in range(3):
                    a[c] += normals[idx[p, k], c]
        nrm = max(math.sqrt(a[0] * a[0] + a[1] * a[1] + a[2] * a[2]), 1e-12)
        for c in range(3):
            e3[p, c] = a[c] / nrm
        if abs(e3[p, 0]) < 0.9:          # helper (1, 0, 0): e1 = e3 × x̂
            b0, b1, b2 = 0.0, e3[p, 2], -e3[p, 1]
        else:                            # helper (0, 1, 0): e1 = e3 × ŷ
            b0, b1, b2 = -e3[p, 2], 0.0, e3[p, 0]
        nb = math.sqrt(b0 * b0 + b1 * b1 + b2 * b2)
        e1[p, 0], e1[p, 1], e1[p, 2] = b0 / nb, b1 / nb, b2 / nb
        e2[p, 0] = e3[p, 1] * e1[p, 2] - e3[p, 2] * e1[p, 1]
        e2[p, 1] = e3[p, 2] * e1[p, 0] - e3[p, 0] * e1[p, 2]
        e2[p, 2] = e3[p, 0] * e1[p, 1] - e3[p, 1] * e1[p, 0]
        m = np.zeros((6, 6))
        r = np.zeros(6)
        row = np.zeros(6)
        lo, hi, n = np.inf, -np.inf, 0
        for k in range(k_n):
            if not valid[p, k]:
                continue
            i = idx[p, k]
            n += 1
            lo = min(lo, dist[i])
            hi = max(hi, dist[i])
            u = v = h = nu = nv = nh = 0.0
            for c in range(3):
                q = verts[i, c] - points[p, c]
                u += q * e1[p, c]
                v += q * e2[p, c]
                h += q * e3[p, c]
                nu += normals[i, c] * e1[p, c]
                nv += normals[i, c] * e2[p, c]
                nh += normals[i, c] * e3[p, c]
            row[0], row[1], row[2], row[3], row[4], row[5] = 1.0, u, v, u * u, u * v, v * v
            for a_ in range(6):
                r[a_] += row[a_] * h
                for b_ in range(6):
                    m[a_, b_] += row[a_] * row[b_]
            if nh > 0.3:
                row[0], row[1], row[2], row[3], row[4], row[5] = 0.0, 1.0, 0.0, 2 * u, v, 0.0
                for a_ in range(6):
                    r[a_] += s2 * row[a_] * (-nu / nh)
                    for b_ in range(6):
                        m[a_, b_] += s2 * row[a_] * row[b_]
                row[0], row[1], row[2], row[3], row[4], row[5] = 0.0, 0.0, 1.0, 0.0, u, 2 * v
                for a_ in range(6):
                    r[a_] += s2 * row[a_] * (-nv / nh)
                    for b_ in range(6):
                        m[a_, b_] += s2 * row[a_] * row[b_]
        for a_ in range(6):
            m[a_, a_] += 1e-9
        beta[p] = np.linalg.solve(m, r)
        count[p] = n
        lo_out[p], hi_out[p] = lo, hi
    return beta, e1, e2, e3, count, lo_out, hi_out


def _intersect(points, beta, frame, centre, nu_s, max_step):
    """Point where the quadric meets the solid plane nearest to each contact-line point, and the
    quadric's unit normal there (world frame, oriented like e3 = toward n)."""
    e1, e2, e3 = frame
    a1, a2, a3 = (np.sum(nu_s * e, axis=1) for e in (e1, e2, e3))
    c = centre - points
    c1, c2, c3 = (np.sum(c * e, axis=1) for e in (e1, e2, e3))
    g0 = -(a1 * c1 + a2 * c2 + a3 * c3)
    gu, gv = a1 + a3 * beta[:, 1], a2 + a3 * beta[:, 2]
    gn = np.hypot(gu, gv)
    d1, d2 = gu / np.maximum(gn, 1e-12), gv / np.maximum(gn, 1e-12)
    # g(t) = α + β t + γ t² along (u, v) = t (d1, d2)
    alpha = g0 + a3 * beta[:, 0]
    lin = a1 * d1 + a2 * d2 + a3 * (beta[:, 1] * d1 + beta[:, 2] * d2)
    quad = a3 * (beta[:, 3] * d1 * d1 + beta[:, 4] * d1 * d2 + beta[:, 5] * d2 * d2)
    disc = lin * lin - 4 * quad * alpha
    with np.errstate(invalid="ignore", divide="ignore"):
        sq = np.sqrt(disc)
        # numerically stable roots; the one nearest t = 0
        qq = -0.5 * (lin + np.copysign(sq, lin))
        t1 = qq / quad
        t2 = alpha / qq
        lin_root = -alpha / lin
    small = np.abs(quad) < 1e-9 * np.maximum(np.abs(lin), 1e-300)
    t = np.where(small, lin_root, np.where(np.abs(t1) < np.abs(t2), t1, t2))
    ok = np.isfinite(t) & (np.abs(t) <= max_step) & (small | (disc >= 0))
    t = np.where(ok, t, 0.0)
    u, v = t * d1, t * d2
    h = beta[:, 0] + beta[:, 1] * u + beta[:, 2] * v + beta[:, 3] * u * u + beta[:, 4] * u * v \
        + beta[:, 5] * v * v
    hu = beta[:, 1] + 2 * beta[:, 3] * u + beta[:, 4] * v
    hv = beta[:, 2] + beta[:, 4] * u + 2 * beta[:, 5] * v
    nrm = (-hu[:, None] * e1 - hv[:, None] * e2 + e3) / np.sqrt(1 + hu * hu + hv * hv)[:, None]
    where = points + u[:, None] * e1 + v[:, None] * e2 + h[:, None] * e3
    return where, nrm, ok


def _no_points(area_nw: float, unresolved: bool = False) -> dict:
    return {"pts": np.zeros((0, 3)), "theta": np.zeros(0), "n_fit": np.zeros(0, int),
            "unresolved": np.zeros(0, bool), "area_nw": area_nw, "speck": unresolved,
            "cell": np.zeros((0, 3), np.int64)}


def _cluster_angles(lab, cl, k, box, sigma, spacing, fit_radius, band, chunks=None) -> dict:
    """Contact-line angles of cluster ``k`` in its padded bounding box (voxel coordinates of the
    box): points, angles, vertices per fit, unresolved mask and the n–w area (voxel²).

    With ``chunks`` (core edge, voxels), a box larger than that is processed core by core, each
    with a halo of :func:`_chunk_halo` voxels; a point belongs to the core holding the corner of
    its thinning cell, an n–w face to the core holding its centroid."""
    shape = np.array([s.stop - s.start for s in box])
    if chunks is None or np.all(shape <= chunks):
        return _region_angles(lab, cl, k, box, np.zeros(3, int), shape, np.zeros(3, int), shape,
                              sigma, spacing, fit_radius, band)
    halo = _chunk_halo(sigma, spacing, fit_radius, band)
    parts = []
    for lo in itertools.product(*(range(0, n, chunks) for n in shape)):
        lo = np.array(lo)
        hi = np.minimum(lo + chunks, shape)
        parts.append(_region_angles(lab, cl, k, box, lo, hi, np.maximum(lo - halo, 0),
                                    np.minimum(hi + halo, shape), sigma, spacing, fit_radius, band))
    if all(p["speck"] for p in parts):
        return _no_points(0.0, unresolved=True)
    cell = np.concatenate([p["cell"] for p in parts])
    order = np.lexsort(cell.T[::-1]) if len(cell) else np.zeros(0, int)
    return {"pts": np.concatenate([p["pts"] for p in parts])[order],
            "theta": np.concatenate([p["theta"] for p in parts])[order],
            "n_fit": np.concatenate([p["n_fit"] for p in parts])[order],
            "unresolved": np.concatenate([p["unresolved"] for p in parts])[order],
            "area_nw": float(sum(p["area_nw"] for p in parts)), "speck": False, "cell": cell[order]}


def _chunk_halo(sigma: float, spacing: float, fit_radius: float, band) -> int:
    """Voxels of context around a core so that everything its points and faces use is the same as
    in the whole box: points reach ``spacing`` past the core, their fits ``fit_radius`` and the
    solid planes max(4, 3σ) further; a vertex there needs its distance to solid within band[1]
    and its 10 Taubin rings (≤ 2 voxels each, generous) plus one cube, on a field blurred with a
    4σ kernel."""
    reach = spacing + max(fit_radius, 4.0, 3 * sigma) + 1
    return int(math.ceil(reach + max(2 * TAUBIN_ITERATIONS + 1 + math.ceil(4 * sigma + 0.5),
                                     band[1] + 1))) + 2


def _region_angles(lab, cl, k, box, core_lo, core_hi, lo, hi, sigma, spacing, fit_radius,
                   band) -> dict:
    """:func:`_cluster_angles` on the part ``lo:hi`` of the box (box voxels), keeping the points
    and n–w faces owned by the core ``core_lo:core_hi``; results in box coordinates."""
    region = tuple(slice(s.start + int(a), s.start + int(b))
                   for s, a, b in zip(box, lo, hi, strict=True))
    offset = lo.astype(float)
    sub = lab[region]
    n_ind = cl[region] == k
    s_ind = sub == SOLID
    fluid = n_ind | (sub == WETTING) | (sub == NONWETTING)
    del sub
    gn = ndimage.gaussian_filter(n_ind.astype(np.float32), sigma, mode="nearest")
    del n_ind
    if gn.max() <= 0.5:  # a speck that smoothing erases: no surface to fit
        return _no_points(0.0, unresolved=True)
    gs = ndimage.gaussian_filter(s_ind.astype(np.float32), sigma, mode="nearest")
    gf = ndimage.gaussian_filter(fluid.astype(np.float32), sigma, mode="nearest")
    del fluid
    nv, nf, nn = _mesh(gn, toward_high=True)  # ν_{w→n}: up the n indicator
    # distance of the n-mesh vertices from the solid boundary (voxel centres are 1/2 off it)
    if s_ind.any():
        d_solid = _distance_to(s_ind)
        d_solid -= 0.5                   # in place: no second full-box float64 temporary
        d_solid = d_solid.astype(np.float32)
        ds_n = _sample(d_solid, nv)
        del d_solid
    else:
        ds_n = np.full(len(nv), np.inf, np.float32)
    own_face = _owned(nv[nf].mean(axis=1) + offset, core_lo, core_hi)
    area_nw = _nw_area(nv, nf[own_face], ds_n)
    # ν_s: down the solid indicator, into the pore; meshed only within the blur's reach (4σ) of
    # the cluster, where its contact line can be
    near = gn > 0
    if not ((gs[near] > 0.5).any() and (gs[near] < 0.5).any()):
        return _no_points(area_nw)
    sv, sf, sn = _mesh(gs, toward_high=False, mask=near)
    del gs, near
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = _sample(gn, sv) / _sample(gf, sv)
    del gn, gf
    pts, cell = _contact_points(sv, sf, frac, spacing, offset)
    own = _owned(cell * spacing, core_lo, core_hi)
    pts, cell = pts[own], cell[own]
    if len(pts) == 0:
        return _no_points(area_nw)
    local = pts - offset
    in_band = (ds_n >= band[0]) & (ds_n <= band[1])
    if not in_band.any():
        return {"pts": pts, "theta": np.full(len(pts), np.nan), "n_fit": np.zeros(len(pts), int),
                "unresolved": np.ones(len(pts), bool), "area_nw": area_nw, "speck": False,
                "cell": cell}
    beta, frame, count, span = _fit_quadrics(local, nv[in_band], nn[in_band], ds_n[in_band],
                                             fit_radius, _SLOPE_SCALE)
    unresolved = (span < _MIN_SPAN) | (count < _MIN_FIT)
    centre, nu_s, plane_ok = _solid_planes(local, cKDTree(sv), sv, _sample_normals(sv, sn, local),
                                           max(4.0, 3 * sigma))
    where, nu_wn, cut_ok = _intersect(local, beta, frame, centre, nu_s, max_step=fit_radius)
    cos = np.clip(np.sum(nu_s * nu_wn, axis=1), -1, 1)
    theta = np.where(~unresolved & plane_ok & cut_ok, np.degrees(np.arccos(cos)), np.nan)
    return {"pts": np.where(np.isfinite(theta)[:, None], where + offset, pts), "theta": theta,
            "n_fit": count, "unresolved": unresolved, "area_nw": area_nw, "speck": False,
            "cell": cell}


def _owned(x: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Rows of ``x`` (box voxels) inside the core ``[lo, hi)``."""
    return np.all((x >= lo) & (x < hi), axis=1)


def _distance_to(feature: np.ndarray) -> np.ndarray:
    """Exact Euclidean distance (voxels) of every voxel to the nearest ``True`` voxel, by the
    compiled separable transform of :mod:`wetpath._mesh`; equals
    ``ndimage.distance_transform_edt(~feature)`` (the test oracle)."""
    d = squared_distance(feature, float(np.sqrt(np.sum(np.square(feature.shape)))))
    return np.sqrt(d, out=d)


def _sample_normals(verts, normals, pts):
    """Normal of the nearest mesh vertex to each point (used only to orient plane fits)."""
    _, idx = cKDTree(verts).query(pts)
    return normals[idx]


def _nw_area(verts, faces, d_solid) -> float:
    """Area (voxel²) of the n-mesh faces more than one voxel from the solid: the n–w interface."""
    tri = verts[faces]
    area = 0.5 * np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1)
    if d_solid is None:
        return float(area.sum())
    return float(area[d_solid[faces].mean(axis=1) > 1.0].sum())


def _cluster_table(res: dict, k: int, box, voxel_size: float, min_area: float) -> pd.DataFrame:
    """Rows of one cluster: its points, or one row saying why it has no angle."""
    is_small = bool(res["area_nw"] < min_area)
    has_line = len(res["pts"]) > 0
    if not has_line:
        res.update(pts=np.full((1, 3), np.nan), theta=np.array([np.nan]),
                   n_fit=np.zeros(1, int), unresolved=np.array([res["speck"]]))
    xyz = (res["pts"] + np.array([s.start for s in box], float)) * voxel_size
    nan = ~np.isfinite(res["theta"])
    return pd.DataFrame({
        "cluster": k, "z": xyz[:, 0], "y": xyz[:, 1], "x": xyz[:, 2],
        "theta_deg": res["theta"], "n_fit": res["n_fit"], "area_nw_vox2": res["area_nw"],
        "flag_no_contact_line": not has_line and not res["speck"],
        "flag_unresolved": res["unresolved"],
        "flag_fit_failed": has_line & nan & ~res["unresolved"],
        "flag_small_interface": is_small})


def geometric_angles(labels: np.ndarray, voxel_size: float = 1.0, *,
                     codes: PhaseCodes | dict | None = None, clusters: np.ndarray | None = None,
                     sigma: float = 1.0, spacing: float = 3.0, fit_radius: float = 10.0,
                     band: tuple[float, float] | None = None,
                     min_interface_vox2: float = 1000.0, chunks: int | None = None,
                     threads: int | None = None) -> pd.DataFrame:
    """Contact angles at points of the contact line, from local fits of the n–w interface and the
    solid intersected with each other (AlRatrout et al. 2017).

    Parameters
    ----------
    labels : ndarray of int, shape (z, y, x)
        Phase labels (canonical codes unless ``codes`` says otherwise).
    voxel_size : float
        Edge length of a voxel (µm in the workflow); only scales the point coordinates.
    codes : PhaseCodes or mapping, optional
        Label values of the phases.
    clusters : ndarray of int, optional
        Cluster labels of the n phase (0 elsewhere), e.g. from :func:`wetpath.label_clusters`;
        default: 26-connected components of the n phase, numbered by first voxel in C order.
    sigma : float
        Gaussian smoothing of the phase indicators before meshing (voxels).
    spacing : float
        Approximate spacing of the reported contact-line points (voxels).
    fit_radius : float
        Radius around each point within which n–w vertices enter the quadric fit (voxels).
    band : (float, float), optional
        Distance range from the solid of the n–w vertices used in the fit (voxels); default
        (2.5σ, 9): beyond the crease rounded by smoothing, near enough for a quadric.
    min_interface_vox2 : float
        Clusters whose n–w interface is smaller than this (voxel²) are flagged
        ``flag_small_interface`` and a warning is issued (Khanamiri et al. 2020: ~1000 voxel²).
    chunks : int, optional
        Core edge (voxels) of the chunks in which a cluster box larger than that is processed,
        each with a halo wide enough for the blur, the smoothing and the fits, so that peak
        memory is bounded by a few chunks rather than by the box (a percolating cluster's box is
        the whole volume). None: each box whole. The points and angles equal the whole-box ones
        up to the order of floating-point summation.
    threads : int, optional
        Worker threads over clusters (None: all cores); the result does not depend on it.

    Returns
    -------
    DataFrame
        One row per contact-line point: ``cluster``, ``z, y, x`` (point where the fits meet, in the
        unit of ``voxel_size``), ``theta_deg`` (θ through w, degrees; NaN where a fit fails),
        ``n_fit`` (n–w vertices in the fit), ``area_nw_vox2`` (the cluster's n–w area),
        ``flag_no_contact_line`` (a cluster without contact line gets one row with NaN angle),
        ``flag_unresolved`` (NaN angle: the fitted n–w patch spans less than 1.5 voxels of
        distance from the solid, e.g. a cap only ~4 voxels high, or a speck erased by smoothing),
        ``flag_fit_failed`` (NaN angle: no solid plane or no intersection near the point) and
        ``flag_small_interface``.

    Raises
    ------
    WetpathError
        If ``voxel_size`` is not one positive number or ``clusters`` does not match ``labels``.

    References
    ----------
    AlRatrout, A., Raeini, A. Q., Bijeljic, B. & Blunt, M. J. (2017). *Adv. Water Resour.* 109,
    158–169.
    Khanamiri, H. H., Slotte, P. A. & Berg, C. F. (2020). *Transp. Porous Media* 135, 735–751.
    Taubin, G. (1995). *Proc. SIGGRAPH '95*, 351–358.
    """
    if np.ndim(voxel_size) != 0 or not voxel_size > 0:
        raise WetpathError(f"voxel_size must be one positive number (isotropic voxels), got "
                           f"{voxel_size!r}", step=_STEP)
    lab = to_canonical(labels, codes, step=_STEP)
    if lab.ndim != 3:
        raise WetpathError(f"labels must be a 3D volume, got shape {lab.shape}", step=_STEP)
    if clusters is None:
        clusters, _ = ndimage.label(lab == NONWETTING, structure=np.ones((3, 3, 3), bool))
    elif np.shape(clusters) != lab.shape:
        raise WetpathError(f"clusters has shape {np.shape(clusters)} but labels {lab.shape}",
                           step=_STEP)
    band = (2.5 * sigma, 9.0) if band is None else band
    # the fits use the cluster's own vertices (inside its box); the margin only has to hold the
    # blur (4σ), the solid planes near the line and the solid within band[1] of the interface
    pad = int(math.ceil(max(band[1], 4 * sigma + 4))) + 2
    boxes = {k: tuple(slice(max(s.start - pad, 0), min(s.stop + pad, n))
                      for s, n in zip(sl, lab.shape, strict=True))
             for k, sl in enumerate(ndimage.find_objects(clusters), start=1) if sl is not None}

    def one(k):
        return _cluster_table(_cluster_angles(lab, clusters, k, boxes[k], sigma, spacing,
                                              fit_radius, band, chunks),
                              k, boxes[k], voxel_size, min_interface_vox2)

    # largest boxes first so that the threads finish together; the table keeps cluster order
    order = sorted(boxes, key=lambda k: -math.prod(s.stop - s.start for s in boxes[k]))
    nthreads = resolve_threads(threads)
    if nthreads == 1 or len(order) < 2:
        done = {k: one(k) for k in order}
    else:
        with ThreadPoolExecutor(nthreads) as pool:
            done = dict(zip(order, pool.map(one, order), strict=True))
    frames = [done[k] for k in boxes]
    small = [bool(f["flag_small_interface"].iloc[0]) for f in frames]
    if any(small):
        warnings.warn(f"{sum(small)} cluster(s) have an n–w interface below "
                      f"{min_interface_vox2:g} voxel²; their geometric angles are unreliable "
                      "(Khanamiri et al. 2020)", stacklevel=2)
    if not frames:
        return pd.DataFrame({c: pd.Series(dtype=float) for c in _COLUMNS})
    return pd.concat(frames, ignore_index=True)[_COLUMNS]


def _summary(theta: np.ndarray) -> dict:
    t = theta[np.isfinite(theta)]
    n = int(t.size)
    out = {"count": n, "median_deg": math.nan, "q25_deg": math.nan, "q75_deg": math.nan,
           "mean_deg": math.nan, "sem_deg": math.nan, "flag_no_contact_line": n == 0,
           "hist_counts": np.histogram(t, BIN_EDGES_DEG)[0]}
    if n:
        q25, med, q75 = np.quantile(t, [0.25, 0.5, 0.75])
        out.update(median_deg=float(med), q25_deg=float(q25), q75_deg=float(q75),
                   mean_deg=float(t.mean()),
                   sem_deg=float(t.std(ddof=1) / math.sqrt(n)) if n > 1 else math.nan)
    return out


def summarise_geometric(points: pd.DataFrame) -> dict:
    """Distribution of geometric contact angles for the state and per cluster.

    Parameters
    ----------
    points : DataFrame
        Output of :func:`geometric_angles`.

    Returns
    -------
    dict
        State-wide ``count`` (finite angles), ``median_deg``, ``q25_deg``, ``q75_deg`` (IQR),
        ``mean_deg``, ``sem_deg`` (standard error of the mean), ``hist_counts`` (counts on the
        fixed 5° bins ``hist_edges_deg`` from 0° to 180°), ``flag_no_contact_line`` (no finite
        angle: the statistics are NaN), ``n_small_interface`` (clusters flagged below ~1000
        voxel²), and ``clusters``: a DataFrame with the same statistics per cluster (the
        histogram as an array per row).

    References
    ----------
    AlRatrout, A., Raeini, A. Q., Bijeljic, B. & Blunt, M. J. (2017). *Adv. Water Resour.* 109,
    158–169 (distribution, not a single value, characterises the sample).
    """
    theta = points["theta_deg"].to_numpy(float) if len(points) else np.zeros(0)
    state = _summary(theta)
    state["hist_edges_deg"] = BIN_EDGES_DEG
    rows = []
    for k, grp in points.groupby("cluster", sort=True):
        rows.append({"cluster": int(k), **_summary(grp["theta_deg"].to_numpy(float)),
                     "flag_small_interface": bool(grp["flag_small_interface"].any())})
    state["n_small_interface"] = int(sum(r["flag_small_interface"] for r in rows))
    state["clusters"] = pd.DataFrame(rows)
    return state
