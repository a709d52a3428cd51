"""Closed-form test geometries, voxelised the way a segmentation labels voxels: by their centres.

Every generator returns a canonical ``uint8`` label volume (0 excluded, 1 solid, 2 wetting,
3 non-wetting), shape (z, y, x), lengths in voxels. ``offset`` (or ``seed``) shifts the shape by a
sub-voxel amount so that tests measure the estimator, not one lucky alignment with the grid.
The matching ``*_exact`` functions give the closed-form values the tests check against.

References
----------
Closed forms of sphere, spherical cap, torus, cylinder and capillary meniscus: any geometry handbook,
e.g. Bronshtein et al., *Handbook of Mathematics* (2015), §3.3; meniscus in a tube: Young–Laplace with
the spherical-cap meniscus of radius r/|cos θ| (de Gennes, Brochard-Wyart & Quéré 2004, *Capillarity and
Wetting Phenomena*, ch. 1).
"""

from __future__ import annotations

import math

import numpy as np

from ._codes import NONWETTING, SOLID, WETTING

__all__ = [
    "ball", "ball_exact", "shell", "torus", "cylinder", "cap_on_plate", "cap_exact",
    "tube_meniscus", "tube_slug", "meniscus_exact", "tube_bundle_exact", "random_medium", "unit",
]


def unit(v) -> np.ndarray:
    """Normalise a 3-vector (z, y, x)."""
    v = np.asarray(v, dtype=float)
    return v / np.linalg.norm(v)


def _offset(offset, seed) -> np.ndarray:
    if offset is not None:
        return np.asarray(offset, dtype=float)
    if seed is None:
        return np.zeros(3)
    return np.random.default_rng(seed).uniform(-0.5, 0.5, 3)


def _centred_grid(shape, offset):
    """Voxel-centre coordinates relative to the box centre shifted by ``offset`` (voxels)."""
    c = (np.asarray(shape, dtype=float) - 1) / 2 + offset
    z, y, x = (np.arange(n, dtype=np.float64) - ci for n, ci in zip(shape, c, strict=True))
    return z[:, None, None], y[None, :, None], x[None, None, :]


def _cube(half: float) -> tuple[int, int, int]:
    n = int(math.ceil(2 * half)) + 1
    return (n, n, n)


def ball(radius: float, *, pad: int = 3, offset=None, seed=None) -> np.ndarray:
    """A non-wetting ball of ``radius`` voxels in the wetting phase (no solid)."""
    z, y, x = _centred_grid(_cube(radius + pad), _offset(offset, seed))
    out = np.full(np.broadcast_shapes(z.shape, y.shape, x.shape), WETTING, np.uint8)
    out[z * z + y * y + x * x < radius * radius] = NONWETTING
    return out


def ball_exact(radius: float) -> dict[str, float]:
    """Ball of radius R: volume, area, total curvature κ = 2/R, ∫K dA = 4π, χ = 1."""
    return {"volume": 4 / 3 * math.pi * radius**3, "area": 4 * math.pi * radius**2,
            "curvature": 2 / radius, "gauss": 4 * math.pi, "euler": 1}


def shell(r_inner: float, r_outer: float, *, pad: int = 3, offset=None, seed=None) -> np.ndarray:
    """A hollow non-wetting spherical shell (χ = 2) with wetting fluid inside and outside."""
    z, y, x = _centred_grid(_cube(r_outer + pad), _offset(offset, seed))
    r2 = z * z + y * y + x * x
    out = np.full(r2.shape, WETTING, np.uint8)
    out[(r2 < r_outer**2) & (r2 >= r_inner**2)] = NONWETTING
    return out


def torus(major: float, minor: float, *, axis=(1, 0, 0), pad: int = 3, offset=None,
          seed=None) -> np.ndarray:
    """A solid non-wetting torus (χ = 0) of ring radius ``major`` and tube radius ``minor``."""
    z, y, x = _centred_grid(_cube(major + minor + pad), _offset(offset, seed))
    a = unit(axis)
    h = a[0] * z + a[1] * y + a[2] * x
    rho = np.sqrt(np.maximum(z * z + y * y + x * x - h * h, 0))
    out = np.full(rho.shape, WETTING, np.uint8)
    out[(rho - major) ** 2 + h * h < minor**2] = NONWETTING
    return out


