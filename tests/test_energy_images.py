"""Energy-balance angle from measured images (Blunt, Lin, Akai & Bijeljic 2019, J. Colloid
Interface Sci. 552, 59–65): voxelised closed-form states measured by :func:`wetpath.measure_state`
(Crofton areas, voxel volumes, mesh curvature), so these tests check the estimator together with the
per-state measurements. Closed forms: a meniscus moving in a tube of radius r keeps ΔA_nw = 0 and
κ = 2 cos θ_w / r, so cos θ_t = cos θ_w and R_κ = cos θ_w; a spherical cap growing at fixed angle
(METHODS.md §3, §5)."""

from __future__ import annotations

import math

import numpy as np
import pytest

import wetpath
from wetpath._energy import energy_balance_angle, family_energy_angles
from wetpath.synthetic import cap_exact, cap_on_plate, tube_meniscus, unit

OFFSET = np.array([0.2, -0.3, 0.1])  # sub-voxel placement shared by both states (same solid)
STEP = 3.7  # apex move in voxels: not an integer, so the two menisci voxelise differently
TILTED_AXIS = tuple(unit((1.0, 0.25, 0.15)))


def tube_pair(radius, theta_w, step, *, axis=(1, 0, 0), shape=None):
    before = tube_meniscus(radius, theta_w, 2.0, axis=axis, shape=shape, offset=OFFSET)
    after = tube_meniscus(radius, theta_w, 2.0 + step, axis=axis, shape=shape, offset=OFFSET)
    assert ((before == 1) == (after == 1)).all()  # the solid does not change
    return wetpath.measure_state(before), wetpath.measure_state(after)


@pytest.mark.parametrize("axis", ["grid", "tilted"])
@pytest.mark.parametrize("theta_w", [30.0, 60.0, 120.0])
@pytest.mark.parametrize("sign", [+1, -1])
def test_tube_meniscus_measured(theta_w, sign, axis):
    # Issue target: within 3° at tube radius ≥ 15 voxels (measured-κ error dominates:
    # dθ = Δκ r / (2 sin θ)). n advances (sign +1): drainage.
    if axis == "grid":
        b, a = tube_pair(15.0, theta_w, sign * STEP)
    else:  # the tube leans ~16° off z; the box is widened so that it stays inside
        b, a = tube_pair(15.0, theta_w, sign * STEP, axis=TILTED_AXIS, shape=(60, 56, 56))
    res = energy_balance_angle(b, a)
    assert res["theta_energy_deg"] == pytest.approx(theta_w, abs=3.0)
    assert res["direction"] == ("drainage" if sign > 0 else "imbibition")
    cos = math.cos(math.radians(theta_w))
    # R_κ = cos θ_w for exact states (ΔA_nw = 0); measured κ and Crofton ΔA_ws move it (a
    # pre-merge run with the lattice and mesh measures: up to 0.08 off, θ still within 1.9°)
    assert res["r_kappa"] == pytest.approx(cos, abs=0.1)
    # ΔV_w = −π r² d (closed form; voxel counts match it to ~0.5 %)
    assert res["d_volume_w"] == pytest.approx(-sign * math.pi * 15.0**2 * STEP, rel=0.02)
    assert not res["flag_volume_not_conserved"] and not res["flag_no_wetted_area_change"]


BUNDLE_RADII = (15.0, 18.0, 21.0)
# one capillary pressure: equal κ in every tube; cos θ_i = κ r_i / 2 (Young–Laplace)
BUNDLE_KAPPA = 2 * math.cos(math.radians(30.0)) / 21.0
BUNDLE_THETA = tuple(math.degrees(math.acos(BUNDLE_KAPPA * r / 2)) for r in BUNDLE_RADII)


def bundle(apex):
    """Three parallel tubes side by side along x, separated by solid walls."""
    side = int(math.ceil(2 * max(BUNDLE_RADII))) + 8
    parts = [tube_meniscus(r, t, apex, shape=(64, side, int(math.ceil(2 * r)) + 8), offset=OFFSET)
             for r, t in zip(BUNDLE_RADII, BUNDLE_THETA, strict=True)]
    return np.concatenate(parts, axis=2)


