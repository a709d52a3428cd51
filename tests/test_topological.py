"""Topological (Gauss–Bonnet) contact angle against closed forms.

Closed forms: a spherical cap of n on a plate has ∫_nw K dA = 2π(1 + cos θ_w), χ_n = 1 and one
loop, so the flat formula cos θ_w = 1 − (4πχ_n − ∫_nw K)/(2π N_loops) (Sun et al. 2020, Geophys.
Res. Lett. 47, e2019GL086151; Blunt, Akai & Bijeljic 2020, J. Colloid Interface Sci. 576, 99–108)
is exact.
In a tube the deficit per loop is 2π sin θ_w (menisci are spherical caps of radius r/|cos θ_w|,
METHODS.md §2), so the flat formula reads arccos(1 − sin θ_w) instead of θ_w.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from wetpath import synthetic
from wetpath._topological import corrected_angle, topological_angle

CAPS_R30 = [  # (θ_w, plate normal), sub-voxel offsets drawn from the seed
    (30, (1, 0, 0)), (60, (1, 0, 0)), (75, (1, 0, 0)), (90, (1, 0, 0)), (120, (1, 0, 0)),
    (135, (1, 0, 0)), (45, (1, 0.4, 0.25)), (105, (1, 0.4, 0.25)), (135, (1, 0.4, 0.25)),
    (30, (0.3, 1, 0.5)), (90, (0.3, 1, 0.5)), (120, (0.3, 1, 0.5)),
]


def test_caps_radius_30():
    # Target (issue 5): within 3° for every cap. Measured here over 48 caps of radius 30 (θ_w
    # 30°–135°, three plate normals, two offsets each, σ = 1): rms 0.9°, worst 2.5°, mean
    # +0.2° (rms 1.5°, worst 4.5° with the voxel distance transform as wall distance and the
    # fixed band 3σ … 3σ + 3); these 12: worst 1.3°, mean |error| 0.67°.
    errors = []
    for i, (theta, normal) in enumerate(CAPS_R30):
        labels = synthetic.cap_on_plate(30, theta, normal=normal, seed=200 + i)
        res = topological_angle(labels)
        assert res["flag"] == "ok" and res["clusters_used"] == 1
        errors.append(res["theta_topo_deg"] - theta)
        # flat plate: the corrected form reduces to the flat one (N = 0, G = 2π)
        assert res["theta_topo_corrected_deg"] == pytest.approx(res["theta_topo_deg"], abs=0.5)
    errors = np.abs(errors)
    assert errors.max() <= 3.0, errors
    assert errors.mean() <= 1.0, errors


def test_caps_radius_15_regression_bound():
    # measured here at R = 15 (offsets from these seeds): −2.0°, −1.2°, −0.6°; over 27 caps
    # (θ_w 45°, 90°, 120°, three plate normals, three offsets): rms 1.0°, worst 2.3°, mean
    # −0.45° (before the sub-voxel wall distance: rms 2.2°, worst 5.8°). Bound 3°.
    errors = []
    for i, theta in enumerate((45, 90, 120)):
        labels = synthetic.cap_on_plate(15, theta, seed=300 + i)
        res = topological_angle(labels)
        assert res["flag"] == "ok"
        errors.append(res["theta_topo_deg"] - theta)
    assert np.max(np.abs(errors)) <= 3.0


def test_flat_cap_flagged_unresolved():
    # θ_w = 150°, R = 30: the cap rises R(1 − cos 30°) ≈ 4 voxels, below the band 2.5σ … 2.5σ + 4
    res = topological_angle(synthetic.cap_on_plate(30, 150, seed=7))
    assert res["flag"] == "unresolved"
    assert math.isnan(res["theta_topo_deg"]) and res["clusters_used"] == 0


@pytest.mark.parametrize("theta", [40, 130])
def test_slug_in_tube_flat_fails_corrected_works(theta):
    labels = synthetic.tube_slug(20, theta, 60, seed=theta)
    res = topological_angle(labels)
    assert res["clusters_used"] == 1
    # the flat formula's known failure: deficit 2π sin θ_w per loop → arccos(1 − sin θ_w)
    failure = math.degrees(math.acos(1 - math.sin(math.radians(theta))))
    # (measured 72.3° and 78.3° against 69.1° and 76.5°: the linear band extrapolation of the
    # meniscus' ∫K, which is not linear in the wall distance in a tube, adds ~2–3°)
    assert res["theta_topo_deg"] == pytest.approx(failure, abs=4.0)
    assert abs(res["theta_topo_deg"] - theta) > 25
    # curvature-corrected form (METHODS.md §2): G = 0, N = 4π, T = 4π sin θ_w
    assert res["theta_topo_corrected_deg"] == pytest.approx(theta, abs=5.0)
    row = res["clusters"].iloc[0]
    assert row.normal_curv_solid_line == pytest.approx(4 * math.pi, rel=0.02)
    assert row.geodesic_solid_line == pytest.approx(0.0, abs=0.1)
    assert row.contact_loops == 2 and row.euler_nw_patch == 2 and row.euler_ns_patch == 0


def test_corrected_angle_closed_forms():
    for theta in (20.0, 70.0, 110.0, 160.0):
        tn = math.radians(180 - theta)
        # plate: G = 2π, N = 0, T = 2π cos θ_n
        assert corrected_angle(2 * math.pi * math.cos(tn), 2 * math.pi, 0.0, math.nan) == \
            pytest.approx(theta)
        # tube: G = 0, N = 4π, T = 4π sin θ_n; the hint picks the branch
        hint = math.cos(math.radians(theta))
        assert corrected_angle(4 * math.pi * math.sin(tn), 0.0, 4 * math.pi, hint) == \
            pytest.approx(theta)
    assert math.isnan(corrected_angle(1.0, 0.0, 0.0, 0.5))


def test_pooled_over_clusters_with_interval():
    # two 60° caps (R = 30, different sub-voxel offsets) side by side on one plate
    a = synthetic.cap_on_plate(30, 60, seed=1, pad=8)
    b = synthetic.cap_on_plate(30, 60, seed=2, pad=8)
    labels = np.concatenate([a, b], axis=2)
    res = topological_angle(labels)
    assert res["clusters_used"] == 2
    assert res["theta_topo_deg"] == pytest.approx(60, abs=3.0)
    assert res["theta_topo_lo_deg"] <= res["theta_topo_median_deg"] <= res["theta_topo_hi_deg"]
    assert res["theta_topo_lo_deg"] <= res["theta_topo_deg"] <= res["theta_topo_hi_deg"]
    assert res["clusters"]["used"].sum() == 2


def test_flags_when_undefined():
    assert topological_angle(np.full((6, 6, 6), 2, np.uint8))["flag"] == "no_nonwetting_phase"
    # a cap cut by the array border is not used
    labels = synthetic.cap_on_plate(20, 60, seed=3)[:, :, :25]
    res = topological_angle(labels)
    assert res["flag"] == "no_usable_cluster" and math.isnan(res["theta_topo_deg"])
    assert bool(res["clusters"]["touches_border"].iloc[0])
    # excluded voxels (outside the field of view) count as border too
    labels = synthetic.cap_on_plate(20, 60, seed=3)
    labels[:, :, :12] = 0
    assert topological_angle(labels)["flag"] == "no_usable_cluster"


def _drop_on_grain(grain_radius, drop_radius, theta_w, seed):
    """A spherical n drop on a spherical solid grain, both in w. Two spheres whose centres are D
    apart meet at cos θ_w = (D² − a² − R²)/(2aR) (law of cosines between the two radii at the
    contact circle; θ through w, outside both spheres)."""
    a, r = grain_radius, drop_radius
    dist = math.sqrt(a * a + r * r + 2 * a * r * math.cos(math.radians(theta_w)))
    off = np.random.default_rng(seed).uniform(-0.5, 0.5, 3)
    n = int(2 * r + 10)
    z, y, x = (np.arange(n) - (n - 1) / 2 + o for o in off)
    z, y, x = z[:, None, None], y[None, :, None], x[None, None, :]
    axis = np.array([1.0, 0.3, 0.2]) / np.linalg.norm([1.0, 0.3, 0.2])
    gz, gy, gx = -dist * axis
    labels = np.full((n, n, n), 2, np.uint8)
    labels[z * z + y * y + x * x < r * r] = 3
    labels[(z - gz) ** 2 + (y - gy) ** 2 + (x - gx) ** 2 < a * a] = 1
    return labels


@pytest.mark.parametrize("theta", [40, 110])
def test_drop_on_convex_grain(theta):
    res = topological_angle(_drop_on_grain(60, 25, theta, seed=theta))
    assert res["clusters_used"] == 1
    # the flat formula reads low on a convex grain (METHODS.md §2: 10–40° low); measured here
    # 27.3° for 40° and 83.8° for 110°
    assert res["theta_topo_deg"] < theta - 8
    # the curvature-corrected form (∫ k_n^s ds < 0 on a convex solid): measured 38.3° and 108.4°
    assert res["theta_topo_corrected_deg"] == pytest.approx(theta, abs=3.0)
    assert res["clusters"].iloc[0].normal_curv_solid_line < 0