def cylinder(radius: float, length: float, *, axis=(1, 0, 0), pad: int = 3, offset=None,
             seed=None) -> np.ndarray:
    """A closed non-wetting cylinder segment (flat ends) in the wetting phase.

    Exact: V = π r² L, lateral area 2π r L, end caps 2π r², χ = 1.
    """
    z, y, x = _centred_grid(_cube(math.hypot(radius, length / 2) + pad), _offset(offset, seed))
    a = unit(axis)
    h = a[0] * z + a[1] * y + a[2] * x
    rho2 = z * z + y * y + x * x - h * h
    out = np.full(rho2.shape, WETTING, np.uint8)
    out[(rho2 < radius**2) & (np.abs(h) < length / 2)] = NONWETTING
    return out


def cap_on_plate(radius: float, theta_w_deg: float, *, normal=(1, 0, 0), pad: int = 4,
                 offset=None, seed=None) -> np.ndarray:
    """A non-wetting spherical cap on a flat solid plate, contact angle ``theta_w_deg`` through w.

    The sphere (radius ``radius``) has its centre at height R cos θ_w above the plate, so that it
    meets the plate at θ_w measured through the wetting phase. The plate is the half-space below the
    plane through the box, with unit ``normal`` (z, y, x) pointing from solid into pore; it may be
    tilted. The box is a cube centred on the sphere centre.
    """
    theta = math.radians(theta_w_deg)
    n = unit(normal)
    off = _offset(offset, seed)
    axis = np.flatnonzero(np.abs(n) > 1 - 1e-12)
    if axis.size:
        # An axis-aligned plate labelled by voxel centres sits on a voxel face: put the exact plane
        # there (half-integer height), so the closed form describes the voxelised body.
        k = int(axis[0])
        plane = off[k] - n[k] * radius * math.cos(theta)
        off[k] += (math.floor(plane) + 0.5) - plane
    z, y, x = _centred_grid(_cube(radius + pad), off)
    # height above the plate; the sphere centre (grid origin) is at height R cos θ_w
    h = n[0] * z + n[1] * y + n[2] * x + radius * math.cos(theta)
    r2 = z * z + y * y + x * x
    out = np.full(np.broadcast_shapes(h.shape, r2.shape), WETTING, np.uint8)
    out[h < 0] = SOLID
    out[(h >= 0) & (r2 < radius**2)] = NONWETTING
    return out


def cap_exact(radius: float, theta_w_deg: float) -> dict[str, float]:
    """Closed forms of a spherical cap of n on a plate (METHODS.md §5).

    A_nw = 2πR²(1 − cos θ_n), base radius r = R sin θ_n, A_ns = π r², V_n = (π/3)R³(2 + cos θ_n)
    (1 − cos θ_n)², ∫_nw K dA = 2π(1 + cos θ_w), contact length 2π r, one loop, κ = 2/R.
    """
    tw = math.radians(theta_w_deg)
    tn = math.pi - tw
    r = radius * math.sin(tn)
    return {
        "area_nw": 2 * math.pi * radius**2 * (1 - math.cos(tn)),
        "area_ns": math.pi * r * r,
        "volume_n": math.pi / 3 * radius**3 * (2 + math.cos(tn)) * (1 - math.cos(tn)) ** 2,
        "gauss_nw": 2 * math.pi * (1 + math.cos(tw)),
        "contact_length": 2 * math.pi * r,
        "contact_loops": 1,
        "curvature_nw": 2 / radius,
        "base_radius": r,
    }


def _tube_frame(shape, axis, offset):
    z, y, x = _centred_grid(shape, offset)
    a = unit(axis)
    t = a[0] * z + a[1] * y + a[2] * x
    rho = np.sqrt(np.maximum(z * z + y * y + x * x - t * t, 0))
    return t, rho


