"""The embedded demo series: an invented, fully synthetic drainage–imbibition experiment.

Scenario (invented and synthetic: no real sample, fluid, laboratory or measurement is behind it):
a plug of *Hollin Brae sandstone*, a fine-grained quartz arenite from an imaginary quarry, is
scanned in a flow cell at the imaginary *Carrow Pore Imaging Laboratory*. Saturated with *KB-4
brine* (made up; doped with potassium iodide for X-ray contrast; the wetting phase), it is drained
by *Lumen-12* (a made-up refined model oil, the non-wetting phase) injected at the bottom face
(z = 0) while brine leaves through a water-wet plate at the top face. The pressure is then
reversed: brine comes back through the top and the oil retreats through the bottom (imbibition),
leaving trapped ganglia. A cylindrical field of view (axis z) is scanned every few minutes.

How the data are made (all computed here, from a seed):

* **Rock**: coarse ellipsoidal grains (log-normal equivalent radii clipped to 16–30 voxels, axis
  ratios 0.8–1, random orientations) placed by random sequential addition with centres at least
  ``_GRAIN_GAP (r_i + r_j)`` apart (overlapping, sutured contacts) until the porosity is
  ``_LOOSE_POROSITY``; then cement fills the pore voxels with the most grain around them (contacts
  and crevices first) until the porosity is ``_POROSITY``. Little cement is added, so throats
  stay wide.
* **Primary drainage**: pore-morphology invasion (Hilpert & Miller 2001) with a contact angle
  (full-morphology rule, Schulz et al. 2007): at capillary radius R, oil fills the balls of radius R
  whose centres lie at least R cos θ_r from the solid and are connected to the inlet face. A ball
  whose centre is R cos θ from a flat wall meets it at θ through the brine, and its free surface has
  total curvature κ = 2/R, so the design capillary pressure is P_c = 2σ/R. R falls step by step; oil
  never recedes; brine that loses its connection to the outlet face is trapped and stays.
  Drainage stops at ``_SW_END_DRAINAGE`` or at the radius ``_R_MIN``, whichever comes first.
* **Imbibition**: the same rule with the advancing angle θ_a and rising R; oil can only recede,
  and oil cut off from the inlet face (where it leaves) by brine filling a throat is trapped and
  kept as it was: snap-off-like break-up into disconnected ganglia.
* The process runs on a fine ladder of radii; where one radius opens a large region (a Haines-type
  jump) the region is filled in its order of arrival, as a rate-controlled pump fills it. The scans
  are snapshots of this path at roughly even saturation steps, so that invading fingers coalesce
  and the oil breaks up *between* scans.
* **Grayscale variant**: a dry reference scan (grain vs air) and one wet scan per step with three
  grey levels (grain brightest, then brine, then oil), point-spread blur, signal-dependent
  (Poisson-like) plus Gaussian noise, a ±1 % beam-intensity drift and a small rigid sub-voxel
  translation of the sample between scans. The labels are in the frame of the dry scan.

**Resolution.** The pore space is resolved the way the estimators need it: grains span 30–60
voxels and the capillary radius never falls below ``_R_MIN`` = 6.5 voxels, so menisci rise well
above the 4-voxel band next to the solid where the mesh curvature is not read (measured on the
default series, seed 2026, size 144: drainage entry radius 8.9 voxels, drainage ends at R = 7.4,
n–w interfaces rise 7–12 voxels above the solid, trapped ganglia 12). Finer pores (radii of 2–4
voxels, as in a coarse scan of a fine rock) put every meniscus within ~2.5 voxels of the grains
and leave curvature and contact angles undefined.

The rock and fluids are simulated in the whole cubic box; the field of view is the inscribed
cylinder, so clusters leave and enter it as a real scan would show them. Everything is
deterministic by seed: the same seed and size give byte-identical files.

References
----------
Hilpert, M. & Miller, C. T. (2001). Pore-morphology-based simulation of drainage in totally
wetting porous media. *Advances in Water Resources* 24, 243–255.
Schulz, V. P., Becker, J., Wiegmann, A., Mukherjee, P. P. & Wang, C.-Y. (2007). Modeling of
two-phase behavior in the gas diffusion medium of PEFCs via full morphology approach. *Journal of
the Electrochemical Society* 154(4), B419–B426.
"""

