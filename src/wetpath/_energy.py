"""Energy-balance (thermodynamic) contact angle between two states of a displacement.

Between two states with the same solid and no dissipation, the change of surface energy equals the
capillary work (Blunt, Lin, Akai & Bijeljic 2019):

    cos θ_t = (ΔA_nw + κ̄ ΔV_w) / ΔA_ws,

with κ̄ the mean of the two states' area-averaged n–w curvatures (κ > 0 convex toward w), θ measured
through the wetting phase. Per tracked cluster family (parents → children) the same balance holds
locally with ΔV_w = −ΔV_n and ΔA_ws = −ΔA_ns.

Everything here is plain arithmetic on the mappings of :func:`wetpath.measure_state` (and on the
per-cluster tables): no image is read.

References
----------
Blunt, M. J., Lin, Q., Akai, T. & Bijeljic, B. (2019). A thermodynamically consistent
characterization of wettability in porous media using high-resolution imaging. *J. Colloid
Interface Sci.* 552, 59–65.
Efron, B. & Tibshirani, R. J. (1993). *An Introduction to the Bootstrap*. Chapman & Hall (paired
resampling of units, percentile intervals).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from numba import njit, prange

from ._codes import NONWETTING, WETTING, PhaseCodes, to_canonical
from ._errors import WetpathError

__all__ = ["energy_balance_angle", "family_energy_angles", "perturb_fluid_boundary",
           "PerturbedView"]

_STEP = "energy"
_BLOCK_SUMS = ("volume_w", "volume_n", "area_nw", "area_ws", "area_ns")
_BLOCK_CURV = ("curv_area_nw", "curv_weight_nw")


def _get(state: Mapping, key: str, which: str) -> float:
    try:
        return float(state[key])
    except KeyError:
        raise WetpathError(f"the {which} state has no '{key}' (expected a measure_state result)",
                           step=_STEP) from None


def _theta_deg(cos: float) -> float:
    """θ in degrees, NaN when cos is NaN or outside [−1, 1]."""
    if not np.isfinite(cos) or abs(cos) > 1:
        return math.nan
    return math.degrees(math.acos(cos))


def _balance(d_area_nw, d_area_ws, d_volume_w, kappa_mean):
    """cos θ_t = (ΔA_nw + κ̄ ΔV_w) / ΔA_ws, vectorised; NaN where ΔA_ws = 0."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(d_area_ws != 0, (d_area_nw + kappa_mean * d_volume_w) / d_area_ws, np.nan)


def _direction(d_saturation_w: float, static_tol: float) -> str:
    if not np.isfinite(d_saturation_w) or abs(d_saturation_w) <= static_tol:
        return "static"
    return "imbibition" if d_saturation_w > 0 else "drainage"


def _paired_blocks(before: Mapping, after: Mapping) -> pd.DataFrame | None:
    """Join the per-block sums of both states on ``block``; None when either has no table."""
    bb, ba = before.get("blocks"), after.get("blocks")
    if bb is None or ba is None or len(bb) == 0 or len(ba) == 0:
        return None
    bb, ba = pd.DataFrame(bb), pd.DataFrame(ba)
    for name, table in (("before", bb), ("after", ba)):
        missing = [c for c in ("block", *_BLOCK_SUMS) if c not in table.columns]
        if missing:
            raise WetpathError(f"the {name} state's block table lacks columns {missing}",
                               step=_STEP)
    if set(bb["block"]) != set(ba["block"]):
        raise WetpathError("the two states have different sub-volume blocks; measure both "
                           "states on the same grid of blocks", step=_STEP)
    return bb.merge(ba, on="block", suffixes=("_b", "_a"), validate="one_to_one")