def test_tube_bundle_global_and_per_tube():
    before, after = bundle(2.0), bundle(2.0 + STEP)
    # Closed form of the bundle: cos θ_t = κ Σ π r_i² d / Σ 2π r_i d = Σ r_i cos θ_i / Σ r_i
    expect = math.degrees(math.acos(
        sum(r * math.cos(math.radians(t)) for r, t in zip(BUNDLE_RADII, BUNDLE_THETA, strict=True))
        / sum(BUNDLE_RADII)))
    res = energy_balance_angle(wetpath.measure_state(before), wetpath.measure_state(after))
    assert res["theta_energy_deg"] == pytest.approx(expect, abs=3.0)
    assert res["direction"] == "drainage"
    # per tube: one cluster each, tracked from before to after
    cb, ca = wetpath.measure_clusters(before), wetpath.measure_clusters(after)
    events = wetpath.track_clusters(before, after)
    fam = family_energy_angles(events, cb, ca)
    assert len(fam) == 3
    x_bounds = np.cumsum([0] + [int(math.ceil(2 * r)) + 8 for r in BUNDLE_RADII])
    for _, row in fam.iterrows():
        child = int(row["children"])
        x = float(ca.set_index("cluster").loc[child, "centroid_x"])
        tube = int(np.searchsorted(x_bounds, x)) - 1
        assert row["theta_energy_deg"] == pytest.approx(BUNDLE_THETA[tube], abs=3.0)
        assert row["direction"] == "drainage"


def growing_cap(theta_w):
    """A cap of n growing from R = 30 to 32 at fixed θ_w on one axis-aligned plate: the sphere
    centre rises by 2 cos θ_w so the plate stays put (grid height of the plate:
    c + off_z − R cos θ_w); both boxes are 73³."""
    off30 = np.array([0.5, 0.1, -0.2])
    off32 = off30 + np.array([2 * math.cos(math.radians(theta_w)), 0.0, 0.0])
    before = cap_on_plate(30, theta_w, pad=6, offset=off30)
    after = cap_on_plate(32, theta_w, pad=4, offset=off32)
    assert ((before == 1) == (after == 1)).all()
    return before, after


# Closed-form step error of the mean-κ rule for this growth: −0.42°, −0.16°, −0.08° (see
# tests/test_energy.py); the rest is measurement. Issue aim: ≤ 4°. R_κ ≈ 4.5 at 60° (METHODS.md §3),
# so a 1 % κ error alone moves θ by ~3° there.
@pytest.mark.parametrize("theta_w", [60.0, 90.0, 120.0])
def test_growing_cap_measured(theta_w):
    before, after = growing_cap(theta_w)
    res = energy_balance_angle(wetpath.measure_state(before), wetpath.measure_state(after))
    assert res["theta_energy_deg"] == pytest.approx(theta_w, abs=4.0)
    assert res["direction"] == "drainage"
    # exact volume change (closed form) and R_κ of the exact states
    dv = cap_exact(32, theta_w)["volume_n"] - cap_exact(30, theta_w)["volume_n"]
    assert -res["d_volume_w"] == pytest.approx(dv, rel=0.02)
    # R_κ of the exact states; measured ΔA_ws on the plate moves it (pre-merge run: 4.92, 2.16,
    # 0.89 against 4.51, 2.00, 0.83, with θ within 2.2°)
    assert res["r_kappa"] == pytest.approx({60.0: 4.5, 90.0: 2.0, 120.0: 0.83}[theta_w], rel=0.15)


@pytest.mark.parametrize("theta_w", [30.0, 60.0, 120.0])
def test_interval_from_perturbed_boundaries_covers_truth(theta_w):
    # ±1-voxel moves of the n–w boundary in each scan (segmentation stand-ins) plus a declared
    # 5 % curvature error (mesh κ of these menisci was 1–5.5 % off before merging) must cover
    # the closed-form angle θ_w.
    from wetpath._energy import perturb_fluid_boundary

    b = tube_meniscus(15.0, theta_w, 2.0, offset=OFFSET)
    a = tube_meniscus(15.0, theta_w, 2.0 + STEP, offset=OFFSET)
    res = energy_balance_angle(
        wetpath.measure_state(b), wetpath.measure_state(a),
        before_perturbed=[wetpath.measure_state(x) for x in perturb_fluid_boundary(b)],
        after_perturbed=[wetpath.measure_state(x) for x in perturb_fluid_boundary(a)],
        kappa_rel_error=0.05)
    assert res["theta_energy_lo_deg"] <= theta_w <= res["theta_energy_hi_deg"]
    assert res["theta_energy_hi_deg"] - res["theta_energy_lo_deg"] < 15.0
