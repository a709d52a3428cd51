"""Geometric contact angle at contact-line points, by local fits of the n–w interface and the solid.

At a point of the contact line, cos θ_w = ν_s · ν_{w→n} (AlRatrout, Raeini, Bijeljic & Blunt
2017), with ν_s the solid normal pointing out of the solid into the pore and ν_{w→n} the n–w normal
pointing from w into n. Smoothing rounds the crease where the two surfaces meet, so normals read at
the line are biased toward θ/2; here both surfaces are fitted *away* from the line and the fits are
intersected:

1. the n mesh is the one of the mesh measures (:mod:`wetpath._mesh`: per cluster and chunk, the
   cluster's indicator Gaussian-smoothed by σ voxels, marching cubes at 0.5 (Lorensen & Cline
   1987), Taubin smoothing (Taubin 1995), the smoothed wall distance d and solid normal ν_s at its
   vertices), so the two stages share one mesh and one pass over the volume;
2. contact-line points are where the n–w part of that mesh crosses d = 2.5σ (above the rounded
   crease), carried down the solid normal to their foot on the solid surface (d = 0); they are
   thinned to one per cell of a ``spacing``-voxel lattice, and a point belongs to the chunk that
   holds the corner of its cell;
3. at each foot point a quadric height field h(u, v) in a local frame (normal e3 = the mean n–w
   normal of the patch) is fitted by least squares jointly to the positions and normals of the
   n–w mesh vertices that lie 2.5σ–9 voxels from the solid within ``fit_radius`` of the point, and
   a tangent plane is fitted (principal axes) to the centres of the solid–fluid voxel faces within
   max(4, 3σ) voxels of it — unbiased for a voxelised plane at any tilt;
4. the quadric is intersected with the plane, and cos θ_w = ν_s · ν_{w→n} is read there from the
   quadric's normal and the plane's normal. Points whose fitted patch is too thin to extrapolate
   (an interface that barely rises above the rounded crease) get NaN and ``flag_unresolved``.

The fits run in a compiled kernel, one 6×6 normal-equation system per point; the
batched numpy version is kept as the test oracle. Chunks (or clusters) run on ``threads`` worker
threads.

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

import functools
import math
import warnings

import numpy as np
import pandas as pd
from numba import njit
from scipy import ndimage
from scipy.spatial import cKDTree

from ._codes import NONWETTING, SOLID, WETTING, PhaseCodes, to_canonical
from ._errors import WetpathError
from ._lattice import resolve_threads
from ._mesh import COLUMNS as MESH_COLUMNS
from ._mesh import _stored, finish_mesh, mesh_sums

__all__ = ["geometric_angles", "summarise_geometric"]

_STEP = "geometric"
_K_FIT = 200
"""Most n–w vertices per fit (nearest first); a patch of radius 10 voxels holds fewer."""
_SLOPE_SCALE = 3.0
"""Weight (voxels) of the slope equations against the position equations in the joint fit."""
_MIN_FIT = 12
"""Fewest n–w vertices for a quadric fit (6 coefficients)."""
_MIN_SPAN = 2.0
"""Least spread (voxels) of the fitted n–w vertices' wall distances. Thinner patches extrapolate a
nearly flat strip (measured here, two offsets each, axis-aligned and tilted plates): a 150° cap of
radius 30 voxels (4 voxels high) spans 1.43–1.50; a 135° cap of radius 15 (4.4 voxels high) spans
1.48–1.84 and reads 3.2–3.9° high where it passes 1.75; a 150° cap of radius 40 (span 2.2–2.4)
reads within 3.8° and a 140° cap of radius 30 (span 3.2–3.4) within 1°."""
BIN_EDGES_DEG = np.arange(0.0, 180.0 + 5.0, 5.0)
"""Fixed 5° histogram bins from 0° to 180°."""

_COLUMNS = ["cluster", "z", "y", "x", "theta_deg", "n_fit", "area_nw_vox2",
            "flag_no_contact_line", "flag_unresolved", "flag_fit_failed", "flag_small_interface"]


def _frame(e3: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors completing each row of ``e3`` (P, 3) to an orthonormal frame."""
    helper = np.where(np.abs(e3[:, :1]) < 0.9, [[1.0, 0, 0]], [[0, 1.0, 0]])
    e1 = np.cross(e3, helper)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    return e1, np.cross(e3, e1)


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


@njit(cache=True, nogil=True, error_model="numpy")
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
    for p in range(p_n):
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