def _meniscus_offset(rho, radius, theta_w_deg):
    """Axial set-back of a spherical meniscus at radial distance ρ from its apex (toward n when
    θ_w < 90°, so that the interface is convex toward w)."""
    c = math.cos(math.radians(theta_w_deg))
    if abs(c) < 1e-12:
        return np.zeros_like(rho)
    big = radius / abs(c)
    sag = big - np.sqrt(np.maximum(big * big - np.minimum(rho, radius) ** 2, 0))
    return math.copysign(1.0, c) * sag


def tube_meniscus(radius: float, theta_w_deg: float, apex: float, *, shape=None, axis=(1, 0, 0),
                  wall: int = 3, offset=None, seed=None) -> np.ndarray:
    """A cylindrical capillary (solid outside radius ``radius``) holding n below and w above a
    spherical meniscus.

    The axial coordinate t runs along ``axis`` from the box centre; n fills t < apex − sag(ρ), w the
    rest of the tube. Moving ``apex`` by +d is drainage (n advances, ΔV_w = −π r² d, ΔA_ws =
    −2π r d, ΔA_nw = 0), so the energy balance returns θ_w exactly (Blunt et al. 2019).
    Default ``shape`` is (4r, 2r + 2 wall + 2, same) with the axis along z.
    """
    if shape is None:
        side = int(math.ceil(2 * radius)) + 2 * wall + 2
        shape = (int(math.ceil(4 * radius)), side, side)
    t, rho = _tube_frame(shape, axis, _offset(offset, seed))
    out = np.full(np.broadcast_shapes(t.shape, rho.shape), SOLID, np.uint8)
    inside = rho < radius
    out[inside] = WETTING
    out[inside & (t < apex - _meniscus_offset(rho, radius, theta_w_deg))] = NONWETTING
    return out


def tube_slug(radius: float, theta_w_deg: float, length: float, *, shape=None, axis=(1, 0, 0),
              wall: int = 3, offset=None, seed=None) -> np.ndarray:
    """A closed n slug in a cylindrical capillary, bounded by two menisci at contact angle θ_w whose
    apices are ``length`` apart (centred on the box). A curved-solid case for the topological angle."""
    if shape is None:
        side = int(math.ceil(2 * radius)) + 2 * wall + 2
        shape = (int(math.ceil(length + 4 * radius)), side, side)
    t, rho = _tube_frame(shape, axis, _offset(offset, seed))
    out = np.full(np.broadcast_shapes(t.shape, rho.shape), SOLID, np.uint8)
    inside = rho < radius
    out[inside] = WETTING
    sag = _meniscus_offset(rho, radius, theta_w_deg)
    out[inside & (np.abs(t) < length / 2 - sag)] = NONWETTING
    return out


def meniscus_exact(radius: float, theta_w_deg: float) -> dict[str, float]:
    """Meniscus in a tube of radius r: κ = 2 cos θ_w / r; cap area 2π R_m² (1 − sin θ_w) with
    R_m = r/|cos θ_w| (π r² at 90°)."""
    c = math.cos(math.radians(theta_w_deg))
    if abs(c) < 1e-12:
        area = math.pi * radius**2
    else:
        big = radius / abs(c)
        area = 2 * math.pi * big * big * (1 - math.sin(math.radians(theta_w_deg)))
    return {"curvature_nw": 2 * c / radius, "area_nw": area, "contact_length": 2 * math.pi * radius}