def _block_bootstrap(blocks: pd.DataFrame, kappa_states: tuple[float, float], n_boot: int,
                     seed: int):
    """Paired bootstrap over blocks: the same resampled blocks in both states.

    κ of each state is Σ κ dA / Σ dA over the resampled blocks when the tables carry
    ``curv_area_nw, curv_weight_nw``, else the state's own ``curvature_nw`` (not resampled).
    Returns the cos θ_t replicates and the value from the full block sums (same estimator), so the
    caller can use the deviations of the replicates from the full-sum value.
    """
    n = len(blocks)
    rng = np.random.default_rng(seed)
    weights = rng.multinomial(n, np.full(n, 1.0 / n), size=n_boot).astype(float)
    weights = np.vstack([np.ones(n), weights])  # row 0: the full sample
    curv = all(f"{c}_{s}" in blocks for c in _BLOCK_CURV for s in "ba")
    cols = _BLOCK_SUMS + (_BLOCK_CURV if curv else ())
    sums = {f"{c}_{s}": weights @ blocks[f"{c}_{s}"].to_numpy(float) for c in cols for s in "ba"}
    if curv:
        with np.errstate(divide="ignore", invalid="ignore"):
            kappa = 0.5 * (sums["curv_area_nw_b"] / sums["curv_weight_nw_b"]
                           + sums["curv_area_nw_a"] / sums["curv_weight_nw_a"])
    else:
        kappa = 0.5 * sum(kappa_states)
    cos = _balance(sums["area_nw_a"] - sums["area_nw_b"], sums["area_ws_a"] - sums["area_ws_b"],
                   sums["volume_w_a"] - sums["volume_w_b"], kappa)
    return cos[1:], cos[0]


def _mixed_direction(blocks: pd.DataFrame | None, mixed_tol: float) -> bool:
    """True when per-block ΔV_w of both signs cancel: the smaller of the summed gains and losses
    exceeds ``mixed_tol`` times the net change."""
    if blocks is None:
        return False
    dv = blocks["volume_w_a"].to_numpy(float) - blocks["volume_w_b"].to_numpy(float)
    gain, loss = dv[dv > 0].sum(), -dv[dv < 0].sum()
    minority = min(gain, loss)
    return bool(minority > 0 and minority > mixed_tol * abs(gain - loss))


def _increment(before: Mapping, after: Mapping) -> dict:
    """Differences and means of the global quantities the balance needs."""
    g = {k: (_get(before, k, "before"), _get(after, k, "after"))
         for k in ("bulk_volume", "pore_volume", "volume_w", "volume_n", "area_nw", "area_ws",
                   "area_ns", "curvature_nw")}
    kb, ka = g["curvature_nw"]
    bulk = 0.5 * sum(g["bulk_volume"])
    d = {f"d_{k}": g[k][1] - g[k][0]
         for k in ("volume_w", "volume_n", "pore_volume", "area_nw", "area_ws", "area_ns")}
    with np.errstate(divide="ignore", invalid="ignore"):
        sw = [vw / vp if vp > 0 else math.nan for vw, vp in zip(g["volume_w"], g["pore_volume"],
                                                                strict=True)]
    return {
        **d,
        "kappa_before": kb, "kappa_after": ka, "kappa_mean": 0.5 * (kb + ka),
        "bulk_volume": bulk,
        "porosity": 0.5 * sum(g["pore_volume"]) / bulk if bulk > 0 else math.nan,
        "d_saturation_w": sw[1] - sw[0],
        "no_nonwetting": g["volume_n"][0] <= 0 or g["volume_n"][1] <= 0,
        "volume_scale": max(abs(d["d_volume_w"]), abs(d["d_volume_n"])),
        "area_ws_scale": max(abs(v) for v in g["area_ws"]),
        "pore_scale": max(abs(v) for v in g["pore_volume"]),
    }


def _pair_perturbed(before, after, before_perturbed, after_perturbed):
    """The before and after states perturbed alike (first with first, second with second): all
    scans of a series are segmented with the same settings (METHODS.md §6), so a boundary bias is
    shared by both states of an increment. Scan-to-scan noise is the block bootstrap's part; a
    ±1-voxel shift of one scan alone moves ΔA_ws by a large share of A_ws and would swamp every
    increment's interval."""
    bp, ap = list(before_perturbed or []), list(after_perturbed or [])
    if len(bp) != len(ap):
        return [(b, after) for b in bp] + [(before, a) for a in ap]
    return list(zip(bp, ap, strict=True))