@njit(cache=True, nogil=True)
def _face_sums(points, lab, radius):  # pragma: no cover
    """Per point: count, Σ c, Σ c cᵀ (6 entries) and Σ outward direction of the solid–fluid voxel
    faces whose centre c lies within ``radius`` of the point (box voxel coordinates)."""
    nz, ny, nx = lab.shape
    out = np.zeros((points.shape[0], 13))
    r2 = radius * radius
    for p in range(points.shape[0]):
        pz, py, px = points[p, 0], points[p, 1], points[p, 2]
        z0, z1 = max(int(math.floor(pz - radius)) - 1, 0), min(int(math.ceil(pz + radius)) + 2, nz)
        y0, y1 = max(int(math.floor(py - radius)) - 1, 0), min(int(math.ceil(py + radius)) + 2, ny)
        x0, x1 = max(int(math.floor(px - radius)) - 1, 0), min(int(math.ceil(px + radius)) + 2, nx)
        reach2 = (radius + 1.0) * (radius + 1.0)   # voxels whose faces can be within radius
        for i in range(z0, z1):
            rz = (i - pz) * (i - pz)
            if rz > reach2:
                continue
            for j in range(y0, y1):
                ry = rz + (j - py) * (j - py)
                if ry > reach2:
                    continue
                for k in range(x0, x1):
                    if ry + (k - px) * (k - px) > reach2 or lab[i, j, k] != SOLID:
                        continue
                    for ax in range(3):
                        for sgn in (-1, 1):
                            ii, jj, kk = i, j, k
                            if ax == 0:
                                ii += sgn
                            elif ax == 1:
                                jj += sgn
                            else:
                                kk += sgn
                            if not (0 <= ii < nz and 0 <= jj < ny and 0 <= kk < nx):
                                continue
                            code = lab[ii, jj, kk]
                            if code != WETTING and code != NONWETTING:
                                continue
                            cz, cy, cx = 0.5 * (i + ii), 0.5 * (j + jj), 0.5 * (k + kk)
                            dz, dy, dx = cz - pz, cy - py, cx - px
                            if dz * dz + dy * dy + dx * dx > r2:
                                continue
                            o = out[p]
                            o[0] += 1.0
                            o[1] += cz
                            o[2] += cy
                            o[3] += cx
                            o[4] += cz * cz
                            o[5] += cz * cy
                            o[6] += cz * cx
                            o[7] += cy * cy
                            o[8] += cy * cx
                            o[9] += cx * cx
                            o[10 + ax] += sgn
    return out


def _plane_radius(sigma: float) -> float:
    """Radius (voxels) of the solid-plane fit around a foot point (its faces are read up to
    three voxels further: :func:`_face_sums`)."""
    return max(4.0, 3 * sigma)


def _solid_planes(points: np.ndarray, lab: np.ndarray, radius: float):
    """Least-squares tangent plane of the solid surface near each point: the centroid and the
    smallest principal axis of the solid–fluid voxel-face centres within ``radius`` (box voxels),
    the normal oriented out of the solid; valid where at least 6 faces were found."""
    s = _face_sums(np.ascontiguousarray(points, np.float64), lab, float(radius))
    cnt = np.maximum(s[:, 0], 1.0)
    centre = s[:, 1:4] / cnt[:, None]
    iu = np.array([[4, 5, 6], [5, 7, 8], [6, 8, 9]])
    cov = s[:, iu] / cnt[:, None, None] - centre[:, :, None] * centre[:, None, :]
    _, vecs = np.linalg.eigh(cov)
    normal = vecs[:, :, 0]
    normal *= np.sign(np.sum(normal * s[:, 10:13], axis=1, keepdims=True) + 1e-300)
    return centre, normal, s[:, 0] >= 6


def _unit(v: np.ndarray) -> np.ndarray:
    return v / np.maximum(np.linalg.norm(v, axis=1), 1e-30)[:, None]