from __future__ import annotations

import json
import math
import os
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import ndimage

from ._codes import EXCLUDED, NONWETTING, SOLID, WETTING
from ._errors import WetpathError

__all__ = ["DemoSeries", "demo_series", "write_demo_series"]

SCENARIO_TEXT = (
    "Synthetic demo, invented scenario: a plug of Hollin Brae sandstone (an imaginary "
    "fine-grained quartz arenite) in the flow cell of the imaginary Carrow Pore Imaging "
    "Laboratory. Saturated with KB-4 brine (made-up, KI-doped, wetting), it is drained by Lumen-12 "
    "model oil (made-up, non-wetting) injected at the bottom face (z = 0), brine leaving at the "
    "top; the pressure is then reversed and brine imbibes from the top while the oil retreats "
    "through the bottom, leaving trapped ganglia. All images are computed by wetpath's demo "
    "generator; no real sample or measurement is behind them."
)

VOXEL_SIZE_UM = 4.0  # as in config/config.yaml (series voxel_size_um)
DEFAULT_SIZE = 144  # voxels: the field of view then holds ~35 coarse grains
INTERFACIAL_TENSION_N_PER_M = 0.036  # invented brine/oil value, of the usual order for such pairs
THETA_RECEDING_DEG = 35.0  # contact angle (through brine) built into the drainage rule
THETA_ADVANCING_DEG = 60.0  # contact angle (through brine) built into the imbibition rule
N_DRAINAGE_SCANS = 7  # after the brine-saturated scan step_000
N_IMBIBITION_SCANS = 6

_POROSITY = 0.35
_GRAIN_RADIUS_MEDIAN = 22.0  # voxels (equivalent-sphere radius)
_GRAIN_RADIUS_RANGE = (16.0, 30.0)
_GRAIN_GAP = 0.8  # centres at least 0.8 (r_i + r_j) apart: grains overlap (sutured contacts)
_LOOSE_POROSITY = 0.38  # porosity of the grain framework before cementation
_CEMENT_SIGMA = 3.0  # voxels, neighbourhood that decides where cement grows
_DRAINAGE_STEP = 0.5  # voxels between successive capillary radii of the quasi-static drainage
_IMBIBITION_STEP = 1.0  # voxels between successive capillary radii of imbibition
_MAX_DSW = 0.05  # largest saturation change between successive states of the fine path
_R_MIN = 6.5  # voxels, smallest capillary radius of drainage (module notes: resolution)
_SW_END_DRAINAGE = 0.3  # drainage stops at this brine saturation (field of view)
_STRUCT26 = np.ones((3, 3, 3), dtype=bool)

# grey levels (uint16 counts) of the invented scanner: dry pore (air), grain, brine, oil; the grain
# is the brightest phase in the dry and the wet scans alike, so that they can be registered
_GREY = {"air": 7000.0, "grain": 32000.0, "brine": 22000.0, "oil": 12000.0}
_BLUR_SIGMA = 0.5  # voxels, point-spread function
_NOISE_GAIN = 60.0  # variance per count (Poisson-like part)
_NOISE_FLOOR = 600.0  # counts, Gaussian read-out part
_MAX_SHIFT = 2.5  # voxels, largest rigid translation of a wet scan from the dry frame


@dataclass
class DemoSeries:
    """A demo series held in memory.

    Attributes
    ----------
    labels : list of ndarray of uint8
        One canonical label volume per step, shape (z, y, x): 0 outside the cylindrical field
        of view, 1 solid, 2 brine (wetting), 3 oil (non-wetting).
    times_s : ndarray of float
        Scan times in seconds from the first scan.
    kinds : list of str
        ``"drainage"`` or ``"imbibition"``: the branch each step belongs to (step_000, the
        brine-saturated start, opens the drainage branch).
    capillary_radius_vox : list of float or None
        Capillary radius R (voxels) of the invasion rule at each scan (None for step_000).
    solid : ndarray of bool
        The rock over the whole simulated box (no field-of-view mask).
    fov : ndarray of bool
        The cylindrical field of view.
    phases_box : list of ndarray of uint8
        Phases over the whole box (1 solid, 2 brine, 3 oil), used for the grayscale scans.
    """

    labels: list[np.ndarray]
    times_s: np.ndarray
    kinds: list[str]
    capillary_radius_vox: list[float | None]
    solid: np.ndarray
    fov: np.ndarray
    phases_box: list[np.ndarray] = field(repr=False)


