"""Topological (Gauss–Bonnet) contact angle per non-wetting cluster and per state.

For an n cluster that does not touch the border, its closed boundary is the n–w patch and the
n–s patch glued along the contact loops, and Gauss–Bonnet gives (METHODS.md §2)

    4π χ_n = ∫_nw K dA + ∫_ns K dA + ∫_L κ_d ds.

On a solid that is flat on average each loop contributes 2π(1 − cos θ_w), so

    cos θ_w = 1 − (4π χ_n − ∫_nw K dA) / (2π N_loops)        (flat form; Sun et al. 2020),

pooled over clusters by summing numerator and loops (Blunt, Akai & Bijeljic 2020). The curvature-
corrected form (METHODS.md §2, derived there) uses T = 2πχ(S_nw) − ∫_nw K, G = 2πχ(S_ns) − ∫_ns K
= ∫_L k_g^s ds and N = ∫_L k_n^s ds and solves G cos θ_n + N sin θ_n = T; when both roots lie in
[0, π] (e.g. in a tube, G = 0, where 40° and 140° give the same Gauss–Bonnet sums) the root whose
cos θ_w is nearest the coarse band estimate −⟨ν_nw · ν_s⟩ is taken.

References
----------
Sun, C., McClure, J. E., Mostaghimi, P., Herring, A. L., Berg, S. & Armstrong, R. T. (2020).
Probing effective wetting in subsurface systems. *Geophys. Res. Lett.* 47, e2019GL086151.
Sun, C., McClure, J. E., et al. (2020). Linking continuum-scale state of wetting to pore-scale
contact angles in porous media. *J. Colloid Interface Sci.* 578, 106–115.
Blunt, M. J., Akai, T. & Bijeljic, B. (2020). Thermodynamically consistent contact angles in porous
media: a Gauss–Bonnet approach. *J. Colloid Interface Sci.* 576, 99–108.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np
import pandas as pd
from scipy import ndimage

from ._codes import EXCLUDED, NONWETTING, PhaseCodes, to_canonical
from ._mesh import mesh_measures

BOOTSTRAP_SAMPLES = 2000


def _flat_cos(deficit, loops):
    """cos θ_w = 1 − D / (2π N) (Sun et al. 2020; Blunt, Akai & Bijeljic 2020)."""
    return 1.0 - deficit / (2.0 * math.pi * loops)


def _deg(cos_value):
    return float(np.degrees(np.arccos(np.clip(cos_value, -1.0, 1.0))))


def corrected_angle(t: float, g: float, n: float, cos_hint: float) -> float:
    """θ_w (degrees) from G cos θ_n + N sin θ_n = T (METHODS.md §2); ``cos_hint`` (a coarse
    cos θ_w) chooses between two admissible roots. NaN if G = N = 0 or inputs are not finite."""
    if not all(np.isfinite([t, g, n])):
        return float("nan")
    r = math.hypot(g, n)
    if r < 1e-9:
        return float("nan")
    phi = math.atan2(n, g)
    half = math.acos(max(-1.0, min(1.0, t / r)))
    roots = []
    for tn in (phi + half, phi - half):
        tn = (tn + math.pi) % (2 * math.pi) - math.pi       # to (−π, π]
        if -1e-9 <= tn <= math.pi + 1e-9:
            roots.append(min(max(tn, 0.0), math.pi))
    if not roots:   # no exact root in [0, π]: take the nearest end
        roots = [0.0 if abs(phi) > abs(phi - math.pi) else math.pi]
    if len(roots) > 1 and np.isfinite(cos_hint):
        roots.sort(key=lambda tn: abs(-math.cos(tn) - cos_hint))
    return math.degrees(math.pi - roots[0])


def _touching_border(labels: np.ndarray, clusters: np.ndarray) -> np.ndarray:
    """Boolean per cluster id (index 0 unused): touches the array border or an excluded voxel."""
    n = int(clusters.max())
    touch = np.zeros(n + 1, bool)
    for ax in range(3):
        for idx in (0, -1):
            face = np.take(clusters, idx, axis=ax)
            touch[np.unique(face)] = True
    excl = labels == EXCLUDED
    if excl.any():
        near = ndimage.binary_dilation(excl, np.ones((3, 3, 3), bool))
        touch[np.unique(clusters[near])] = True
    touch[0] = False
    return touch


def topological_angle(labels: np.ndarray, voxel_size: float = 1.0, *,
                      codes: PhaseCodes | Mapping | None = None,
                      clusters: np.ndarray | None = None, sigma: float = 1.0,
                      chunks: int | tuple | None = None, threads: int | None = None) -> dict:
    """Gauss–Bonnet contact angle of a three-phase state, pooled and per cluster.

    Parameters
    ----------
    labels : ndarray of int, shape (z, y, x)
        Phase labels (mapped to canonical codes by ``codes``).
    voxel_size : float
        Voxel edge length (the angle is dimensionless; passed to the mesh measures).
    codes : PhaseCodes or mapping, optional
        Label values of the phases.
    clusters : ndarray of int, optional
        n-cluster ids (0 elsewhere); default 26-connected labelling of the n phase.
    sigma : float
        Blur of the cluster indicator before meshing, voxels.
    chunks, threads
        Passed to ``mesh_measures``.

    Returns
    -------
    dict
        ``theta_topo_deg`` (pooled flat form, θ through w, degrees), ``theta_topo_median_deg``,
        ``theta_topo_lo_deg`` / ``theta_topo_hi_deg`` (95 % bootstrap over clusters),
        ``theta_topo_corrected_deg`` (pooled curvature-corrected form), ``clusters_used``,
        ``flag`` (``"ok"``, ``"no_nonwetting_phase"``, ``"no_usable_cluster"`` or
        ``"unresolved"``: why the angles are NaN) and ``clusters``: DataFrame per cluster with
        ``touches_border, resolved, used, euler_n, gauss_nw, contact_loops, deficit,
        theta_topo_deg, theta_topo_corrected_deg`` and the mesh measures.

    References
    ----------
    Sun et al. (2020), Geophys. Res. Lett. 47, e2019GL086151; Blunt, Akai & Bijeljic (2020),
    J. Colloid Interface Sci. 576, 99–108.
    """
    lab = to_canonical(labels, codes, step="topological angle")
    if clusters is None:
        clusters, _ = ndimage.label(lab == NONWETTING, np.ones((3, 3, 3), bool))
    if int(clusters.max()) == 0:
        return topological_from_clusters(pd.DataFrame())
    table = mesh_measures(lab, voxel_size, clusters=clusters, sigma=sigma, chunks=chunks,
                          threads=threads)
    table["touches_border"] = _touching_border(lab, clusters)[table["cluster"].to_numpy()]
    return topological_from_clusters(table)


def topological_from_clusters(table: pd.DataFrame) -> dict:
    """Topological angle of a state from its per-cluster measures (no image needed).

    Parameters
    ----------
    table : DataFrame
        One row per n cluster with the mesh measures of :func:`wetpath._mesh.mesh_measures`
        (``gauss_nw, contact_loops, euler_n_mesh, euler_nw_patch, geodesic_solid_line,
        normal_curv_solid_line, cos_band_nw, resolved, max_wall_distance``) and
        ``touches_border``. ``euler_n`` is used where ``euler_n_mesh`` is absent.

    Returns
    -------
    dict
        As :func:`topological_angle`.
    """
    nan = float("nan")
    out = {"theta_topo_deg": nan, "theta_topo_median_deg": nan, "theta_topo_lo_deg": nan,
           "theta_topo_hi_deg": nan, "theta_topo_corrected_deg": nan, "clusters_used": 0,
           "flag": "ok", "clusters": pd.DataFrame()}
    if len(table) == 0:
        out["flag"] = "no_nonwetting_phase"
        return out
    table = table.copy()
    table["touches_border"] = table["touches_border"].astype(bool)
    table["resolved"] = table["resolved"].astype(bool)
    if "euler_n_mesh" in table:
        table["euler_n"] = table["euler_n_mesh"]
    table["deficit"] = 4 * np.pi * table["euler_n"] - table["gauss_nw"]
    loops = table["contact_loops"].to_numpy()
    with np.errstate(divide="ignore", invalid="ignore"):
        cos_c = np.where(loops > 0, _flat_cos(table["deficit"].to_numpy(), loops), np.nan)
    table["theta_topo_deg"] = np.degrees(np.arccos(np.clip(cos_c, -1, 1)))
    t_c = 2 * np.pi * table["euler_nw_patch"] - table["gauss_nw"]
    table["theta_topo_corrected_deg"] = [
        corrected_angle(t, g, n, c) if lp > 0 else nan
        for t, g, n, c, lp in zip(t_c, table["geodesic_solid_line"],
                                  table["normal_curv_solid_line"], table["cos_band_nw"], loops,
                                  strict=True)]
    candidate = (~table["touches_border"]) & (table["contact_loops"] > 0)
    used = candidate & table["resolved"] & np.isfinite(table["deficit"])
    table["used"] = used
    out["clusters"] = table
    if not used.any():
        out["flag"] = "no_usable_cluster"
        # clusters that would count but cannot be band-extrapolated
        interior = (~table["touches_border"]) & (table["max_wall_distance"] > 0)
        if (interior & ~table["resolved"]).any():
            out["flag"] = "unresolved"
        return out
    u = table[used]
    d, lp = u["deficit"].to_numpy(), u["contact_loops"].to_numpy().astype(float)
    out["clusters_used"] = int(len(u))
    out["theta_topo_deg"] = _deg(_flat_cos(d.sum(), lp.sum()))
    out["theta_topo_median_deg"] = float(np.median(u["theta_topo_deg"]))
    rng = np.random.default_rng(0)
    idx = rng.integers(0, len(u), size=(BOOTSTRAP_SAMPLES, len(u)))
    boot = np.degrees(np.arccos(np.clip(_flat_cos(d[idx].sum(1), lp[idx].sum(1)), -1, 1)))
    out["theta_topo_lo_deg"], out["theta_topo_hi_deg"] = (float(x) for x in
                                                          np.percentile(boot, [2.5, 97.5]))
    t = 2 * np.pi * u["euler_nw_patch"].sum() - u["gauss_nw"].sum()
    hint = float(np.average(u["cos_band_nw"], weights=lp)) if np.all(
        np.isfinite(u["cos_band_nw"])) else nan
    out["theta_topo_corrected_deg"] = corrected_angle(
        float(t), float(u["geodesic_solid_line"].sum()), float(u["normal_curv_solid_line"].sum()),
        hint)
    return out