def box_contact_angles(*, verts, edges, d, nu, vnorm, v_bad, lab, origin, own_lo, own_hi, sigma,
                       spacing, fit_radius, band) -> dict:
    """Contact-line points of one cluster's n mesh in one box, and their angles.

    Parameters (keyword only; as passed by :func:`wetpath._mesh.mesh_sums`)
    ----------
    verts, edges : ndarray
        Taubin-smoothed vertices (box voxel coordinates) and unique edges of the cluster's mesh.
    d, nu : ndarray
        Wall distance (voxels, positive in the pore) and unit solid normal at the vertices.
    vnorm : ndarray
        Unit vertex normals pointing out of n.
    v_bad : ndarray of bool
        Vertices of faces on the array or field-of-view border (left out).
    lab : ndarray of uint8
        Phase codes of the box.
    origin, own_lo, own_hi : ndarray
        Array coordinates of the box origin and of the owned core ``[own_lo, own_hi)``.
    sigma, spacing, fit_radius, band
        As in :func:`geometric_angles`.

    Returns
    -------
    dict
        ``pts`` (array coordinates, where the fits meet; the foot point where the angle is NaN),
        ``theta`` (degrees), ``n_fit``, ``unresolved`` and ``cell`` (thinning cell), in cell order.
    """
    m0 = band[0]
    a, b = edges[:, 0], edges[:, 1]
    fa, fb = d[a] - m0, d[b] - m0
    cross = (fa * fb < 0) & ~v_bad[a] & ~v_bad[b]
    a, b, fa, fb = a[cross], b[cross], fa[cross], fb[cross]
    t = (fa / (fa - fb))[:, None]
    above = verts[a] * (1 - t) + verts[b] * t
    foot = above - m0 * _unit(nu[a] * (1 - t) + nu[b] * t)   # down to the solid surface, d = 0
    pts = foot + origin
    cell = np.floor(pts / spacing).astype(np.int64)
    own = np.all((cell * spacing >= own_lo) & (cell * spacing < own_hi), axis=1)
    pts, cell, foot = pts[own], cell[own], foot[own]
    # one point per cell: the first in (z, y, x) order, whatever the order of the mesh
    order = np.lexsort((pts[:, 2], pts[:, 1], pts[:, 0], cell[:, 2], cell[:, 1], cell[:, 0]))
    pts, cell, foot = pts[order], cell[order], foot[order]
    first = np.ones(len(pts), bool)
    first[1:] = np.any(cell[1:] != cell[:-1], axis=1)
    pts, cell, foot = pts[first], cell[first], foot[first]
    n = len(pts)
    out = {"pts": pts, "theta": np.full(n, np.nan), "n_fit": np.zeros(n, np.int64),
           "unresolved": np.ones(n, bool), "cell": cell}
    fit = ~v_bad & (d >= band[0]) & (d <= band[1])
    if n == 0 or not fit.any():
        return out
    # ν_{w→n} points into n: against the mesh normals
    beta, frame, count, span = _fit_quadrics(foot, verts[fit], -vnorm[fit], d[fit], fit_radius,
                                             _SLOPE_SCALE)
    unresolved = (span < _MIN_SPAN) | (count < _MIN_FIT)
    centre, nu_s, plane_ok = _solid_planes(foot, lab, _plane_radius(sigma))
    where, nu_wn, cut_ok = _intersect(foot, beta, frame, centre, nu_s, max_step=fit_radius)
    cos = np.clip(np.sum(nu_s * nu_wn, axis=1), -1, 1)
    theta = np.where(~unresolved & plane_ok & cut_ok, np.degrees(np.arccos(cos)), np.nan)
    out.update(pts=np.where(np.isfinite(theta)[:, None], where + origin, pts), theta=theta,
               n_fit=count, unresolved=unresolved)
    return out


def _cluster_points(parts: list[dict]) -> dict:
    """The points of one cluster gathered from its boxes, in cell order; ``has_mesh``: any box
    had a mesh; ``touches_solid``: any face of it lies on the solid."""
    contact = [p["contact"] for p in parts if "contact" in p]
    keys = ("pts", "theta", "n_fit", "unresolved", "cell")
    if contact:
        res = {k: np.concatenate([c[k] for c in contact]) for k in keys}
        order = np.lexsort(res["cell"].T[::-1])
        res = {k: v[order] for k, v in res.items()}
    else:
        res = {"pts": np.zeros((0, 3)), "theta": np.zeros(0), "n_fit": np.zeros(0, np.int64),
               "unresolved": np.zeros(0, bool), "cell": np.zeros((0, 3), np.int64)}
    res["area_nw"] = float(sum(p["Anw_raw"] for p in parts))
    res["has_mesh"] = bool(contact)
    res["touches_solid"] = any(p["Ans_raw"] > 0 for p in parts)
    return res