def cylinder_fov(shape: tuple[int, int, int]) -> np.ndarray:
    """Boolean mask of the cylinder (axis z) inscribed in a box of ``shape`` (z, y, x)."""
    _, ny, nx = shape
    y = np.arange(ny) - (ny - 1) / 2
    x = np.arange(nx) - (nx - 1) / 2
    r = (min(ny, nx) - 1) / 2
    disc = y[:, None] ** 2 + x[None, :] ** 2 <= r * r
    return np.broadcast_to(disc, shape).copy()


def _random_rotation(rng: np.random.Generator) -> np.ndarray:
    q, r = np.linalg.qr(rng.standard_normal((3, 3)))
    return q * np.sign(np.diag(r))


def _render_ellipsoid(solid: np.ndarray, c: np.ndarray, r: float,
                      rng: np.random.Generator) -> None:
    """Add a randomly oriented ellipsoid of equivalent radius ``r`` at ``c`` to ``solid``."""
    axes = np.array([1.0, rng.uniform(0.8, 1.0), rng.uniform(0.8, 1.0)])
    axes *= r / np.cbrt(axes.prod())
    rot = _random_rotation(rng)
    half = int(math.ceil(axes.max())) + 1
    lo = np.maximum(np.floor(c).astype(int) - half, 0)
    hi = np.minimum(np.floor(c).astype(int) + half + 1, solid.shape)
    if np.any(hi <= lo):
        return
    grid = np.stack(np.meshgrid(*(np.arange(a, b) - ci for a, b, ci in zip(lo, hi, c, strict=True)),
                                indexing="ij"), axis=-1)
    local = grid @ rot  # coordinates along the ellipsoid axes
    solid[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]] |= np.sum((local / axes) ** 2, axis=-1) < 1.0


def grain_pack(size: int, rng: np.random.Generator, *, porosity: float = _POROSITY) -> np.ndarray:
    """A cemented pack of overlapping ellipsoidal grains in a cube of ``size`` voxels.

    Grains are placed by random sequential addition, centres at least ``_GRAIN_GAP (r_i + r_j)``
    apart (log-normal equivalent radii clipped to 16–30 voxels), as randomly oriented ellipsoids
    (axis ratios 0.8–1), until the porosity falls to ``_LOOSE_POROSITY``; then cement fills the
    pore voxels with the largest share of grain in a Gaussian neighbourhood (grain contacts and
    crevices first) until the porosity of the box is ``porosity``.

    Parameters
    ----------
    size : int
        Edge of the cube in voxels.
    rng : numpy.random.Generator
        Source of every random choice.
    porosity : float
        Porosity of the cemented pack (fraction of the box).

    Returns
    -------
    ndarray of bool
        True for solid, shape (size, size, size).

    References
    ----------
    Random sequential addition: Widom, B. (1966). Random sequential addition of hard spheres to a
    volume. *Journal of Chemical Physics* 44, 3888–3894 (cited from memory).
    """
    lo_r, hi_r = _GRAIN_RADIUS_RANGE
    margin = hi_r
    span = size - 1 + 2 * margin
    cap = int(3 * (span**3) / (4 / 3 * math.pi * (_GRAIN_GAP * _GRAIN_RADIUS_MEDIAN) ** 3))
    centres = np.empty((cap, 3))
    radii = np.empty(cap)
    solid = np.zeros((size, size, size), dtype=bool)
    count, idle = 0, 0
    while idle < 8 and count < cap:
        # a batch of candidates, checked against the grains placed so far, then one by one
        rs = np.clip(_GRAIN_RADIUS_MEDIAN * np.exp(0.18 * rng.standard_normal(256)), lo_r, hi_r)
        cs = rng.uniform(-margin, size - 1 + margin, (256, 3))
        d2 = np.sum((cs[:, None, :] - centres[None, :count, :]) ** 2, axis=-1)
        ok = np.all(d2 >= (_GRAIN_GAP * (rs[:, None] + radii[None, :count])) ** 2, axis=1)
        first = count
        for c, r in zip(cs[ok], rs[ok], strict=True):
            if count > first and np.any(np.sum((centres[first:count] - c) ** 2, axis=1)
                                        < (_GRAIN_GAP * (radii[first:count] + r)) ** 2):
                continue
            centres[count], radii[count] = c, r
            count += 1
            _render_ellipsoid(solid, c, float(r), rng)
            if count % 16 == 0 and 1.0 - solid.mean() <= _LOOSE_POROSITY:
                idle = 8
                break
        idle = idle + 1 if count == first else idle
    loose = 1.0 - solid.mean()
    if loose > porosity:
        # cement: fill the pore voxels with the most grain around them (contacts and crevices first)
        near = ndimage.gaussian_filter(solid.astype(np.float32), _CEMENT_SIGMA)
        solid |= near > np.quantile(near[~solid], porosity / loose)
    return solid


