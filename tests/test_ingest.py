"""Ingest: canonical stores from every format, validation before work, nothing left on error."""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
import pytest
import tifffile

from wetpath import WetpathError, ingest_volume, open_step
from wetpath._ingest import read_step_table
from wetpath._readers import Volume
from wetpath._store import downsample_mode

from .conftest import fingerprint


def _no_store(out):
    assert not out.exists()
    assert not list(out.parent.glob(f".{out.name}.tmp-*"))


def test_ingest_tiff_round_trip_with_provenance(tmp_path, tiny_volume):
    src = tmp_path / "step_003.tif"
    tifffile.imwrite(src, tiny_volume)
    before = fingerprint(src)
    out = ingest_volume(src, tmp_path / "out" / "step_003.zarr", voxel_size_um=3.0, chunks=16)
    step = open_step(out)
    np.testing.assert_array_equal(step.labels[:], tiny_volume)
    assert step.voxel_size_um == 3.0
    assert step.attrs["step"] == "step_003"
    src_rec = step.attrs["inputs"]["source"]
    assert src_rec["sha256"] == hashlib.sha256(src.read_bytes()).hexdigest()
    assert src_rec["bytes"] == src.stat().st_size
    assert fingerprint(src) == before
    import zarr

    level1 = zarr.open_group(str(out), mode="r")["1"][:]
    np.testing.assert_array_equal(level1, downsample_mode(tiny_volume))


def test_ingest_remaps_phase_codes(tmp_path, tiny_volume):
    custom = np.array([10, 255, 128, 64], np.int32)[tiny_volume]
    np.save(tmp_path / "s.npy", custom)
    out = ingest_volume(tmp_path / "s.npy", tmp_path / "s.zarr", voxel_size_um=1.0,
                        codes={"excluded": 10, "solid": 255, "wetting": 128, "nonwetting": 64})
    np.testing.assert_array_equal(open_step(out).labels[:], tiny_volume)


def test_ingest_raw_streams_by_slabs(tmp_path, tiny_volume, monkeypatch):
    (tmp_path / "s.raw").write_bytes(b"\0" * 100 + tiny_volume.astype(">u2").tobytes())
    depths = []
    original = Volume.read

    def spy(self, z0=0, z1=None):
        out = original(self, z0, z1)
        depths.append(out.shape[0])
        return out

    monkeypatch.setattr(Volume, "read", spy)
    out = ingest_volume(tmp_path / "s.raw", tmp_path / "s.zarr", voxel_size_um=2.0, chunks=8,
                        read={"raw": {"dtype": "uint16", "shape": [24, 24, 24],
                                      "byte_order": "big", "offset": 100}})
    np.testing.assert_array_equal(open_step(out).labels[:], tiny_volume)
    assert max(depths) == 8 and len(depths) == 3  # three slabs of one chunk depth, never all


def test_ingest_replaces_existing_store(tmp_path, tiny_volume):
    np.save(tmp_path / "a.npy", tiny_volume)
    out = tmp_path / "a.zarr"
    ingest_volume(tmp_path / "a.npy", out, voxel_size_um=1.0)
    np.save(tmp_path / "a.npy", np.flip(tiny_volume, 0))
    ingest_volume(tmp_path / "a.npy", out, voxel_size_um=1.0)
    np.testing.assert_array_equal(open_step(out).labels[:], np.flip(tiny_volume, 0))


def _expect_error(src, out, match, **kwargs):
    before = fingerprint(src) if src.is_file() else None
    with pytest.raises(WetpathError, match=match) as info:
        ingest_volume(src, out, **kwargs)
    message = str(info.value)
    assert "\n" not in message and src.name in message
    _no_store(out)
    if before is not None:
        assert fingerprint(src) == before
    return message


def test_unknown_phase_code_lists_values_and_counts(tmp_path, tiny_volume):
    bad = tiny_volume.copy()
    bad[0, :2, :2] = 7      # 4 voxels in the first slab
    bad[-1, 0, :3] = 200    # 3 voxels in the last slab: counted over the whole volume
    src = tmp_path / "step_002.tif"
    tifffile.imwrite(src, bad)
    msg = _expect_error(src, tmp_path / "s.zarr",
                        r"ingest s: .*step_002\.tif: unexpected label values 7 \(4 voxels\), "
                        r"200 \(3 voxels\)", voxel_size_um=1.0, chunks=8)
    assert "1=solid" in msg