def _cluster_table(res: dict, k: int, voxel_size: float, min_area: float) -> pd.DataFrame:
    """Rows of one cluster: its points, or one row saying why it has no angle."""
    is_small = bool(res["area_nw"] < min_area)
    has_line = len(res["pts"]) > 0
    # no point: a speck erased by smoothing, or an interface that never rises above the crease
    # (both unresolved), or a cluster that does not touch the solid (no contact line)
    unresolvable = not res["has_mesh"] or res["touches_solid"]
    if not has_line:
        res.update(pts=np.full((1, 3), np.nan), theta=np.array([np.nan]),
                   n_fit=np.zeros(1, int), unresolved=np.array([unresolvable]))
    xyz = res["pts"] * voxel_size
    nan = ~np.isfinite(res["theta"])
    return pd.DataFrame({
        "cluster": k, "z": xyz[:, 0], "y": xyz[:, 1], "x": xyz[:, 2],
        "theta_deg": res["theta"], "n_fit": res["n_fit"], "area_nw_vox2": res["area_nw"],
        "flag_no_contact_line": not has_line and not unresolvable,
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
        Worker threads over chunks or clusters (None: all cores); the result does not depend on
        it.

    Returns
    -------
    DataFrame
        One row per contact-line point: ``cluster``, ``z, y, x`` (point where the fits meet, in the
        unit of ``voxel_size``), ``theta_deg`` (θ through w, degrees; NaN where a fit fails),
        ``n_fit`` (n–w vertices in the fit), ``area_nw_vox2`` (the cluster's n–w area),
        ``flag_no_contact_line`` (a cluster without contact line gets one row with NaN angle),
        ``flag_unresolved`` (NaN angle: the fitted n–w patch spans less than 1.5 voxels of
        distance from the solid, e.g. a cap only ~4 voxels high; a cluster on the solid whose
        interface never rises 2.5σ above it; or a speck erased by smoothing),
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
    return mesh_and_angles(labels, voxel_size, codes=codes, clusters=clusters, sigma=sigma,
                           spacing=spacing, fit_radius=fit_radius, band=band,
                           min_interface_vox2=min_interface_vox2, chunks=chunks,
                           threads=threads)[1]


def mesh_and_angles(labels, voxel_size: float = 1.0, *,
                    codes: PhaseCodes | dict | None = None, clusters=None,
                    sigma: float = 1.0, spacing: float = 3.0, fit_radius: float = 10.0,
                    band: tuple[float, float] | None = None, min_interface_vox2: float = 1000.0,
                    chunks: int | None = None, threads: int | None = None,
                    boxes: np.ndarray | None = None, max_box: int | None = None
                    ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """:func:`wetpath._mesh.mesh_measures` and :func:`geometric_angles` from one meshing pass.

    Parameters as in :func:`geometric_angles`. ``labels`` (canonical codes) and ``clusters`` may
    also be stored arrays (zarr, dask) read chunk by chunk, with the cluster bounding ``boxes`` and
    the bound ``max_box`` of :func:`wetpath._mesh.mesh_sums`; results do not depend on where the
    arrays live. Returns the
    mesh-measures table (one row per cluster) and the contact-point table.
    """
    if np.ndim(voxel_size) != 0 or not voxel_size > 0:
        raise WetpathError(f"voxel_size must be one positive number (isotropic voxels), got "
                           f"{voxel_size!r}", step=_STEP)
    stored = clusters is not None and codes is None and _stored(labels)
    lab = labels if stored else to_canonical(labels, codes, step=_STEP)
    if len(lab.shape) != 3:
        raise WetpathError(f"labels must be a 3D volume, got shape {lab.shape}", step=_STEP)
    if clusters is None:
        clusters, _ = ndimage.label(lab == NONWETTING, structure=np.ones((3, 3, 3), bool))
    elif tuple(np.shape(clusters)) != tuple(lab.shape):
        raise WetpathError(f"clusters has shape {tuple(np.shape(clusters))} but labels "
                           f"{tuple(lab.shape)}", step=_STEP)
    band = (2.5 * sigma, 9.0) if band is None else band
    contact = functools.partial(box_contact_angles, sigma=sigma, spacing=spacing,
                                fit_radius=fit_radius, band=band)
    # a point's fit reaches ``fit_radius`` beyond it; an owned point lies inside the core when the
    # chunk borders fall on cell borders (integer spacing), else up to ``spacing`` past it
    align = int(spacing) if float(spacing).is_integer() and spacing >= 1 else 1
    acc, ncl, levels = mesh_sums(lab, clusters=clusters, sigma=sigma, chunks=chunks,
                                 threads=resolve_threads(threads), contact=contact,
                                 reach=fit_radius + 1 + (0 if align > 1 else spacing),
                                 context=band[0] + _plane_radius(sigma) + 3, align=align,
                                 boxes=boxes, max_box=max_box)
    if ncl == 0:
        return (pd.DataFrame({c: pd.Series(dtype=float) for c in MESH_COLUMNS}),
                pd.DataFrame({c: pd.Series(dtype=float) for c in _COLUMNS}))
    table = finish_mesh(acc, ncl, levels, sigma, float(voxel_size))
    frames = [_cluster_table(_cluster_points(acc.get(k, [])), k, voxel_size, min_interface_vox2)
              for k in range(1, ncl + 1) if k in acc]
    small = [bool(f["flag_small_interface"].iloc[0]) for f in frames]
    if any(small):
        warnings.warn(f"{sum(small)} cluster(s) have an n–w interface below "
                      f"{min_interface_vox2:g} voxel²; their geometric angles are unreliable "
                      "(Khanamiri et al. 2020)", stacklevel=3)
    if not frames:
        return table, pd.DataFrame({c: pd.Series(dtype=float) for c in _COLUMNS})
    return table, pd.concat(frames, ignore_index=True)[_COLUMNS]


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