def _interval(cos, inc, blocks, pairs, n_boot, seed, kappa_rel_error):
    """Lower and upper cos θ_t: the half-widths of the block bootstrap, the perturbed pairs and
    the declared curvature error added in quadrature (see energy_balance_angle)."""
    if not np.isfinite(cos):
        return math.nan, math.nan
    parts = []  # (lower, upper) half-widths on cos θ_t
    if blocks is not None and len(blocks) >= 2 and n_boot > 0:
        reps, full = _block_bootstrap(blocks, (inc["kappa_before"], inc["kappa_after"]), n_boot,
                                      seed)
        dev = reps[np.isfinite(reps)] - full
        if dev.size and np.isfinite(full):
            parts.append((-min(np.quantile(dev, 0.025), 0.0), max(np.quantile(dev, 0.975), 0.0)))
    if pairs:
        dev_p = [float(_balance(ip["d_area_nw"], ip["d_area_ws"], ip["d_volume_w"],
                                ip["kappa_mean"])) - cos
                 for ip in (_increment(b, a) for b, a in pairs)]
        p = max(abs(d) if np.isfinite(d) else math.inf for d in dev_p)
        parts.append((p, p))
    if kappa_rel_error > 0:
        k = kappa_rel_error * abs(inc["kappa_mean"] * inc["d_volume_w"] / inc["d_area_ws"])
        parts.append((k, k))
    if not parts:
        return math.nan, math.nan
    lo = math.sqrt(sum(x * x for x, _ in parts))
    hi = math.sqrt(sum(y * y for _, y in parts))
    return float(np.clip(cos - lo, -1, 1)), float(np.clip(cos + hi, -1, 1))


