"""Step stores: OME-Zarr metadata, compression, chunks, mode downsampling, atomic writes."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from wetpath import WetpathError, open_step
from wetpath._atomic import atomic_directory, atomic_write_text
from wetpath._store import create_step_store, downsample_mode

from .conftest import subprocess_env


def _mode_reference(labels):
    """Plain-loop oracle: most frequent code of each 2×2×2 block (edge-padded), lowest on ties."""
    padded = np.pad(labels, [(0, n % 2) for n in labels.shape], mode="edge")
    out = np.zeros([n // 2 for n in padded.shape], np.uint8)
    for idx in np.ndindex(out.shape):
        block = padded[tuple(slice(2 * i, 2 * i + 2) for i in idx)]
        out[idx] = np.argmax(np.bincount(block.ravel(), minlength=4))
    return out


@pytest.mark.parametrize("shape", [(6, 8, 4), (7, 5, 9)])
def test_downsample_mode_matches_loop_reference(shape):
    labels = np.random.default_rng(3).integers(0, 4, shape).astype(np.uint8)
    np.testing.assert_array_equal(downsample_mode(labels), _mode_reference(labels))


def test_store_metadata_round_trip(tmp_path, tiny_volume):
    level0, level1 = create_step_store(tmp_path / "s.zarr", tiny_volume.shape, 4.5, chunks=16,
                                       name="step_007", attrs={"step": "step_007"})
    level0[:] = tiny_volume
    level1[:] = downsample_mode(tiny_volume)
    opened = open_step(tmp_path / "s.zarr")
    np.testing.assert_array_equal(opened.labels[:], tiny_volume)
    assert opened.voxel_size_um == 4.5
    assert opened.attrs["step"] == "step_007"
    assert opened.labels.chunks == (16, 16, 16)
    meta = json.loads((tmp_path / "s.zarr" / "zarr.json").read_text())["attributes"]["ome"]
    # NGFF 0.5: version under "ome", axes with unit, one scale per level (level 1 = 2x voxel)
    assert meta["version"] == "0.5"
    ms = meta["multiscales"][0]
    assert [a["unit"] for a in ms["axes"]] == ["micrometer"] * 3
    assert [d["coordinateTransformations"][0]["scale"] for d in ms["datasets"]] == [
        [4.5] * 3, [9.0] * 3]
    codec = json.loads((tmp_path / "s.zarr" / "0" / "zarr.json").read_text())["codecs"][-1]
    assert codec["name"] == "blosc" and codec["configuration"]["cname"] == "zstd"


def test_anisotropic_voxel_and_bad_voxel_sizes(tmp_path):
    create_step_store(tmp_path / "a.zarr", (4, 4, 4), (2.0, 1.0, 1.0))
    assert open_step(tmp_path / "a.zarr").voxel_size_um == (2.0, 1.0, 1.0)
    for bad in (0, -1.0, float("nan"), float("inf"), None, "abc", (1, 2)):
        with pytest.raises(WetpathError, match="voxel size"):
            create_step_store(tmp_path / "b.zarr", (4, 4, 4), bad)


def test_open_step_rejects_non_stores(tmp_path):
    with pytest.raises(WetpathError, match="step store does not exist"):
        open_step(tmp_path / "missing.zarr")
    (tmp_path / "empty.zarr").mkdir()
    with pytest.raises(WetpathError, match="not a wetpath step store"):
        open_step(tmp_path / "empty.zarr")


def test_atomic_directory_failure_leaves_target_untouched(tmp_path):
    target = tmp_path / "out.zarr"
    with atomic_directory(target) as tmp:
        tmp.mkdir()
        (tmp / "a").write_text("first")
    with pytest.raises(RuntimeError), atomic_directory(target) as tmp:
        tmp.mkdir()
        (tmp / "a").write_text("second")
        raise RuntimeError("writer failed")
    assert (target / "a").read_text() == "first"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.zarr"]


def test_killed_writer_leaves_no_result_and_next_writer_cleans_up(tmp_path):
    target = tmp_path / "out.zarr"
    script = (
        "import sys, time\n"
        "from wetpath._atomic import atomic_directory\n"
        f"with atomic_directory({str(target)!r}) as tmp:\n"
        "    tmp.mkdir(); (tmp / 'half').write_text('x')\n"
        "    print('ready', flush=True); time.sleep(60)\n")
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, text=True,
                            env=subprocess_env())
    assert proc.stdout.readline().strip() == "ready"
    proc.kill()  # SIGKILL: no cleanup code runs
    proc.wait()
    assert not target.exists()
    leftovers = list(tmp_path.glob(".out.zarr.tmp-*"))
    assert len(leftovers) == 1
    with atomic_directory(target) as tmp:
        tmp.mkdir()
    assert target.is_dir() and not list(tmp_path.glob(".out.zarr.tmp-*"))


def test_atomic_write_text_replaces(tmp_path):
    atomic_write_text(tmp_path / "t.csv", "a\n")
    atomic_write_text(tmp_path / "t.csv", "b\n")
    assert (tmp_path / "t.csv").read_text() == "b\n"
    assert [p.name for p in tmp_path.iterdir()] == ["t.csv"]


def test_step_store_reads_back_as_input(tmp_path, tiny_volume):
    from wetpath import read_volume

    level0, level1 = create_step_store(tmp_path / "s.zarr", tiny_volume.shape, 1.0)
    level0[:] = tiny_volume
    np.testing.assert_array_equal(np.asarray(read_volume(tmp_path / "s.zarr")), tiny_volume)
