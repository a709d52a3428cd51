"""Energy-balance angle on closed-form states (Blunt, Lin, Akai & Bijeljic 2019, J. Colloid
Interface Sci. 552, 59–65; METHODS.md §3). States are built from exact areas, volumes and
curvatures, so these tests check the estimator's arithmetic, interval and flags, not image
measurement (that is tests/test_energy_images.py)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from wetpath import WetpathError
from wetpath._codes import NONWETTING, SOLID
from wetpath._energy import energy_balance_angle, family_energy_angles, perturb_fluid_boundary
from wetpath.synthetic import ball, cap_exact, meniscus_exact

TUBE_LENGTH = 200.0
BULK = 1.0e6


def tube_state(radius, theta_w, apex, *, length=TUBE_LENGTH):
    """Exact state of a capillary tube (radius r, axis length L) holding n below a spherical
    meniscus whose contact line sits at axial position ``apex`` (closed form of a tube meniscus:
    de Gennes, Brochard-Wyart & Quéré 2004, ch. 1; ``synthetic.meniscus_exact``). Only differences
    between states matter, so the constant volume of the meniscus cap is left out."""
    m = meniscus_exact(radius, theta_w)
    pore = math.pi * radius**2 * length
    vn = math.pi * radius**2 * apex
    return {"bulk_volume": BULK, "pore_volume": pore, "volume_n": vn, "volume_w": pore - vn,
            "area_nw": m["area_nw"], "area_ns": 2 * math.pi * radius * apex,
            "area_ws": 2 * math.pi * radius * (length - apex), "curvature_nw": m["curvature_nw"]}


def cap_state(radius, theta_w, *, plate=1.0e5, pore=5.0e5):
    """Exact state of a spherical cap of n on a flat plate (METHODS.md §5, ``cap_exact``)."""
    e = cap_exact(radius, theta_w)
    return {"bulk_volume": BULK, "pore_volume": pore, "volume_n": e["volume_n"],
            "volume_w": pore - e["volume_n"], "area_nw": e["area_nw"], "area_ns": e["area_ns"],
            "area_ws": plate - e["area_ns"], "curvature_nw": e["curvature_nw"]}


def add(*states):
    """Sum of extensive quantities; κ as the area-weighted mean (what Σ κ dA / Σ dA gives)."""
    out = {k: sum(s[k] for s in states) for k in states[0] if k != "curvature_nw"}
    out["curvature_nw"] = (sum(s["curvature_nw"] * s["area_nw"] for s in states)
                           / sum(s["area_nw"] for s in states))
    return out


@pytest.mark.parametrize("theta_w", [30.0, 60.0, 120.0])
@pytest.mark.parametrize("step", [+5.0, -5.0])
def test_tube_meniscus_exact(theta_w, step):
    # Closed form: ΔA_nw = 0, ΔV_w = −π r² d, ΔA_ws = −2π r d, κ = 2 cos θ / r → cos θ_t = cos θ_w
    # exactly, R_κ = κ ΔV_w / ΔA_ws = cos θ_w (Blunt et al. 2019).
    r = 20.0
    res = energy_balance_angle(tube_state(r, theta_w, 80.0), tube_state(r, theta_w, 80.0 + step))
    assert res["theta_energy_deg"] == pytest.approx(theta_w, abs=1e-9)
    assert res["r_kappa"] == pytest.approx(math.cos(math.radians(theta_w)), abs=1e-12)
    # n advances (d > 0): S_w falls → drainage
    assert res["direction"] == ("drainage" if step > 0 else "imbibition")
    assert res["d_volume_w"] == pytest.approx(-math.pi * r * r * step)
    assert res["d_phi_sw"] == pytest.approx(res["d_volume_w"] / BULK)
    assert res["d_a_ws"] == pytest.approx(-2 * math.pi * r * step / BULK)
    flags = [k for k, v in res.items() if k.startswith("flag_") and v]
    assert flags == []


# Error of the mean-κ rule for a cap growing R = 30 → 32 at fixed angle, from the closed forms
# (derived here; METHODS.md §3 gives ~59° for a 10 % growth at 60°, which the second check repeats).
CAP_STEP_ERROR_DEG = {60.0: 0.42, 90.0: 0.16, 120.0: 0.08}


@pytest.mark.parametrize("theta_w", [60.0, 90.0, 120.0])
def test_growing_cap_step_error(theta_w):
    res = energy_balance_angle(cap_state(30, theta_w), cap_state(32, theta_w))
    err = res["theta_energy_deg"] - theta_w
    # regression bound; measured −0.41° / −0.16° / −0.08°
    assert -CAP_STEP_ERROR_DEG[theta_w] - 0.01 <= err <= 0
    assert res["direction"] == "drainage"
    assert not res["flag_large_step"]  # κ changes by 6.25 %
    # R_κ ≈ 4.5 at 60°, 2 at 90°, 0.8 at 120° (METHODS.md §3)
    assert res["r_kappa"] == pytest.approx({60.0: 4.5, 90.0: 2.0, 120.0: 0.83}[theta_w], rel=0.01)


def test_growing_cap_ten_percent_and_single_state_curvature():
    # METHODS.md §3: a 60° cap growing 10 %: κ̄ gives ~59°, either state's κ alone 43° or 73°.
    b, a = cap_state(30, 60.0), cap_state(33, 60.0)
    assert energy_balance_angle(b, a)["theta_energy_deg"] == pytest.approx(59.1, abs=0.2)
    only_before = energy_balance_angle(b, {**a, "curvature_nw": b["curvature_nw"]})
    only_after = energy_balance_angle({**b, "curvature_nw": a["curvature_nw"]}, a)
    assert sorted([only_before["theta_energy_deg"], only_after["theta_energy_deg"]]) == \
        pytest.approx([43.0, 73.0], abs=2.0)
    # the reported step spread says how far cos moves with either state's κ
    res = energy_balance_angle(b, a)
    assert res["cos_step_spread"] == pytest.approx(
        abs(math.cos(math.radians(only_before["theta_energy_deg"])) - res["cos_theta_energy"]),
        rel=1e-9)


def test_tube_bundle_global_is_wall_weighted_mean_cosine():
    # Tubes of radii r_i at one capillary pressure (equal κ): cos θ_i = κ r_i / 2 (Young–Laplace).
    # Moving each meniscus by d: cos θ_t = κ Σ π r_i² d / Σ 2π r_i d = Σ r_i cos θ_i / Σ r_i.
    radii = (15.0, 20.0, 25.0)
    kappa = 2 * math.cos(math.radians(30.0)) / 25.0
    thetas = [math.degrees(math.acos(kappa * r / 2)) for r in radii]
    before = add(*(tube_state(r, t, 60.0) for r, t in zip(radii, thetas, strict=True)))
    after = add(*(tube_state(r, t, 64.0) for r, t in zip(radii, thetas, strict=True)))
    expect = sum(r * math.cos(math.radians(t))
                 for r, t in zip(radii, thetas, strict=True)) / sum(radii)
    res = energy_balance_angle(before, after)
    assert res["cos_theta_energy"] == pytest.approx(expect, rel=1e-12)


def blocks_of(states):
    """Per-block table (block = one state dict)."""
    return pd.DataFrame([{"block": i, "volume_w": s["volume_w"], "volume_n": s["volume_n"],
                          "pore_volume": s["pore_volume"], "bulk_volume": s["bulk_volume"],
                          "area_nw": s["area_nw"], "area_ws": s["area_ws"], "area_ns": s["area_ns"],
                          "curv_area_nw": s["curvature_nw"] * s["area_nw"],
                          "curv_weight_nw": s["area_nw"]} for i, s in enumerate(states)])


def with_blocks(states):
    total = add(*states)
    total["blocks"] = blocks_of(states)
    return total


def noisy_bundle(seed, n=48, theta_w=60.0, r=20.0):
    """n identical tubes (one per block), menisci moved by random steps, with independent
    per-block measurement noise on areas (±60 area units) and curvature (±5 %)."""
    rng = np.random.default_rng(seed)
    before, after = [], []
    for _ in range(n):
        d = rng.uniform(1.0, 8.0)
        for out, apex in ((before, 60.0), (after, 60.0 + d)):
            s = tube_state(r, theta_w, apex)
            s["area_ws"] += rng.normal(0, 60)
            s["area_nw"] += rng.normal(0, 60)
            s["curvature_nw"] *= 1 + rng.normal(0, 0.05)
            out.append(s)
    return with_blocks(before), with_blocks(after)


def test_bootstrap_interval_covers_truth():
    # Truth: θ_w = 60° in every tube (closed form above). A 95 % interval should contain it in most
    # noisy realisations (bootstrap percentile interval: Efron & Tibshirani 1993).
    hits, widths = 0, []
    for seed in range(20):
        b, a = noisy_bundle(seed)
        res = energy_balance_angle(b, a, n_boot=400, seed=seed)
        lo, hi = res["theta_energy_lo_deg"], res["theta_energy_hi_deg"]
        assert lo <= res["theta_energy_deg"] <= hi
        hits += lo <= 60.0 <= hi
        widths.append(hi - lo)
    assert hits >= 16, hits
    assert 0.5 < np.median(widths) < 20
    # block tables without curvature sums: κ is not resampled, the interval narrows but exists
    b, a = noisy_bundle(0)
    for s in (b, a):
        s["blocks"] = s["blocks"].drop(columns=["curv_area_nw", "curv_weight_nw"])
    res = energy_balance_angle(b, a, n_boot=200)
    assert res["theta_energy_lo_deg"] < res["theta_energy_deg"] < res["theta_energy_hi_deg"]


def test_bootstrap_is_paired_and_exact_case_has_zero_width():
    # Without noise every block gives the same angle, so every replicate does: zero width.
    states_b = [tube_state(20.0, 60.0, 60.0) for _ in range(8)]
    states_a = [tube_state(20.0, 60.0, 60.0 + d) for d in range(1, 9)]
    res = energy_balance_angle(with_blocks(states_b), with_blocks(states_a), n_boot=200)
    assert res["theta_energy_lo_deg"] == pytest.approx(60.0, abs=1e-6)
    assert res["theta_energy_hi_deg"] == pytest.approx(60.0, abs=1e-6)


def test_perturbed_states_widen_interval_in_quadrature():
    # No blocks → the interval comes from the perturbed pairs only: [cos − p, cos + p].
    b, a = tube_state(20.0, 60.0, 60.0), tube_state(20.0, 60.0, 65.0)
    b_dil = {**b, "curvature_nw": b["curvature_nw"] * 1.05}
    a_dil = {**a, "curvature_nw": a["curvature_nw"] * 1.05}
    res = energy_balance_angle(b, a, before_perturbed=[b_dil], after_perturbed=[a_dil])
    # a +5 % κ error shifts cos by ε R_κ = 0.05 · cos 60° (METHODS.md §3); the perturbation is
    # shared by both states (same segmentation settings for every scan): one pair (b', a')
    p = 0.05 * 0.5
    assert res["theta_energy_lo_deg"] == pytest.approx(math.degrees(math.acos(0.5 + p)), abs=1e-9)
    assert res["theta_energy_hi_deg"] == pytest.approx(math.degrees(math.acos(0.5 - p)), abs=1e-9)
    assert res["n_perturbed"] == 1
    only = energy_balance_angle(b, a)
    assert math.isnan(only["theta_energy_lo_deg"])  # no source of spread → no interval
    # a 5 % systematic κ error declared by the caller gives the same half-width
    declared = energy_balance_angle(b, a, kappa_rel_error=0.05)
    assert declared["theta_energy_hi_deg"] == pytest.approx(res["theta_energy_hi_deg"])
    one = energy_balance_angle(b, a, before_perturbed=[b_dil])
    assert one["theta_energy_lo_deg"] == pytest.approx(math.degrees(math.acos(0.5 + p / 2)))


def test_flag_no_wetted_area_change():
    # A free n ball in w shrinking (no solid contact): ΔA_ws = 0 → θ undefined.
    def free_ball(R):
        return {"bulk_volume": BULK, "pore_volume": BULK, "volume_n": 4 / 3 * math.pi * R**3,
                "volume_w": BULK - 4 / 3 * math.pi * R**3, "area_nw": 4 * math.pi * R**2,
                "area_ws": 0.0, "area_ns": 0.0, "curvature_nw": 2 / R}
    res = energy_balance_angle(free_ball(20), free_ball(19))
    assert res["flag_no_wetted_area_change"] and math.isnan(res["theta_energy_deg"])
    assert res["direction"] == "imbibition"
    noisy = energy_balance_angle(tube_state(20, 60, 60), tube_state(20, 60, 60.5), area_noise=100.0)
    assert noisy["flag_no_wetted_area_change"] and math.isnan(noisy["theta_energy_deg"])


def test_flag_mixed_direction():
    # Two tubes: one drains by 8, the other imbibes by 7.5 — net ΔV_w small vs the opposing moves.
    b = [tube_state(20, 60, 60), tube_state(20, 60, 60)]
    a = [tube_state(20, 60, 68), tube_state(20, 60, 52.5)]
    res = energy_balance_angle(with_blocks(b), with_blocks(a))
    assert res["flag_mixed_direction"]
    same = energy_balance_angle(with_blocks(b), with_blocks([tube_state(20, 60, 68),
                                                             tube_state(20, 60, 61)]))
    assert not same["flag_mixed_direction"]


def test_flag_volume_not_conserved_on_pore_drift():
    # Registration drift: the pore space grows by 2 % between scans, so ΔV_n ≠ −ΔV_w.
    b, a = tube_state(20, 60, 60), tube_state(20, 60, 64)
    a["pore_volume"] *= 1.02
    a["volume_w"] = a["pore_volume"] - a["volume_n"]
    assert energy_balance_angle(b, a)["flag_volume_not_conserved"]


def test_flags_large_step_out_of_range_and_undefined():
    b, a = tube_state(20, 60, 60), tube_state(20, 60, 64)
    big = energy_balance_angle(b, {**a, "curvature_nw": a["curvature_nw"] * 1.5})
    assert big["flag_large_step"]
    wild = energy_balance_angle(b, {**a, "curvature_nw": a["curvature_nw"] * 4})
    assert wild["flag_cos_out_of_range"] and math.isnan(wild["theta_energy_deg"])
    assert wild["cos_theta_energy"] > 1  # the raw ratio is kept, not clipped
    dry = {**b, "volume_n": 0.0, "volume_w": b["pore_volume"], "area_nw": 0.0, "area_ns": 0.0,
           "area_ws": 2 * math.pi * 20 * TUBE_LENGTH, "curvature_nw": math.nan}
    res = energy_balance_angle(dry, a)
    assert res["flag_curvature_undefined"] and res["flag_no_nonwetting"]
    assert math.isnan(res["theta_energy_deg"]) and res["direction"] == "drainage"


def test_bad_input_errors():
    b = tube_state(20, 60, 60)
    with pytest.raises(WetpathError, match="no 'area_ws'"):
        energy_balance_angle(b, {k: v for k, v in b.items() if k != "area_ws"})
    bb = with_blocks([b, b])
    ba = with_blocks([b, b, b])
    with pytest.raises(WetpathError, match="different sub-volume blocks"):
        energy_balance_angle(bb, ba)


def cluster_table(states, touches_border=False):
    return pd.DataFrame([{"cluster": i + 1, "volume": s["volume_n"], "area_nw": s["area_nw"],
                          "area_ns": s["area_ns"], "curvature_nw": s["curvature_nw"],
                          "curv_area_nw": s["curvature_nw"] * s["area_nw"],
                          "curv_weight_nw": s["area_nw"], "touches_border": touches_border}
                         for i, s in enumerate(states)])


def test_family_angles_per_tube_and_flags():
    # One cluster per tube at equal κ: locally cos θ = (ΔA_nw − κ̄ ΔV_n)/(−ΔA_ns) = κ r / 2.
    radii = (15.0, 20.0, 25.0)
    kappa = 2 * math.cos(math.radians(30.0)) / 25.0
    thetas = [math.degrees(math.acos(kappa * r / 2)) for r in radii]
    tb = cluster_table([tube_state(r, t, 60.0) for r, t in zip(radii, thetas, strict=True)], True)
    ta = cluster_table([tube_state(r, t, 63.0) for r, t in zip(radii, thetas, strict=True)], True)
    # a trapped ganglion (4) dissolving: loses 10 % of its volume without touching the border
    trapped = {"cluster": 4, "volume": 5000.0, "area_nw": 1400.0, "area_ns": 300.0,
               "curvature_nw": 0.1, "curv_area_nw": 140.0, "curv_weight_nw": 1400.0,
               "touches_border": False}
    tb = pd.concat([tb, pd.DataFrame([trapped])], ignore_index=True)
    ta = pd.concat([ta, pd.DataFrame([{**trapped, "volume": 4500.0, "area_ns": 280.0,
                                        "area_nw": 1320.0, "curv_area_nw": 137.0}])],
                   ignore_index=True)
    ta = pd.concat([ta, pd.DataFrame([{**trapped, "cluster": 5}])], ignore_index=True)
    events = pd.DataFrame({"event": ["move", "move", "move", "move", "appear"],
                           "parents": ["1", "2", "3", "4", ""],
                           "children": ["1", "2", "3", "4", "5"]})
    fam = family_energy_angles(events, tb, ta)
    assert fam["theta_energy_deg"][:3].to_numpy() == pytest.approx(thetas, abs=1e-9)
    assert (fam["direction"][:3] == "drainage").all()
    assert not fam["flag_volume_not_conserved"][:3].any()  # they touch the border (inflow)
    assert fam["flag_volume_not_conserved"][3]
    assert fam["flag_curvature_undefined"][4] and math.isnan(fam["theta_energy_deg"][4])
    # no curv_* columns: κ from the area-weighted cluster curvatures gives the same here
    fam2 = family_energy_angles(events, tb.drop(columns=["curv_area_nw", "curv_weight_nw"]),
                                ta.drop(columns=["curv_area_nw", "curv_weight_nw"]))
    assert fam2["theta_energy_deg"][:3].to_numpy() == pytest.approx(thetas, abs=1e-9)
    with pytest.raises(WetpathError, match="missing from the before cluster table"):
        family_energy_angles(pd.DataFrame({"event": ["move"], "parents": ["9"], "children": ["1"]}),
                             tb, ta)


def test_perturb_fluid_boundary_moves_nw_boundary_only():
    # A ball of n (R = 10) in w: dilating by one voxel adds about the shell 4πR² · 1 (closed form,
    # face-connected growth of a digital ball: within 25 %), eroding removes about as much; the
    # solid is untouched.
    labels = ball(10.0, seed=1)
    labels[:2] = SOLID
    dilated, eroded = perturb_fluid_boundary(labels)
    n0 = (labels == NONWETTING).sum()
    shell = 4 * math.pi * 10.0**2
    assert (dilated == NONWETTING).sum() - n0 == pytest.approx(shell, rel=0.25)
    assert n0 - (eroded == NONWETTING).sum() == pytest.approx(shell, rel=0.25)
    assert ((dilated == SOLID) == (labels == SOLID)).all()
    assert ((eroded == SOLID) == (labels == SOLID)).all()
    with pytest.raises(WetpathError, match="voxels must be a positive integer"):
        perturb_fluid_boundary(labels, voxels=0)


@pytest.mark.parametrize("depth", [1, 4, 7, 64])
def test_perturbed_view_measures_equal_the_whole_perturbed_copy(tmp_path, depth):
    # Oracle: the whole-array perturbation (itself checked against scipy.ndimage dilation in
    # test_fast_paths). Read box by box from a zarr store, slab depths that do not divide the
    # shape, n and w touching every array face and excluded voxels: the lattice measures of the
    # streamed copy are exactly those of the whole copy.
    import zarr

    from wetpath._energy import PerturbedView
    from wetpath._lattice import lattice_measures

    rng = np.random.default_rng(7)
    labels = rng.choice(np.array([0, 1, 2, 3], np.uint8), size=(23, 17, 19),
                        p=[0.05, 0.25, 0.35, 0.35])
    store = zarr.open_array(tmp_path / "labels.zarr", mode="w", shape=labels.shape,
                            chunks=(5, 6, 7), dtype=np.uint8)
    store[...] = labels
    for kind, whole in zip(("dilated", "eroded"), perturb_fluid_boundary(labels), strict=True):
        for source in (store, labels):
            view = PerturbedView(source, kind)
            np.testing.assert_array_equal(view[...], whole)
            np.testing.assert_array_equal(view[0:1, 16:, 3:11], whole[0:1, 16:, 3:11])
            np.testing.assert_array_equal(view[22:], whole[22:])
        got = lattice_measures(PerturbedView(store, kind), chunks=depth, block=8, threads=2)
        ref = lattice_measures(whole, block=8, threads=1)
        pd.testing.assert_frame_equal(got.pop("blocks"), ref.pop("blocks"), check_exact=True)
        assert got == ref
    with pytest.raises(WetpathError, match="kind must be"):
        PerturbedView(labels, "shifted")
