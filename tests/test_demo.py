"""The embedded demo series: layout of the contract, determinism, and the displacement physics
it must contain (drainage then imbibition, coalescence, break-up, trapped ganglia, clusters on
which contact angles can be measured).

Reference tools, independent of wetpath: ``scipy.ndimage.label`` (clusters), ``numpy`` overlap
counts (events), ``skimage.filters.threshold_otsu`` (Otsu 1979, IEEE Trans. Syst. Man Cybern.
9, 62–66) and ``skimage.registration.phase_cross_correlation`` (Guizar-Sicairos et al. 2008,
Opt. Lett. 33, 156).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
import tifffile
from scipy import ndimage

from wetpath import WetpathError
from wetpath._demo import write_demo_series

SIZE = 112  # below the default (144) for the test budget; smaller fields of view hold too few
# pores for ganglia that clear its border
SEED = 2026
FULL = np.ones((3, 3, 3), dtype=bool)  # 26-connectivity, the project's default for n clusters


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    return write_demo_series(tmp_path_factory.mktemp("demo") / "series", seed=SEED, size=SIZE)


@pytest.fixture(scope="module")
def labels(demo) -> list[np.ndarray]:
    names = [row["file"] for row in _times(demo / "labels")]
    return [tifffile.imread(demo / "labels" / n) for n in names]


@pytest.fixture(scope="module")
def scenario(demo) -> dict:
    return json.loads((demo / "scenario.json").read_text())


def _times(folder: Path) -> list[dict]:
    with open(folder / "times.csv", newline="") as fh:
        return list(csv.DictReader(fh))


def _saturation_w(lab: np.ndarray) -> float:
    return np.count_nonzero(lab == 2) / np.count_nonzero(lab >= 2)


def _clusters(lab: np.ndarray) -> tuple[np.ndarray, int]:
    return ndimage.label(lab == 3, structure=FULL)


def _overlap_events(a: np.ndarray, b: np.ndarray) -> tuple[int, int]:
    """(coalescences, break-ups) between two cluster-label volumes by voxel overlap: a cluster of b
    overlapping several clusters of a, a cluster of a overlapping several clusters of b."""
    both = (a > 0) & (b > 0)
    pairs = np.unique(np.stack([a[both], b[both]]), axis=1)
    _, parents_per_child = np.unique(pairs[1], return_counts=True)
    _, children_per_parent = np.unique(pairs[0], return_counts=True)
    return int(np.sum(parents_per_child > 1)), int(np.sum(children_per_parent > 1))


def _inner_clusters(lab: np.ndarray) -> list[np.ndarray]:
    """n clusters that touch the solid and touch neither the excluded region nor a z face."""
    cl, n = _clusters(lab)
    border = ndimage.binary_dilation(lab == 0, FULL)
    border[0] = border[-1] = True
    near_solid = ndimage.binary_dilation(lab == 1, FULL)
    on_border = set(np.unique(cl[border]))
    at_solid = set(np.unique(cl[near_solid]))
    return [cl == i for i in range(1, n + 1) if i not in on_border and i in at_solid]


def test_layout_follows_the_contract(demo, scenario):
    # DEMO_CONTRACT.md: labels/, grayscale/ (dry + steps), times.csv with step,time_s,file
    steps = _times(demo / "labels")
    assert list(steps[0]) == ["step", "time_s", "file"]
    names = [row["step"] for row in steps]
    assert names == [f"step_{k:03d}" for k in range(len(steps))]
    assert [row["file"] for row in steps] == [f"{n}.tif" for n in names]
    times = np.array([float(row["time_s"]) for row in steps])
    assert times[0] == 0 and np.all(np.diff(times) > 0)
    assert _times(demo / "grayscale") == steps
    assert (demo / "grayscale" / "dry.tif").is_file()
    for folder in ("labels", "grayscale"):
        files = sorted(p.name for p in (demo / folder).glob("step_*.tif"))
        assert files == [f"{n}.tif" for n in names]
    keys = ("seed", "size", "voxel_size_um", "interfacial_tension_n_per_m", "scenario", "steps")
    assert set(keys) <= set(scenario)
    assert scenario["seed"] == SEED and scenario["size"] == SIZE and scenario["synthetic"] is True
    assert [s["step"] for s in scenario["steps"]] == names
    assert {s["kind"] for s in scenario["steps"]} == {"drainage", "imbibition"}
    # no temporary sibling left behind by the atomic write
    assert sorted(p.name for p in demo.parent.iterdir()) == [demo.name]


def test_label_volumes_are_canonical_in_a_cylinder(demo, labels):
    assert 10 <= len(labels) <= 16
    with tifffile.TiffFile(demo / "labels" / "step_000.tif") as tif:
        assert len(tif.pages) == SIZE  # multi-page TIFF, one page per z plane
    n = SIZE
    y, x = np.mgrid[:n, :n] - (n - 1) / 2
    outside = y**2 + x**2 > ((n - 1) / 2) ** 2  # the inscribed cylinder, axis z
    for lab in labels:
        assert lab.dtype == np.uint8 and lab.shape == (n, n, n)
        assert set(np.unique(lab)) <= {0, 1, 2, 3}
        assert np.all(lab[:, outside] == 0) and np.all(lab[:, ~outside] > 0)
    solid = [lab == 1 for lab in labels]
    assert all(np.array_equal(solid[0], s) for s in solid[1:])  # the rock does not move


def test_porosity_is_sandstone_like(labels):
    lab = labels[0]
    porosity = np.count_nonzero(lab >= 2) / np.count_nonzero(lab > 0)
    # clean, well-sorted sandstones span roughly 0.25–0.38 (trade knowledge, from memory); the
    # field of view is a little more porous than the whole simulated box (0.35)
    assert 0.25 <= porosity <= 0.38
    # the pore space is one connected network (isolated pores hold under 2 % of it)
    pores, _ = ndimage.label(lab >= 2, structure=FULL)
    sizes = np.bincount(pores.ravel())[1:]
    assert sizes.max() / sizes.sum() > 0.98


def test_drainage_then_imbibition(labels, scenario):
    kinds = [s["kind"] for s in scenario["steps"]]
    n_drain = kinds.count("drainage")
    assert kinds == ["drainage"] * n_drain + ["imbibition"] * (len(kinds) - n_drain)
    assert 7 <= n_drain <= 9 and 5 <= len(kinds) - n_drain <= 7
    sw = np.array([_saturation_w(lab) for lab in labels])
    np.testing.assert_allclose([s["saturation_w"] for s in scenario["steps"]], sw, atol=1e-6)
    assert sw[0] == 1.0  # brine-saturated before the oil arrives
    assert np.all(np.diff(sw[:n_drain]) < 0)
    assert np.all(np.diff(sw[n_drain - 1:]) > 0)
    assert sw[n_drain - 1] < 0.35 and sw[-1] < 0.8  # oil is left behind: residual saturation
    # the design capillary pressure rises in drainage and falls in imbibition (P_c = 2σ/R)
    pc = np.array([s["design_pc_pa"] for s in scenario["steps"][1:]])
    assert np.all(np.diff(pc[:n_drain - 1]) >= 0) and np.all(np.diff(pc[n_drain - 1:]) < 0)


def test_clusters_coalesce_and_break_up(labels):
    clusters = [_clusters(lab)[0] for lab in labels]
    events = [_overlap_events(a, b) for a, b in zip(clusters, clusters[1:], strict=False)]
    assert any(c > 0 for c, _ in events), events
    assert any(b > 0 for _, b in events), events


def test_imbibition_leaves_trapped_ganglia(labels, scenario):
    n_drain = [s["kind"] for s in scenario["steps"]].count("drainage")
    before, last = labels[-2], labels[-1]
    inner = _inner_clusters(last)
    # disconnected oil clusters that touch the grains but not the field-of-view border: contact
    # angles can be measured on them
    assert len(inner) >= 1
    # trapped: they stay exactly as they were (oil cut off from the inlet cannot move)
    for ganglion in _inner_clusters(before):
        assert np.all(last[ganglion] == 3)
    # more n clusters after imbibition than at the end of drainage
    assert _clusters(last)[1] > _clusters(labels[n_drain - 1])[1]


def test_states_are_resolved_enough_for_mesh_curvature(labels, scenario):
    # The mesh curvature is read on n–w vertices at least 4σ (4 voxels at σ = 1) from the solid
    # (METHODS.md); the demo's menisci must rise above that band on both branches. Reference
    # check with an independent tool: scipy's Euclidean distance transform of the solid gives
    # the height of the n–w interface voxels above the grains.
    from wetpath import measure_state

    kinds = [s["kind"] for s in scenario["steps"]]
    n_drain = kinds.count("drainage")
    solid_dist = ndimage.distance_transform_edt(labels[0] != 1)
    inner = ndimage.distance_transform_edt(labels[0] > 0) > 8
    r_min_um = min(s["capillary_radius_um"] for s in scenario["steps"][1:])
    for k in (1, n_drain - 1, n_drain + 1, len(labels) - 1):
        lab = labels[k]
        oil = lab == 3
        # oil voxels next to brine, away from the unseen rock outside the field of view
        nw = oil & ndimage.binary_dilation(lab == 2, FULL) & inner
        assert solid_dist[nw].max() > 6.0, (k, solid_dist[nw].max())
        m = measure_state(lab, scenario["voxel_size_um"])
        assert np.isfinite(m["curvature_nw"]) and m["curvature_nw"] > 0, (k, m["curvature_nw"])
        # design rule: every meniscus is a ball surface of some scan's capillary radius R, κ = 2/R
        # (closed form of a sphere), so the mean κ stays below 2/R_min of the smallest R used;
        # 1.5 leaves room for the estimator's scatter on corner menisci
        assert m["curvature_nw"] < 1.5 * 2 / r_min_um, (k, m["curvature_nw"], 2 / r_min_um)


def test_same_seed_same_bytes_other_seed_other_rock(demo, tmp_path):
    again = write_demo_series(tmp_path / "again", seed=SEED, size=SIZE)
    files = sorted(p.relative_to(demo) for p in demo.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(again) for p in again.rglob("*") if p.is_file())
    for f in files:
        assert (demo / f).read_bytes() == (again / f).read_bytes(), f
    one = write_demo_series(tmp_path / "one", seed=SEED, size=48, grayscale=False)
    other = write_demo_series(tmp_path / "other", seed=SEED + 1, size=48, grayscale=False)
    assert not (other / "grayscale").exists()
    a = tifffile.imread(one / "labels" / "step_000.tif")
    b = tifffile.imread(other / "labels" / "step_000.tif")
    assert np.mean(a != b) > 0.1


def test_rewrites_an_earlier_demo_but_not_other_folders(tmp_path):
    target = write_demo_series(tmp_path / "d", seed=3, size=48, grayscale=False)
    write_demo_series(target, seed=4, size=48, grayscale=False)
    assert json.loads((target / "scenario.json").read_text())["seed"] == 4
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d"]
    precious = tmp_path / "precious"
    precious.mkdir()
    (precious / "data.txt").write_text("keep")
    with pytest.raises(WetpathError, match="precious.*not an earlier demo series"):
        write_demo_series(precious, size=48)
    assert [p.name for p in precious.iterdir()] == ["data.txt"]
    with pytest.raises(WetpathError, match="size must be at least 48"):
        write_demo_series(tmp_path / "tiny", size=20)
    assert not (tmp_path / "tiny").exists()


def test_dry_scan_otsu_recovers_the_solid(demo, labels):
    from skimage.filters import threshold_otsu

    dry = tifffile.imread(demo / "grayscale" / "dry.tif")
    assert dry.dtype == np.uint16 and dry.shape == labels[0].shape
    fov = labels[0] > 0
    assert np.all(dry[~fov] == 0)
    solid = dry > threshold_otsu(dry[fov])
    accuracy = np.mean(solid[fov] == (labels[0][fov] == 1))
    assert accuracy > 0.97, accuracy
    # the scan is noisy: grey levels inside the grains spread by more than 2 % of their mean
    core = ndimage.binary_erosion(labels[0] == 1, iterations=2)
    assert dry[core].std() > 0.02 * dry[core].mean()


def test_wet_scans_are_shifted_and_show_three_phases(demo, labels, scenario):
    from skimage.registration import phase_cross_correlation

    dry = tifffile.imread(demo / "grayscale" / "dry.tif").astype(np.float64)
    shifts = np.array([s["grayscale_shift_zyx_vox"] for s in scenario["steps"]])
    assert np.abs(shifts).max() >= 1.0  # registration matters
    fov = labels[0] > 0
    inner = ndimage.binary_erosion(fov, iterations=4)
    # compare inside the cylinder: its fixed edge would pin a correlation peak at zero shift
    side = int(SIZE / 2 - (SIZE - 1) / (2 * np.sqrt(2))) + 2  # within the square inside the disc
    box = (slice(6, -6), slice(side, -side), slice(side, -side))
    for k in (0, len(labels) // 2, len(labels) - 1):
        wet = tifffile.imread(demo / "grayscale" / f"step_{k:03d}.tif").astype(np.float64)
        # a noiseless scene painted from the labels with each phase's median grey in the scan
        paint = np.zeros(4)
        for p in (1, 2, 3):
            if (labels[k] == p).any():
                paint[p] = np.median(wet[labels[k] == p])
        scene = paint[labels[k]]

        # the declared translation fits the scan better than no shift or half a voxel off
        def fit(shift, wet=wet, scene=scene):
            moved = ndimage.shift(scene, shift, order=1)
            return np.corrcoef(moved[box].ravel(), wet[box].ravel())[0, 1]

        best = fit(shifts[k])
        for axis in range(3):
            for step in (-0.5, 0.5):
                assert best > fit(shifts[k] + step * np.eye(3)[axis])
        # a standard registration recovers it to half a voxel
        found, _, _ = phase_cross_correlation(wet[box], dry[box], upsample_factor=10,
                                              normalization=None)
        np.testing.assert_allclose(found, shifts[k], atol=0.5)
        back = ndimage.shift(wet, -shifts[k], order=1)
        means = [back[inner & (labels[k] == p)].mean() for p in (1, 2, 3) if (labels[k] == p).any()]
        assert means == sorted(means, reverse=True)  # grain brightest, then brine, then oil
