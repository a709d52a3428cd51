"""Summaries: exact counts, chunk invariance, undefined fractions flagged, joined step tables."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from wetpath import WetpathError, ingest_volume
from wetpath._summary import join_states, summarise_labels, summarise_step
from wetpath.synthetic import random_medium


def test_counts_porosity_saturation_match_numpy(tiny_volume):
    s = summarise_labels(tiny_volume, chunks=7)
    counts = np.bincount(tiny_volume.ravel(), minlength=4)  # direct count (numpy)
    assert [s["voxels_excluded"], s["voxels_solid"], s["voxels_wetting"],
            s["voxels_nonwetting"]] == counts.tolist()
    # definitions (common practice): φ = pore / field of view, S_w = wetting / pore
    assert s["porosity"] == (counts[2] + counts[3]) / counts[1:].sum()
    assert s["saturation_w"] == counts[2] / (counts[2] + counts[3])
    assert not s["flag_no_pore_space"]


def test_chunk_invariance_32_64_128(tmp_path):
    labels = random_medium((80, 72, 70), cylinder_fov=True, seed=11)
    np.save(tmp_path / "v.npy", labels)
    rows = []
    for c in (32, 64, 128):
        out = ingest_volume(tmp_path / "v.npy", tmp_path / f"c{c}.zarr", voxel_size_um=2.0,
                            chunks=c)
        rows.append(summarise_step(out, step="v").drop(columns=["settings_sha256"]))
    for other in rows[1:]:
        pd.testing.assert_frame_equal(rows[0], other)
    assert rows[0]["voxels_fov"][0] == np.count_nonzero(labels)


def test_no_pore_space_is_nan_with_flag():
    s = summarise_labels(np.ones((4, 4, 4), np.uint8))
    assert s["porosity"] == 0.0  # all solid: porosity defined, saturation not
    assert np.isnan(s["saturation_w"]) and s["flag_no_pore_space"]
    empty = summarise_labels(np.zeros((4, 4, 4), np.uint8))
    assert np.isnan(empty["porosity"]) and np.isnan(empty["saturation_w"])


def test_non_canonical_values_rejected():
    with pytest.raises(WetpathError, match="non-canonical"):
        summarise_labels(np.full((2, 2, 2), 9, np.uint8))


def _tables(tmp_path, name, rows):
    folder = tmp_path / name
    folder.mkdir()
    files = []
    for row in rows:
        f = folder / f"{row['step']}.csv"
        pd.DataFrame([row]).to_csv(f, index=False)
        files.append(f)
    return files


def test_join_states_adds_tables_and_drops_equal_duplicates(tmp_path):
    times = pd.DataFrame({"step": ["a", "b"], "time_s": [0.0, 60.0]})
    first = _tables(tmp_path, "summaries", [{"step": "b", "porosity": 0.3, "x": 1},
                                            {"step": "a", "porosity": 0.2, "x": 2}])
    second = _tables(tmp_path, "measures", [{"step": "a", "porosity": 0.2, "x": 5, "y": 7},
                                            {"step": "b", "porosity": 0.3, "x": 6, "y": 8}])
    out = join_states(times, first + second)
    assert list(out.columns) == ["step", "time_s", "porosity", "x", "x_measures", "y"]
    assert out["porosity"].tolist() == [0.2, 0.3] and out["x_measures"].tolist() == [5, 6]


def test_join_states_errors(tmp_path):
    times = pd.DataFrame({"step": ["a", "b"], "time_s": [0.0, 60.0]})
    files = _tables(tmp_path, "summaries", [{"step": "a", "shape_z": 4, "shape_y": 4,
                                             "shape_x": 4}])
    with pytest.raises(WetpathError, match=r"steps missing \['b'\]"):
        join_states(times, files, series="exp")
    more = _tables(tmp_path, "other", [{"step": "a", "shape_z": 4, "shape_y": 4, "shape_x": 4},
                                       {"step": "b", "shape_z": 5, "shape_y": 4,
                                        "shape_x": 4}])
    with pytest.raises(WetpathError, match="different shapes within one series: step b"):
        join_states(times, more, series="exp")
