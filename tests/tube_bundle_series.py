"""A saturation path through a bundle of capillary tubes, every value from closed-form geometry.

Shared by the history, plot and report tests. Drainage moves all contact lines up (n advances) at
the receding angle; at a reversal the contact lines stay pinned while the menisci turn from one
angle to the other (ΔA_ws = 0, a static step); imbibition moves them back at the advancing angle.
States come from :func:`wetpath.synthetic.tube_bundle_exact`; the increments hold the exact
differences and the energy-balance angle of each increment (Blunt et al. 2019, J. Colloid
Interface Sci. 552, 59–65), computed here the way the energy-balance module defines it.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from wetpath.synthetic import tube_bundle_exact

RADII_UM = (6.0, 9.0, 12.0, 15.0)
LENGTH_UM = 300.0
BULK_UM3 = 6100.0 * LENGTH_UM   # box cross-section 6100 µm² → porosity ≈ 0.25
RECEDING_DEG, ADVANCING_DEG = 40.0, 65.0


def tube_bundle_path(*, receding=RECEDING_DEG, advancing=ADVANCING_DEG, jitter=0.0, seed=0,
                     kappa_rel_error=0.10):
    """(states, increments) tables of a drainage → imbibition → drainage path.

    Each moving increment advances (drainage) or retracts (imbibition) every contact line by a
    distance d (µm) that varies between increments; ``jitter`` > 0 scales it per tube by a factor
    drawn from U(1 − jitter, 1 + jitter), a non-uniform front for which the area-weighted mean κ
    no longer makes the balance exact. The per-increment interval assumes a relative curvature
    error ``kappa_rel_error`` (cos θ ± ε |R_κ|, METHODS.md §3).
    """
    rng = np.random.default_rng(seed)
    n_t = len(RADII_UM)
    plan = ([(d, receding) for d in (22, 15, 30, 18, 25, 12, 28, 20)]   # primary drainage
            + [(0, advancing)]                                          # pinned reversal
            + [(-d, advancing) for d in (20, 26, 14, 24, 18, 30, 16)]   # imbibition
            + [(0, receding)]                                           # pinned reversal
            + [(d, receding) for d in (16, 24, 20)])                    # scanning drainage
    h = np.full(n_t, 20.0)
    theta = receding
    rows = [dict(tube_bundle_exact(RADII_UM, h, theta, LENGTH_UM, BULK_UM3), theta=theta)]
    for d, th in plan:
        factor = rng.uniform(1 - jitter, 1 + jitter, n_t) if jitter else np.ones(n_t)
        h = h + d * factor
        rows.append(dict(tube_bundle_exact(RADII_UM, h, th, LENGTH_UM, BULK_UM3), theta=th))
    states = pd.DataFrame(rows)
    states.insert(0, "step", [f"t{i:02d}" for i in range(len(states))])
    states.insert(1, "time_s", 60.0 * np.arange(len(states)))
    states["curvature_nw_std"] = 0.0
    states["voxel_size_um"] = 2.0

    a, b = states.iloc[:-1].reset_index(drop=True), states.iloc[1:].reset_index(drop=True)
    inc = pd.DataFrame({"step_from": a["step"], "step_to": b["step"], "time_s": b["time_s"]})
    inc["d_a_nw"] = b["a_nw"] - a["a_nw"]
    inc["d_a_ws"] = b["a_ws"] - a["a_ws"]
    inc["d_phi_sw"] = (b["volume_w"] - a["volume_w"]) / BULK_UM3
    inc["kappa_mean"] = 0.5 * (a["curvature_nw"] + b["curvature_nw"])
    inc["porosity"] = b["porosity"]
    moved = inc["d_a_ws"].abs() > 1e-12
    with np.errstate(divide="ignore", invalid="ignore"):
        cos = np.where(moved, (inc["d_a_nw"] + inc["kappa_mean"] * inc["d_phi_sw"])
                       / inc["d_a_ws"], np.nan)
        r_kappa = np.where(moved, inc["kappa_mean"] * inc["d_phi_sw"] / inc["d_a_ws"], np.nan)
    half = kappa_rel_error * np.abs(r_kappa)
    inc["cos_theta_energy"] = cos
    inc["r_kappa"] = r_kappa
    inc["theta_energy_deg"] = np.degrees(np.arccos(np.clip(cos, -1, 1)))
    inc["theta_energy_lo_deg"] = np.degrees(np.arccos(np.clip(cos + half, -1, 1)))
    inc["theta_energy_hi_deg"] = np.degrees(np.arccos(np.clip(cos - half, -1, 1)))
    inc["direction"] = np.where(inc["d_phi_sw"] < 0, "drainage", "imbibition")
    inc["flag_no_wetted_area_change"] = ~moved
    inc["flag_mixed_direction"] = False
    inc["flag_large_step"] = False
    inc["flag_volume_not_conserved"] = False
    for event in ("n_continue", "n_coalesce", "n_breakup", "n_regroup", "n_appear", "n_vanish"):
        inc[event] = 0
    inc["n_continue"] = n_t
    return states, inc


def expected_cos(theta_deg: float) -> float:
    return math.cos(math.radians(theta_deg))