def energy_balance_angle(before: Mapping, after: Mapping, *, large_step: float = 0.25,
                         volume_tol: float = 0.02, area_noise: float | None = None,
                         n_boot: int = 500, seed: int = 0,
                         before_perturbed: Sequence[Mapping] | None = None,
                         after_perturbed: Sequence[Mapping] | None = None,
                         static_tol: float = 1e-4, mixed_tol: float = 0.5,
                         kappa_rel_error: float = 0.0) -> dict:
    """Energy-balance contact angle of the increment ``before`` → ``after`` over the field of view.

    cos θ_t = (ΔA_nw + κ̄ ΔV_w) / ΔA_ws with κ̄ = (κ_before + κ_after)/2 (Blunt et al. 2019).

    Parameters
    ----------
    before, after : mapping
        :func:`wetpath.measure_state` results of the two states (same field of view, same voxel
        size, same block grid). Used keys: ``bulk_volume, pore_volume, volume_w, volume_n,
        area_nw, area_ws, area_ns, curvature_nw`` (lengths in the voxel-size unit, κ in 1/length)
        and, for the interval and the mixed-direction flag, ``blocks``.
    large_step : float
        Threshold on the relative curvature change |κ_after − κ_before| / max(|κ_before|, |κ_after|)
        above which ``flag_large_step`` is set (the mean-κ rule is exact only for small steps).
    volume_tol : float
        Relative tolerance of the volume ledger: ``flag_volume_not_conserved`` when
        |ΔV_n + ΔV_w| > volume_tol · max(|ΔV_w|, |ΔV_n|).
    area_noise : float, optional
        Scan-to-scan noise of A_ws (area unit). When |ΔA_ws| ≤ area_noise the angle is NaN and
        ``flag_no_wetted_area_change`` is set. Default: only an unchanged A_ws (to rounding).
    n_boot : int
        Number of paired bootstrap replicates over the blocks (0 switches the bootstrap off).
    seed : int
        Seed of the bootstrap.
    before_perturbed, after_perturbed : sequence of mapping, optional
        ``measure_state`` results of the same states with the fluid boundary moved by ±1 voxel
        (stand-ins for segmentation error; see :func:`perturb_fluid_boundary`). The k-th
        perturbed before state is paired with the k-th perturbed after state: every scan is
        segmented with the same settings, so a boundary bias is shared by both states (a list
        given for one state only is paired with the other's unperturbed state).
    static_tol : float
        |ΔS_w| at or below which the increment is called ``static``.
    mixed_tol : float
        ``flag_mixed_direction`` when the smaller of the per-block summed gains and losses of V_w
        exceeds mixed_tol × |net ΔV_w|.
    kappa_rel_error : float
        Relative systematic error ε of the curvature estimator, added to the interval as
        ε·|R_κ| (METHODS.md §3). Neither the bootstrap nor the boundary perturbation sees it;
        mesh curvature of tube menisci of radius 15 voxels was off by 1–5.5 % here.

    Returns
    -------
    dict
        ``theta_energy_deg`` (degrees through w), ``cos_theta_energy`` (the unclipped ratio),
        ``r_kappa`` = κ̄ ΔV_w / ΔA_ws (a relative κ error ε shifts cos θ_t by ε·R_κ),
        ``theta_energy_lo_deg``, ``theta_energy_hi_deg`` (interval, see Notes), ``direction``
        (``drainage`` when S_w falls, ``imbibition`` when it rises, ``static`` within
        ``static_tol``), the increment quantities ``d_area_nw, d_area_ws, d_area_ns, d_volume_w,
        d_volume_n, d_pore_volume, d_saturation_w, d_a_nw, d_a_ws`` (ΔA/V, 1/length),
        ``d_phi_sw`` (= ΔV_w / V), ``kappa_before, kappa_after, kappa_mean, kappa_rel_change``,
        ``cos_step_spread`` (= |κ_after − κ_before|/2 · |ΔV_w/ΔA_ws|: how far cos θ_t moves if
        either state's κ is used instead of κ̄), ``porosity``, ``bulk_volume``,
        ``n_blocks``, ``n_perturbed`` and the boolean flags ``flag_no_wetted_area_change``,
        ``flag_mixed_direction``, ``flag_large_step``, ``flag_volume_not_conserved``,
        ``flag_cos_out_of_range``, ``flag_curvature_undefined``, ``flag_no_nonwetting``.

    Notes
    -----
    Undefined cases give NaN and a flag, never an exception: no n phase in a state or κ NaN
    (``flag_curvature_undefined``), |ΔA_ws| ≤ area_noise (``flag_no_wetted_area_change``).
    When |cos θ_t| > 1 the angle is **not clipped**: ``theta_energy_deg`` is NaN,
    ``flag_cos_out_of_range`` is set and ``cos_theta_energy`` keeps the raw ratio, because a value
    outside [−1, 1] says that curvature or area errors dominate the increment (a clipped 0° or 180°
    would look like a measurement); the interval is still reported (clipped to [0°, 180°]) and the
    increment quantities still enter pooled branch fits.

    The interval combines two spreads of cos θ_t. (1) Sampling: a paired bootstrap over the
    per-block sums (the same resampled blocks in both states; κ of each state from Σ κ dA / Σ dA
    of the resampled blocks, or the state's ``curvature_nw`` when the block tables carry no
    ``curv_area_nw, curv_weight_nw``); the 2.5 % and 97.5 % quantiles of the replicates'
    deviations from the full-block value give half-widths b_lo, b_hi (needs ≥ 2 blocks).
    (2) Segmentation: the largest deviation p of cos θ_t over the perturbed state pairs (e.g.
    from :func:`perturb_fluid_boundary`). They are treated as
    independent and added in quadrature, cos ∈ [cos − √(b_lo² + p²), cos + √(b_hi² + p²)], then
    clipped to [−1, 1] and turned into angles (θ_lo from the upper cosine); a curvature error
    ε·|R_κ| (``kappa_rel_error``) joins the quadrature sum. With no source the interval is NaN.

    In a fully segmented pore space ΔV_n + ΔV_w = ΔV_pore, so ``flag_volume_not_conserved`` here
    detects pore-volume drift (registration, changed solid or excluded voxels) or unlabelled
    pore; dissolution of a trapped cluster is detected per family by
    :func:`family_energy_angles`.

    References
    ----------
    Blunt, M. J., Lin, Q., Akai, T. & Bijeljic, B. (2019). *J. Colloid Interface Sci.* 552, 59–65.
    Efron, B. & Tibshirani, R. J. (1993). *An Introduction to the Bootstrap*. Chapman & Hall.
    """
    inc = _increment(before, after)
    d_nw, d_ws, d_vw = inc["d_area_nw"], inc["d_area_ws"], inc["d_volume_w"]
    kappa = inc["kappa_mean"]
    bulk = inc["bulk_volume"]

    noise = area_noise if area_noise is not None else 1e-12 * inc["area_ws_scale"]
    no_area_change = bool(abs(d_ws) <= noise)
    kappa_undefined = bool(inc["no_nonwetting"] or not np.isfinite(kappa))
    cos = math.nan if (no_area_change or kappa_undefined) else float(_balance(d_nw, d_ws, d_vw,
                                                                               kappa))
    out_of_range = bool(np.isfinite(cos) and abs(cos) > 1)

    blocks = _paired_blocks(before, after)
    pairs = _pair_perturbed(before, after, before_perturbed, after_perturbed)
    cos_lo, cos_hi = _interval(cos, inc, blocks, pairs, n_boot, seed, kappa_rel_error)

    kb, ka = inc["kappa_before"], inc["kappa_after"]
    kmax = max(abs(kb), abs(ka))
    rel = abs(ka - kb) / kmax if kmax > 0 else math.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        r_kappa = kappa * d_vw / d_ws if d_ws != 0 else math.nan
        spread = abs(ka - kb) / 2 * abs(d_vw / d_ws) if d_ws != 0 else math.nan
    ledger = abs(inc["d_volume_n"] + d_vw)
    return {
        "theta_energy_deg": _theta_deg(cos),
        "cos_theta_energy": cos,
        "r_kappa": float(r_kappa),
        "theta_energy_lo_deg": _theta_deg(float(cos_hi)),
        "theta_energy_hi_deg": _theta_deg(float(cos_lo)),
        "direction": _direction(inc["d_saturation_w"], static_tol),
        "d_area_nw": d_nw, "d_area_ws": d_ws, "d_area_ns": inc["d_area_ns"],
        "d_volume_w": d_vw, "d_volume_n": inc["d_volume_n"],
        "d_pore_volume": inc["d_pore_volume"], "d_saturation_w": inc["d_saturation_w"],
        "d_a_nw": d_nw / bulk, "d_a_ws": d_ws / bulk, "d_phi_sw": d_vw / bulk,
        "kappa_before": kb, "kappa_after": ka, "kappa_mean": kappa, "kappa_rel_change": rel,
        "cos_step_spread": float(spread),
        "porosity": inc["porosity"], "bulk_volume": bulk,
        "n_blocks": 0 if blocks is None else len(blocks), "n_perturbed": len(pairs),
        "flag_no_wetted_area_change": no_area_change,
        "flag_mixed_direction": _mixed_direction(blocks, mixed_tol),
        "flag_large_step": bool(np.isfinite(rel) and rel > large_step),
        "flag_volume_not_conserved": bool(ledger > volume_tol * inc["volume_scale"]
                                          and ledger > 1e-12 * inc["pore_scale"]),
        "flag_cos_out_of_range": out_of_range,
        "flag_curvature_undefined": kappa_undefined,
        "flag_no_nonwetting": bool(inc["no_nonwetting"]),
    }