def test_missing_file(tmp_path):
    _expect_error(tmp_path / "gone.tif", tmp_path / "s.zarr", "input file does not exist",
                  voxel_size_um=1.0)


@pytest.mark.parametrize("raw", [{"dtype": "uint16", "shape": [24, 24, 24]},
                                 {"dtype": "uint8", "shape": [24, 24, 25]}])
def test_raw_wrong_dtype_or_shape(tmp_path, tiny_volume, raw):
    src = tmp_path / "scan.raw"
    src.write_bytes(tiny_volume.tobytes())
    _expect_error(src, tmp_path / "s.zarr", "raw file has 13824 bytes but", voxel_size_um=1.0,
                  read={"raw": raw})


@pytest.mark.parametrize("voxel", [0, -2.0, float("nan"), None])
def test_bad_voxel_size(tmp_path, tiny_volume, voxel):
    src = tmp_path / "v.npy"
    np.save(src, tiny_volume)
    _expect_error(src, tmp_path / "s.zarr", "voxel size", voxel_size_um=voxel)


def test_inconsistent_tiff_pages(tmp_path):
    src = tmp_path / "pages.tif"
    with tifffile.TiffWriter(src) as tw:
        tw.write(np.ones((8, 8), np.uint8))
        tw.write(np.ones((8, 7), np.uint8))
    _expect_error(src, tmp_path / "s.zarr", "inconsistent shape", voxel_size_um=1.0)


def test_float_labels_rejected(tmp_path, tiny_volume):
    src = tmp_path / "f.npy"
    np.save(src, tiny_volume.astype(np.float32))
    _expect_error(src, tmp_path / "s.zarr", "must hold integers", voxel_size_um=1.0)


def _times(tmp_path, text, files=("a.tif", "b.tif", "c.tif")):
    for f in files:
        (tmp_path / f).write_bytes(b"")
    (tmp_path / "times.csv").write_text(text)
    return tmp_path


def test_step_table_ok(tmp_path):
    table = read_step_table(_times(tmp_path, "step,time_s,file\ns0,0,a.tif\ns1,30.5,b.tif\n"))
    assert list(table["step"]) == ["s0", "s1"]
    assert list(table["time_s"]) == [0.0, 30.5]
    assert table["file"][1] == str(tmp_path / "b.tif")


@pytest.mark.parametrize(("text", "match"), [
    ("step,time_s,file\ns0,0,a.tif\ns1,0,b.tif\n", "time stamps must increase: step s1"),
    ("step,time_s,file\ns0,10,a.tif\ns1,5,b.tif\n", "time stamps must increase"),
    ("step,time_s,file\ns0,0,a.tif\ns0,5,b.tif\n", "duplicate step name"),
    ("step,time_s,file\ns0,0,a.tif\ns1,5,z.tif\n", r"input of step s1 does not exist"),
    ("step,file\ns0,a.tif\n", r"lacks column\(s\) \['time_s'\]"),
    ("step,time_s,file\ns 0,0,a.tif\n", "bad step name"),
    ("step,time_s,file\ns0,nan,a.tif\n", "finite"),
])
def test_step_table_errors(tmp_path, text, match):
    folder = _times(tmp_path, text)
    before = fingerprint(folder / "times.csv")
    with pytest.raises(WetpathError, match=match) as info:
        read_step_table(folder, series="exp1")
    assert str(info.value).startswith("series exp1: ") and "times.csv" in str(info.value)
    assert fingerprint(folder / "times.csv") == before


def test_step_table_missing(tmp_path):
    with pytest.raises(WetpathError, match=r"times\.csv: step table does not exist"):
        read_step_table(tmp_path)


def test_step_table_keeps_one_step(tmp_path):
    table = read_step_table(_times(tmp_path, "step,time_s,file\nonly,0,a.tif\n"))
    assert isinstance(table, pd.DataFrame) and len(table) == 1