def _touching(mask: np.ndarray, face: int) -> np.ndarray:
    """The 26-connected components of ``mask`` that touch the z face ``face`` (0 or -1)."""
    lab, n = ndimage.label(mask, _STRUCT26)
    keep = np.zeros(n + 1, dtype=bool)
    keep[np.unique(lab[face])] = True
    keep[0] = False
    return keep[lab]


def _balls(centres: np.ndarray, radius: float) -> np.ndarray:
    """Union of balls of ``radius`` (voxels) around the ``centres`` voxels."""
    out = np.zeros_like(centres)
    boxes = ndimage.find_objects(centres.view(np.uint8))
    if not boxes:
        return out
    pad = int(math.ceil(radius)) + 1
    box = tuple(slice(max(s.start - pad, 0), min(s.stop + pad, n))
                for s, n in zip(boxes[0], centres.shape, strict=True))
    out[box] = ndimage.distance_transform_edt(~centres[box]) < radius
    return out


def _arrival_order(target: np.ndarray, sources: np.ndarray) -> np.ndarray:
    """Flat indices of the ``target`` voxels not in ``sources``, in breadth-first order of arrival
    from ``sources`` through ``target`` (26-connected); every prefix is connected to the sources."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import breadth_first_order

    flat = np.flatnonzero(target)
    node = np.full(target.size, -1, dtype=np.int64)
    node[flat] = np.arange(flat.size)
    node = node.reshape(target.shape)
    rows, cols = [], []
    for dz, dy, dx in [(a, b, c) for a in (0, 1) for b in (-1, 0, 1) for c in (-1, 0, 1)
                       if (a, b, c) > (0, 0, 0)]:
        ny, nx = node.shape[1:]
        src = node[:node.shape[0] - dz, max(-dy, 0):ny - max(dy, 0), max(-dx, 0):nx - max(dx, 0)]
        dst = node[dz:, max(dy, 0):ny - max(-dy, 0), max(dx, 0):nx - max(-dx, 0)]
        both = (src >= 0) & (dst >= 0)
        rows.append(src[both])
        cols.append(dst[both])
    seeds = node[sources & target]
    root = flat.size  # a virtual node joined to every source voxel
    rows.append(np.full(seeds.size, root))
    cols.append(seeds)
    r, c = np.concatenate(rows), np.concatenate(cols)
    graph = coo_matrix((np.ones(r.size, dtype=np.int8), (r, c)), shape=(root + 1, root + 1)).tocsr()
    order = breadth_first_order(graph, root, directed=False, return_predecessors=False)
    order = order[order != root]
    order = order[~sources.ravel()[flat[order]]]
    return flat[order]


def _drainage(pore: np.ndarray, dist: np.ndarray, fov: np.ndarray, r_start: float,
              cos_theta: float) -> tuple[list[float], list[np.ndarray]]:
    """Primary drainage with trapping of brine (Hilpert & Miller 2001; contact angle as in Schulz
    et al. 2007).

    The capillary radius falls by ``_DRAINAGE_STEP`` from ``r_start`` until the brine saturation
    in the field of view ``fov`` is at most ``_SW_END_DRAINAGE`` or the radius would fall below
    ``_R_MIN``. Where one radius opens more pore
    space than ``_MAX_DSW`` of saturation (a Haines-type jump), the newly reachable ball centres
    are filled in their order of arrival from the oil already in place, as a rate-controlled pump
    would fill them; every front is still made of balls of radius R. Returns the radius and the
    oil (True) of every state that differs from the one before.
    """
    pore_fov = np.count_nonzero(pore & fov)
    inlet = np.zeros_like(pore)
    inlet[0] = True
    oil = np.zeros_like(pore)
    trapped_w = np.zeros_like(pore)
    reached = np.zeros_like(pore)  # ball centres already filled
    radii, states = [], []
    r = r_start
    while r >= _R_MIN:
        target = _touching((dist >= r * cos_theta) & ~trapped_w, 0)
        new = _balls(target & ~reached, r) & pore & ~trapped_w & ~oil
        gained = np.count_nonzero(new & fov)
        parts = math.ceil(gained / pore_fov / _MAX_DSW)
        fronts = []
        if parts > 1:
            sources = reached | (target & inlet)
            order = _arrival_order(target, sources)
            for k in range(1, parts):
                centres = sources.copy()
                centres.ravel()[order[: len(order) * k // parts]] = True
                fronts.append(centres)
        for centres in [*fronts, target]:
            oil |= new if not fronts else _balls(centres & ~reached, r) & pore & ~trapped_w
            brine = pore & ~oil
            trapped_w = brine & ~_touching(brine, -1)
            reached = centres
            if not states or np.count_nonzero(oil) > np.count_nonzero(states[-1]):
                radii.append(r)
                states.append(oil.copy())
        if 1.0 - np.count_nonzero(oil & fov) / pore_fov <= _SW_END_DRAINAGE:
            break
        r -= _DRAINAGE_STEP
    return radii, states


def _imbibition(dist: np.ndarray, fov: np.ndarray, oil: np.ndarray, r_start: float,
                cos_theta: float) -> tuple[list[float], list[np.ndarray]]:
    """Imbibition on a ladder of capillary radii rising from ``r_start`` until no connected oil is
    left: oil can only recede, and oil that loses its connection to the inlet face is trapped and
    kept as it was. The radius rises by ``_IMBIBITION_STEP``, or by a half, quarter or eighth of it
    where a full step would change the brine saturation in ``fov`` by more than ``_MAX_DSW``.
    Returns the radii and the oil after each."""
    pore_fov = np.count_nonzero(dist[fov] > 0)
    mobile = oil.copy()
    trapped = np.zeros_like(oil)
    radii, states = [], []
    r, step = r_start, _IMBIBITION_STEP
    while mobile.any():
        centres = (dist >= (r + step) * cos_theta) & mobile
        remaining = _balls(centres, r + step) & mobile
        receded = np.count_nonzero((mobile & ~remaining)[fov]) / pore_fov
        if receded > _MAX_DSW and step > _IMBIBITION_STEP / 8:
            step /= 2
            continue
        r += step
        step = _IMBIBITION_STEP
        connected = _touching(remaining, 0)
        trapped |= remaining & ~connected
        mobile = connected
        radii.append(r)
        states.append(mobile | trapped)
    return radii, states


def _pick(saturations: np.ndarray, targets: np.ndarray) -> list[int]:
    """Indices of the fine states nearest each target saturation, strictly increasing and distinct
    in saturation."""
    chosen: list[int] = []
    for t in targets:
        start = chosen[-1] + 1 if chosen else 0
        cands = [i for i in range(start, len(saturations))
                 if saturations[i] != (saturations[chosen[-1]] if chosen else np.inf)]
        if not cands:
            break
        chosen.append(min(cands, key=lambda i: abs(saturations[i] - t)))
    return chosen


def demo_series(seed: int = 2026, size: int = DEFAULT_SIZE) -> DemoSeries:
    """Simulate the demo experiment in memory (labels only; see :func:`write_demo_series`).

    Parameters
    ----------
    seed : int
        Seed of every random choice (rock, scan times, noise, shifts).
    size : int
        Edge of the cubic image in voxels (≥ 48); the field of view is the inscribed cylinder.
        The voxel size stays ``VOXEL_SIZE_UM``: a larger size shows more of the same rock.

    Returns
    -------
    DemoSeries

    References
    ----------
    Hilpert & Miller (2001), *Adv. Water Resour.* 24, 243–255; Schulz et al. (2007),
    *J. Electrochem. Soc.* 154, B419–B426.
    """
    if int(size) < 48:
        raise WetpathError(f"demo size must be at least 48 voxels, got {size}", step="demo")
    size = int(size)
    rock_rng, time_rng = (np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(2))
    # the rock is made larger than the image so that distances near the faces see the grains
    # beyond them: a face of the image is a cut through the rock
    pad = int(math.ceil(_GRAIN_RADIUS_RANGE[1]))
    rock = grain_pack(size + 2 * pad, rock_rng)
    inside = (slice(pad, -pad),) * 3
    dist = ndimage.distance_transform_edt(~rock)[inside]
    solid = rock[inside]
    pore = ~solid
    fov = cylinder_fov(solid.shape)
    pore_fov = pore & fov

    def sat_w(oil: np.ndarray) -> float:
        return 1.0 - np.count_nonzero(oil & fov) / np.count_nonzero(pore_fov)

    cos_r = math.cos(math.radians(THETA_RECEDING_DEG))
    cos_a = math.cos(math.radians(THETA_ADVANCING_DEG))
    # the ladder starts where the first ball fits at the inlet face
    r0 = float(dist[0].max()) / cos_r
    d_radii, d_states = _drainage(pore, dist, fov, r0, cos_r)
    d_sat = np.array([sat_w(s) for s in d_states])
    d_pick = _pick(d_sat, np.linspace(1.0, d_sat[-1], N_DRAINAGE_SCANS + 1)[1:])
    # imbibition changes nothing until R cos θ_a passes the last drainage R cos θ_r
    i_radii, i_states = _imbibition(dist, fov, d_states[-1], d_radii[-1] * cos_r / cos_a, cos_a)
    i_sat = np.array([sat_w(s) for s in i_states])
    i_pick = _pick(-i_sat, -np.linspace(d_sat[-1], i_sat[-1], N_IMBIBITION_SCANS + 1)[1:])

    oils = ([np.zeros_like(pore)] + [d_states[i] for i in d_pick] + [i_states[i] for i in i_pick])
    radii: list[float | None] = ([None] + [float(d_radii[i]) for i in d_pick]
                                 + [float(i_radii[i]) for i in i_pick])
    kinds = ["drainage"] * (1 + len(d_pick)) + ["imbibition"] * len(i_pick)

    phases_box, labels = [], []
    for oil in oils:
        ph = np.full(pore.shape, WETTING, dtype=np.uint8)
        ph[oil] = NONWETTING
        ph[solid] = SOLID
        phases_box.append(ph)
        lab = ph.copy()
        lab[~fov] = EXCLUDED
        labels.append(lab)

    # scans every few minutes; a longer pause while the pumps are reversed
    gaps = np.round(time_rng.uniform(200.0, 420.0, len(oils) - 1), 1)
    gaps[len(d_pick)] += round(float(time_rng.uniform(1200.0, 2400.0)), 1)
    times = np.round(np.concatenate([[0.0], np.cumsum(gaps)]), 1)
    return DemoSeries(labels=labels, times_s=times, kinds=kinds, capillary_radius_vox=radii,
                      solid=solid, fov=fov, phases_box=phases_box)


def _translate(img: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """``out(x) = img(x − shift)`` by separable linear interpolation, edges repeated."""
    for axis, s in enumerate(shift):
        k = math.floor(s)
        f = np.float32(s - k)
        n = img.shape[axis]
        lo = img.take(np.clip(np.arange(n) - k, 0, n - 1), axis=axis)
        hi = img.take(np.clip(np.arange(n) - k - 1, 0, n - 1), axis=axis)
        img = lo * (1 - f) + hi * f if f else lo
    return img


def _scan(values: np.ndarray, fov: np.ndarray, shift: np.ndarray, gain: float,
          rng: np.random.Generator) -> np.ndarray:
    """Blur, translate, mask and add noise to a grey-level scene (float32); uint16."""
    img = _translate(ndimage.gaussian_filter(values, _BLUR_SIGMA), shift)
    img *= np.float32(gain)
    noise = rng.standard_normal(img.shape, dtype=np.float32)
    img += noise * np.sqrt(np.float32(_NOISE_GAIN) * img + np.float32(_NOISE_FLOOR**2))
    img[~fov] = 0.0
    return np.clip(np.rint(img), 0, 65535).astype(np.uint16)


def grayscale_scans(series: DemoSeries, seed: int) -> tuple[np.ndarray, list[np.ndarray],
                                                            np.ndarray]:
    """Noisy uint16 scans of the series: the dry reference and one wet scan per step.

    Returns
    -------
    dry : ndarray of uint16
        Dry scan (grain vs air), in the frame of the labels.
    wet : list of ndarray of uint16
        Wet scans; scan k shows the sample translated by ``shifts[k]`` voxels (z, y, x), i.e.
        ``wet[k](x) ≈ scene_k(x − shifts[k])``.
    shifts : ndarray of float, shape (steps, 3)
        Rigid translations in voxels.
    """
    rng = np.random.default_rng(np.random.SeedSequence(seed).spawn(3)[2])
    dry_values = np.where(series.solid, _GREY["grain"], _GREY["air"]).astype(np.float32)
    dry = _scan(dry_values, series.fov, np.zeros(3), 1.0, rng)
    lut = np.array([0.0, _GREY["grain"], _GREY["brine"], _GREY["oil"]], dtype=np.float32)
    steps = len(series.phases_box)
    # a slow random-walk drift of the sample, kept within _MAX_SHIFT voxels
    walk = np.cumsum(rng.normal(0.0, 0.6, (steps, 3)), axis=0) + rng.uniform(-1.0, 1.0, 3)
    shifts = np.round(np.clip(walk, -_MAX_SHIFT, _MAX_SHIFT), 2)
    gains = 1.0 + rng.uniform(-0.01, 0.01, steps)
    wet = [_scan(lut[ph], series.fov, shifts[k], float(gains[k]), rng)
           for k, ph in enumerate(series.phases_box)]
    return dry, wet, shifts


def _write_tiff(path: Path, data: np.ndarray, *, compress: bool) -> None:
    import tifffile

    tifffile.imwrite(path, data, photometric="minisblack", compression="zlib" if compress else None,
                     metadata={"axes": "ZYX", "voxel_size_um": VOXEL_SIZE_UM})


def _write_times(path: Path, names: list[str], times: np.ndarray) -> None:
    rows = [f"{n},{t:.1f},{n}.tif" for n, t in zip(names, times, strict=True)]
    lines = ["step,time_s,file", *rows]
    path.write_text("\n".join(lines) + "\n")


def write_demo_series(out_dir: str | os.PathLike, *, seed: int = 2026, size: int = DEFAULT_SIZE,
                      grayscale: bool = True) -> Path:
    """Generate the demo series and write it to ``out_dir`` (atomically).

    Layout: ``labels/step_NNN.tif`` (uint8 multi-page TIFF, z pages, canonical codes) with
    ``labels/times.csv`` (columns ``step,time_s,file``; ``step`` is the step name, ``file``
    relative to the folder); with ``grayscale``, ``grayscale/dry.tif`` and
    ``grayscale/step_NNN.tif`` (uint16) with their ``times.csv``; and ``scenario.json`` (seed,
    size, voxel size, interfacial tension, per-step kind, design capillary radius and pressure,
    scan shifts, the scenario text).

    Parameters
    ----------
    out_dir : path
        Folder to create. An existing folder is replaced only if it holds an earlier demo series
        (a ``scenario.json``) or is empty.
    seed : int
        Seed; the same seed and size give byte-identical files.
    size : int
        Edge of the cubic image in voxels (≥ 48).
    grayscale : bool
        Also write the noisy grayscale variant.

    Returns
    -------
    Path
        ``out_dir``.

    Raises
    ------
    WetpathError
        If ``out_dir`` exists, is not empty and is not a demo series, or ``size`` is too small.
    """
    out = Path(out_dir)
    if out.exists() and (not out.is_dir() or (any(out.iterdir())
                                              and not (out / "scenario.json").is_file())):
        raise WetpathError("exists and is not an earlier demo series; choose a new folder",
                           step="demo", path=out)
    series = demo_series(seed, size)
    names = [f"step_{k:03d}" for k in range(len(series.labels))]
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.parent / f".{out.name}.tmp-{os.getpid()}"
    old = out.parent / f".{out.name}.old-{os.getpid()}"
    shutil.rmtree(tmp, ignore_errors=True)
    try:
        (tmp / "labels").mkdir(parents=True)
        for name, lab in zip(names, series.labels, strict=True):
            _write_tiff(tmp / "labels" / f"{name}.tif", lab, compress=True)
        _write_times(tmp / "labels" / "times.csv", names, series.times_s)
        shifts = None
        if grayscale:
            dry, wet, shifts = grayscale_scans(series, seed)
            (tmp / "grayscale").mkdir()
            _write_tiff(tmp / "grayscale" / "dry.tif", dry, compress=False)
            for name, img in zip(names, wet, strict=True):
                _write_tiff(tmp / "grayscale" / f"{name}.tif", img, compress=False)
            _write_times(tmp / "grayscale" / "times.csv", names, series.times_s)
        scenario = _scenario(series, names, seed, size, shifts)
        (tmp / "scenario.json").write_text(json.dumps(scenario, indent=2) + "\n")
        if out.exists():
            out.rename(old)
        tmp.rename(out)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
        shutil.rmtree(old, ignore_errors=True)
    return out


def _scenario(series: DemoSeries, names: list[str], seed: int, size: int,
              shifts: np.ndarray | None) -> dict:
    steps = []
    for k, (name, lab) in enumerate(zip(names, series.labels, strict=True)):
        r = series.capillary_radius_vox[k]
        pc = None if r is None else 2 * INTERFACIAL_TENSION_N_PER_M / (r * VOXEL_SIZE_UM * 1e-6)
        steps.append({
            "step": name,
            "time_s": float(series.times_s[k]),
            "kind": series.kinds[k],
            "saturation_w": round(float(np.count_nonzero(lab == WETTING)
                                        / np.count_nonzero(lab >= WETTING)), 6),
            "capillary_radius_um": None if r is None else round(r * VOXEL_SIZE_UM, 3),
            "design_pc_pa": None if pc is None else round(pc, 1),
            "grayscale_shift_zyx_vox": None if shifts is None else [float(s) for s in shifts[k]],
        })
    return {
        "name": "Hollin Brae sandstone, drainage and imbibition (synthetic demo)",
        "synthetic": True,
        "scenario": SCENARIO_TEXT,
        "seed": int(seed),
        "size": int(size),
        "shape_zyx": list(series.labels[0].shape),
        "porosity": round(float(np.count_nonzero(series.labels[0] >= WETTING)
                                / np.count_nonzero(series.labels[0])), 6),
        "voxel_size_um": VOXEL_SIZE_UM,
        "interfacial_tension_n_per_m": INTERFACIAL_TENSION_N_PER_M,
        "wetting_fluid": "KB-4 brine (invented)",
        "nonwetting_fluid": "Lumen-12 model oil (invented)",
        "theta_receding_design_deg": THETA_RECEDING_DEG,
        "theta_advancing_design_deg": THETA_ADVANCING_DEG,
        "design_note": "the invasion rule makes menisci meet flat solid at the design angles and "
                       "gives every meniscus of a scan the total curvature 2/R of its capillary "
                       "radius R (design_pc_pa = 2 sigma / R); on curved grains and after "
                       "voxelisation the measured angles differ, and trapped ganglia keep the "
                       "curvature of the scan in which they were cut off",
        "field_of_view": "cylinder, axis z, inscribed in the y-x square; 0 outside",
        "phase_codes": {"excluded": 0, "solid": 1, "wetting": 2, "nonwetting": 3},
        "grayscale_frame": "labels are in the frame of grayscale/dry.tif; wet scan k shows the "
                           "sample translated by grayscale_shift_zyx_vox (z, y, x)",
        "steps": steps,
    }