def perturb_fluid_boundary(labels: np.ndarray, *, codes: PhaseCodes | Mapping | None = None,
                           voxels: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """Two copies of a state with the n–w boundary moved by ±``voxels`` (segmentation stand-ins).

    The n phase is dilated into w (first copy) or eroded into w (second copy) with the 6-connected
    unit ball, ``voxels`` times; solid and excluded voxels are untouched. Measure both copies of
    each state with :func:`wetpath.measure_state` and pass them as ``before_perturbed`` /
    ``after_perturbed`` to :func:`energy_balance_angle`.

    Parameters
    ----------
    labels : ndarray of int, shape (z, y, x)
        Phase labels (canonical codes unless ``codes`` says otherwise).
    codes : PhaseCodes or mapping, optional
        Label values of the phases.
    voxels : int
        How far the boundary moves (voxels, ≥ 1).

    Returns
    -------
    dilated, eroded : ndarray of uint8
        Canonical label volumes.

    References
    ----------
    Serra, J. (1982). *Image Analysis and Mathematical Morphology*. Academic Press (dilation and
    erosion).
    """
    if int(voxels) < 1:
        raise WetpathError(f"voxels must be a positive integer, got {voxels!r}", step=_STEP)
    lab = to_canonical(labels, codes, step=_STEP)
    if int(voxels) == 1 and lab.ndim == 3:
        dilated, eroded = np.empty_like(lab), np.empty_like(lab)
        _perturb_once(np.ascontiguousarray(lab), dilated, eroded)
        return dilated, eroded
    return _perturb_reference(lab, int(voxels))


class PerturbedView:
    """A label array with its fluid boundary moved by one voxel, computed box by box on reading.

    ``view[box]`` reads the box grown by one voxel on every side from ``labels`` (numpy, zarr or
    dask; canonical codes), moves the boundary as :func:`perturb_fluid_boundary` does with
    ``voxels=1`` and returns the box: exactly the same voxels as slicing the whole perturbed copy
    (a voxel's move depends only on its six neighbours, and the array border is kept where the
    grown box is clipped by it). Streaming passes such as
    :func:`wetpath._lattice.lattice_measures` read it slab by slab, so the perturbed states are
    measured without a whole copy in memory.

    Parameters
    ----------
    labels : array, shape (z, y, x)
        Canonical phase codes (uint8).
    kind : {"dilated", "eroded"}
        The n phase grown into w, or shrunk.

    Notes
    -----
    Reading uses the compiled OpenMP-parallel kernel: read it from the parent process's threads,
    never in forked workers (see :mod:`wetpath._parallel`).
    """

    def __init__(self, labels, kind: str):
        if kind not in ("dilated", "eroded"):
            raise WetpathError(f"kind must be 'dilated' or 'eroded', got {kind!r}", step=_STEP)
        if len(getattr(labels, "shape", ())) != 3:
            raise WetpathError(f"labels must be 3-D (z, y, x), got shape "
                               f"{getattr(labels, 'shape', None)}", step=_STEP)
        self.labels, self.kind = labels, kind
        self.shape = tuple(int(n) for n in labels.shape)
        self.dtype = np.dtype(np.uint8)
        chunks = getattr(labels, "chunks", None)      # zarr: slab passes follow the stored chunks
        self.chunks = tuple(int(c) for c in chunks) if chunks is not None and len(chunks) == 3 \
            and all(np.isscalar(c) for c in chunks) else None

    def __getitem__(self, key) -> np.ndarray:
        key = key if isinstance(key, tuple) else (key,)
        if Ellipsis in key:
            at = key.index(Ellipsis)
            key = key[:at] + (slice(None),) * (4 - len(key)) + key[at + 1:]
        key = key + (slice(None),) * (3 - len(key))
        if len(key) != 3 or not all(isinstance(k, slice) and k.step in (None, 1) for k in key):
            raise WetpathError("a perturbed view is read by boxes of unit-step slices",
                               step=_STEP)
        box = [k.indices(n)[:2] for k, n in zip(key, self.shape, strict=True)]
        grown = tuple(slice(max(a - 1, 0), min(max(b, a) + 1, n))
                      for (a, b), n in zip(box, self.shape, strict=True))
        lab = np.ascontiguousarray(np.asarray(self.labels[grown]), dtype=np.uint8)
        dilated, eroded = np.empty_like(lab), np.empty_like(lab)
        if lab.size:
            _perturb_once(lab, dilated, eroded)
        out = dilated if self.kind == "dilated" else eroded
        return out[tuple(slice(a - g.start, max(b, a) - g.start)
                         for (a, b), g in zip(box, grown, strict=True))]


@njit(cache=True, nogil=True, parallel=True)
def _perturb_once(lab, dilated, eroded):  # pragma: no cover
    """Compiled one-voxel :func:`_perturb_reference`: w voxels with a 6-neighbour in n become n in
    ``dilated``; n voxels with a 6-neighbour in w become w in ``eroded``."""
    nz, ny, nx = lab.shape
    for i in prange(nz):
        for j in range(ny):
            for k in range(nx):
                c = lab[i, j, k]
                dilated[i, j, k] = c
                eroded[i, j, k] = c
                if c == WETTING:
                    other = NONWETTING
                elif c == NONWETTING:
                    other = WETTING
                else:
                    continue
                if ((i > 0 and lab[i - 1, j, k] == other) or (i < nz - 1 and lab[i + 1, j, k] == other)
                        or (j > 0 and lab[i, j - 1, k] == other)
                        or (j < ny - 1 and lab[i, j + 1, k] == other)
                        or (k > 0 and lab[i, j, k - 1] == other)
                        or (k < nx - 1 and lab[i, j, k + 1] == other)):
                    if c == WETTING:
                        dilated[i, j, k] = NONWETTING
                    else:
                        eroded[i, j, k] = WETTING


def _perturb_reference(lab: np.ndarray, voxels: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`perturb_fluid_boundary` on canonical labels by ``scipy.ndimage`` dilations (the
    test oracle of the compiled one-voxel path, and the path for ``voxels`` > 1)."""
    from scipy import ndimage

    n = lab == NONWETTING
    w = lab == WETTING
    ball = ndimage.generate_binary_structure(3, 1)
    grown = ndimage.binary_dilation(n, ball, iterations=int(voxels)) & w
    shrunk = ndimage.binary_dilation(w, ball, iterations=int(voxels)) & n
    dilated = lab.copy()
    dilated[grown] = NONWETTING
    eroded = lab.copy()
    eroded[shrunk] = WETTING
    return dilated, eroded


def _ids(value) -> list[int]:
    """Cluster ids from a space-separated string, a sequence or a scalar; empty for none."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return []
    if isinstance(value, str):
        return [int(v) for v in value.split()]
    if isinstance(value, (int, np.integer)):
        return [int(value)]
    return [int(v) for v in value]


def _family_sums(table: pd.DataFrame, ids: list[int], which: str) -> dict:
    missing = sorted(set(ids) - set(table.index))
    if missing:
        raise WetpathError(f"cluster id(s) {missing[:10]} of the events table are missing from the "
                           f"{which} cluster table", step=_STEP)
    rows = table.loc[ids]
    out = {k: float(rows[k].sum()) for k in ("volume", "area_nw", "area_ns")}
    if "curv_area_nw" in rows and "curv_weight_nw" in rows:
        num, den = float(rows["curv_area_nw"].sum()), float(rows["curv_weight_nw"].sum())
    else:  # area-weighted mean of the clusters' κ
        ok = np.isfinite(rows["curvature_nw"].to_numpy(float))
        num = float((rows["curvature_nw"] * rows["area_nw"])[ok].sum())
        den = float(rows["area_nw"][ok].sum())
    out["curvature_nw"] = num / den if den > 0 else math.nan
    out["touches_border"] = bool(rows["touches_border"].any()) if "touches_border" in rows else None
    return out


def family_energy_angles(events: pd.DataFrame, clusters_before: pd.DataFrame,
                         clusters_after: pd.DataFrame, *, large_step: float = 0.25,
                         volume_tol: float = 0.02, area_noise: float = 0.0) -> pd.DataFrame:
    """Energy-balance angle of every tracked cluster family (its parents → its children).

    Locally ΔV_w = −ΔV_n and ΔA_ws = −ΔA_ns, so cos θ = (ΔA_nw − κ̄ ΔV_n) / (−ΔA_ns), with κ̄ the
    mean of the family's curvature before (over the parents) and after (over the children)
    (Blunt et al. 2019).

    Parameters
    ----------
    events : DataFrame
        Events of cluster tracking: columns ``event, parents, children`` with cluster ids as
        space-separated strings (sequences or integers are accepted too).
    clusters_before, clusters_after : DataFrame
        Per-cluster tables of the two states: ``cluster, volume, area_nw, area_ns, curvature_nw``
        and, when present, ``curv_area_nw, curv_weight_nw`` (Σ κ dA and Σ dA: a family's κ is
        their ratio; otherwise the area_nw-weighted mean of ``curvature_nw``) and
        ``touches_border``. Lengths in the voxel-size unit.
    large_step, volume_tol, area_noise : float
        As in :func:`energy_balance_angle`. ``flag_volume_not_conserved`` is set for families
        none of whose clusters touch the border (n cannot enter or leave them by flow) whose n
        volume changes by more than volume_tol × the parents' volume: dissolution, compression or
        a tracking error. Without a ``touches_border`` column it is never set.

    Returns
    -------
    DataFrame
        One row per event: ``event, parents, children, direction, theta_energy_deg,
        cos_theta_energy, r_kappa, kappa_before, kappa_after, kappa_mean, d_volume_n, d_area_nw,
        d_area_ns`` and flags ``flag_no_wetted_area_change, flag_large_step,
        flag_volume_not_conserved, flag_cos_out_of_range, flag_curvature_undefined``. Families
        without parents or without children (a cluster appearing or vanishing) have NaN angles
        and ``flag_curvature_undefined``.

    References
    ----------
    Blunt, M. J., Lin, Q., Akai, T. & Bijeljic, B. (2019). *J. Colloid Interface Sci.* 552, 59–65.
    """
    need = ["cluster", "volume", "area_nw", "area_ns", "curvature_nw"]
    for which, table in (("before", clusters_before), ("after", clusters_after)):
        missing = [c for c in need if c not in table.columns]
        if missing:
            raise WetpathError(f"the {which} cluster table lacks columns {missing}", step=_STEP)
    for c in ("event", "parents", "children"):
        if c not in events.columns:
            raise WetpathError(f"the events table lacks column '{c}'", step=_STEP)
    tb = clusters_before.set_index("cluster")
    ta = clusters_after.set_index("cluster")
    empty = {"volume": 0.0, "area_nw": 0.0, "area_ns": 0.0, "curvature_nw": math.nan,
             "touches_border": None}
    rows = []
    for ev in events.itertuples(index=False):
        parents, children = _ids(ev.parents), _ids(ev.children)
        b = _family_sums(tb, parents, "before") if parents else dict(empty)
        a = _family_sums(ta, children, "after") if children else dict(empty)
        d_vn, d_nw, d_ns = (a["volume"] - b["volume"], a["area_nw"] - b["area_nw"],
                            a["area_ns"] - b["area_ns"])
        kappa = 0.5 * (b["curvature_nw"] + a["curvature_nw"])
        undefined = not (parents and children and np.isfinite(kappa))
        no_area = abs(d_ns) <= area_noise
        cos = math.nan if (undefined or no_area) else (d_nw - kappa * d_vn) / (-d_ns)
        kmax = max(abs(b["curvature_nw"]), abs(a["curvature_nw"]))
        rel = abs(a["curvature_nw"] - b["curvature_nw"]) / kmax if kmax > 0 else math.nan
        closed = b["touches_border"] is False and a["touches_border"] is False
        rows.append({
            "event": ev.event, "parents": " ".join(map(str, parents)),
            "children": " ".join(map(str, children)),
            "direction": ("static" if d_vn == 0 else "drainage" if d_vn > 0 else "imbibition"),
            "theta_energy_deg": _theta_deg(cos), "cos_theta_energy": cos,
            "r_kappa": kappa * d_vn / d_ns if d_ns != 0 else math.nan,
            "kappa_before": b["curvature_nw"], "kappa_after": a["curvature_nw"],
            "kappa_mean": kappa, "d_volume_n": d_vn, "d_area_nw": d_nw, "d_area_ns": d_ns,
            "flag_no_wetted_area_change": bool(no_area),
            "flag_large_step": bool(np.isfinite(rel) and rel > large_step),
            "flag_volume_not_conserved": bool(closed and b["volume"] > 0
                                              and abs(d_vn) > volume_tol * b["volume"]),
            "flag_cos_out_of_range": bool(np.isfinite(cos) and abs(cos) > 1),
            "flag_curvature_undefined": bool(undefined),
        })
    return pd.DataFrame(rows)
