"""Grayscale path: registration recovers a known shift; segmentation recovers known labels."""

from __future__ import annotations

import numpy as np
import pytest
import tifffile
from scipy import ndimage

from wetpath import WetpathError, ingest_volume, open_step, segment_grayscale
from wetpath._segment import register_translation
from wetpath.synthetic import random_medium

GREY_DRY = np.array([0, 30000, 12000, 12000], float)   # invented grey levels per phase
GREY_WET = np.array([0, 30000, 20000, 8000], float)
SHIFT = (2, -1, 3)


def _scans(noise: float, seed: int = 0, shape=(40, 40, 40)):
    """True labels and rendered scans: piecewise-constant grey levels + Gaussian noise; the wet
    scan is displaced by SHIFT (a rigid translation known by construction)."""
    truth = random_medium(shape, seed=5, grain_scale=3.0, fluid_scale=4.0)
    rng = np.random.default_rng(seed)
    dry = GREY_DRY[truth] + rng.normal(0, noise, shape)
    wet = np.roll(GREY_WET[truth] + rng.normal(0, noise, shape), SHIFT, axis=(0, 1, 2))
    return truth, dry.clip(0, 65535).astype(np.uint16), wet.clip(0, 65535).astype(np.uint16)


def _agreement(labels, truth):
    inner = (slice(3, -3),) * 3  # away from the planes the shift leaves without data
    return float(np.mean(labels[inner] == truth[inner]))


def test_registration_recovers_known_shift():
    _, dry, wet = _scans(noise=1500)
    shift = register_translation(dry, wet, crop=32)
    assert shift == tuple(-s for s in SHIFT)
    realigned = ndimage.shift(wet, shift, order=0)
    assert np.corrcoef(realigned[4:-4, 4:-4, 4:-4].ravel(),
                       dry[4:-4, 4:-4, 4:-4].ravel())[0, 1] > 0.5


def test_segmentation_recovers_labels_at_low_noise():
    truth, dry, wet = _scans(noise=1000)
    labels = segment_grayscale(wet, dry, denoise="none", field_of_view="full",
                               min_speck_voxels=0)
    assert _agreement(labels, truth) > 0.999
    assert (labels[-SHIFT[0]:] == 0).all()  # planes left without data by the shift: excluded


def test_median_denoising_helps_at_high_noise():
    truth, dry, wet = _scans(noise=4500, seed=1)
    raw = _agreement(segment_grayscale(wet, dry, denoise="none", field_of_view="full",
                                       min_speck_voxels=0), truth)
    smooth = _agreement(segment_grayscale(wet, dry, denoise="median", denoise_size=3,
                                          field_of_view="full"), truth)
    assert smooth > raw + 0.02, (raw, smooth)


def test_cylindrical_field_of_view_and_fixed_thresholds():
    truth, dry, wet = _scans(noise=500)
    labels = segment_grayscale(wet, dry, denoise="none", fluid_threshold=60000)
    assert labels[0, 0, 0] == 0 and labels[20, 20, 1] != 0  # corner outside, edge inside
    assert not (labels == 2).any()  # nothing above the fixed fluid threshold: no wetting


def test_specks_removed_only_when_asked():
    truth = np.full((20, 20, 20), 2, np.uint8)
    truth[:, :, :4] = 1
    truth[10, 10, 10] = 3  # a one-voxel non-wetting speck
    dry = GREY_DRY[truth].astype(np.uint16)
    wet = GREY_WET[truth].astype(np.uint16)
    kept = segment_grayscale(wet, dry, register=False, denoise="none", field_of_view="full",
                             min_speck_voxels=0)
    gone = segment_grayscale(wet, dry, register=False, denoise="none", field_of_view="full",
                             min_speck_voxels=2)
    assert kept[10, 10, 10] == 3 and gone[10, 10, 10] == 2


def test_grayscale_ingest_writes_the_segmentation(tmp_path):
    truth, dry, wet = _scans(noise=1000, shape=(32, 32, 32))
    tifffile.imwrite(tmp_path / "dry.tif", dry)
    tifffile.imwrite(tmp_path / "wet.tif", wet)
    knobs = {"denoise": "none", "min_speck_voxels": 0}
    out = ingest_volume(tmp_path / "wet.tif", tmp_path / "wet.zarr", voxel_size_um=5.0,
                        kind="grayscale", segment={"dry": str(tmp_path / "dry.tif"), **knobs})
    step = open_step(out)
    np.testing.assert_array_equal(step.labels[:], segment_grayscale(wet, dry, **knobs))
    assert step.attrs["inputs"]["dry"]["file"].endswith("dry.tif")


def test_errors(tmp_path):
    with pytest.raises(WetpathError, match="same shape"):
        segment_grayscale(np.zeros((4, 4, 4)), np.zeros((4, 4, 5)))
    with pytest.raises(WetpathError, match="no contrast"):
        segment_grayscale(np.ones((8, 8, 8)), np.ones((8, 8, 8)), register=False)
    with pytest.raises(WetpathError, match="denoise must be"):
        segment_grayscale(np.ones((8, 8, 8)), np.ones((8, 8, 8)), denoise="magic")
    np.save(tmp_path / "w.npy", np.zeros((4, 4, 4), np.uint16))
    with pytest.raises(WetpathError, match="needs segment.dry"):
        ingest_volume(tmp_path / "w.npy", tmp_path / "w.zarr", voxel_size_um=1, kind="grayscale")
    assert not (tmp_path / "w.zarr").exists()