def random_medium(shape, *, porosity: float = 0.35, saturation_w: float = 0.5,
                  grain_scale: float = 3.0, fluid_scale: float = 4.0, seed: int = 0,
                  cylinder_fov: bool = False) -> np.ndarray:
    """A random three-phase medium: thresholded Gaussian random fields for solid and fluids.

    Invented test data for invariance tests (chunking, flips, fast vs reference path), not a model of
    any real rock. ``cylinder_fov`` marks voxels outside an inscribed cylinder (axis z) as excluded.
    """
    from scipy import ndimage

    rng = np.random.default_rng(seed)
    g = ndimage.gaussian_filter(rng.standard_normal(shape), grain_scale)
    f = ndimage.gaussian_filter(rng.standard_normal(shape), fluid_scale)
    solid = g > np.quantile(g, porosity)
    out = np.full(shape, WETTING, np.uint8)
    pore_f = f[~solid]
    out[(f > np.quantile(pore_f, saturation_w)) & ~solid] = NONWETTING
    out[solid] = SOLID
    if cylinder_fov:
        _, y, x = _centred_grid(shape, np.zeros(3))
        r = (min(shape[1], shape[2]) - 1) / 2
        out[:, (y[0] ** 2 + x[0] ** 2) > r * r] = 0
    return out


def tube_bundle_exact(radii, heights, theta_w_deg: float, length: float,
                      bulk_volume: float) -> dict[str, float]:
    """Closed-form state of a bundle of parallel capillary tubes, n below and w above a meniscus.

    Tube i (radius r_i, length ``length``) holds n from its inlet up to its contact line at height
    h_i and a spherical-cap meniscus of radius R_i = r_i/|cos θ_w| meeting the wall at θ_w (through
    w), whose apex lies sag_i = R_i (1 − sin θ_w) beyond the contact line toward w when θ_w < 90°.
    Solid and the space between tubes fill the rest of ``bulk_volume``. Moving every contact line
    by the same distance d keeps A_nw fixed and changes V_w by −π d Σr², A_ws by −2π d Σr, so the
    energy balance with the area-weighted mean κ returns θ_w exactly (Blunt et al. 2019).

    Returns volumes, areas (``area_nw``, ``area_ws``, ``area_ns``), specific areas ``a_*`` (per
    unit length), porosity, ``saturation_w``, ``curvature_nw`` (area-weighted mean of
    2 cos θ_w/r_i), ``euler_n`` (one n column per tube), ``contact_loops`` and ``contact_length``.
    """
    r = np.asarray(radii, dtype=float)
    h = np.asarray(heights, dtype=float)
    c = math.cos(math.radians(theta_w_deg))
    if abs(c) > 1e-12:
        big = r / abs(c)
        sag = big * (1 - math.sin(math.radians(theta_w_deg)))
        cap_volume = math.pi * sag**2 * (3 * big - sag) / 3
    else:  # flat meniscus
        sag = cap_volume = np.zeros_like(r)
    ahead, behind = (sag, 0.0) if c > 0 else (0.0, sag)  # the cap bulges into w when c > 0
    if np.any(h - behind < 0) or np.any(h + ahead > length):
        raise ValueError("a meniscus lies outside its tube")
    volume_n = float(np.sum(math.pi * r**2 * h + math.copysign(1.0, c) * cap_volume))
    pore = float(np.sum(math.pi * r**2 * length))
    menisci = [meniscus_exact(ri, theta_w_deg) for ri in r]
    a_nw = np.array([m["area_nw"] for m in menisci])
    kappa = np.array([m["curvature_nw"] for m in menisci])
    out = {
        "bulk_volume": float(bulk_volume), "pore_volume": pore, "volume_n": volume_n,
        "volume_w": pore - volume_n, "porosity": pore / bulk_volume,
        "saturation_w": (pore - volume_n) / pore,
        "area_nw": float(a_nw.sum()), "area_ws": float(np.sum(2 * math.pi * r * (length - h))),
        "area_ns": float(np.sum(2 * math.pi * r * h)),
        "curvature_nw": float(np.sum(kappa * a_nw) / a_nw.sum()),
        "euler_n": int(r.size), "contact_loops": int(r.size),
        "contact_length": float(np.sum(2 * math.pi * r)),
    }
    for pair in ("nw", "ws", "ns"):
        out[f"a_{pair}"] = out[f"area_{pair}"] / bulk_volume
    return out
