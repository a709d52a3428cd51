"""Readers: exact round trips for every format, slab reads, and one-line errors naming the file."""

from __future__ import annotations

import h5py
import numpy as np
import pytest
import tifffile
import zarr
from hypothesis import given, settings
from hypothesis import strategies as st

from wetpath import WetpathError, read_volume


@pytest.fixture
def volume() -> np.ndarray:
    rng = np.random.default_rng(0)
    return rng.integers(0, 60000, size=(7, 9, 11), dtype=np.uint16)


def _check(vol, expected):
    assert vol.shape == expected.shape
    assert vol.dtype == expected.dtype.newbyteorder("=")
    np.testing.assert_array_equal(np.asarray(vol), expected)
    np.testing.assert_array_equal(vol.read(2, 5), expected[2:5])
    np.testing.assert_array_equal(vol[1:4, 2:, ::2], expected[1:4, 2:, ::2])


def test_multipage_tiff_round_trip(tmp_path, volume):
    tifffile.imwrite(tmp_path / "v.tif", volume)
    with read_volume(tmp_path / "v.tif") as vol:
        _check(vol, volume)


def test_multipage_tiff_written_page_by_page(tmp_path, volume):
    with tifffile.TiffWriter(tmp_path / "v.tiff") as tw:
        for plane in volume:
            tw.write(plane, contiguous=False)
    with read_volume(tmp_path / "v.tiff") as vol:
        _check(vol, volume)


def test_tiff_folder_round_trip_in_numeric_order(tmp_path, volume):
    folder = tmp_path / "slices"
    folder.mkdir()
    for i, plane in enumerate(volume):  # unpadded numbers: slice_10 must come after slice_9
        tifffile.imwrite(folder / f"slice_{i}.tif", plane)
    (folder / "notes.txt").write_text("not a slice")
    _check(read_volume(folder), volume)


@pytest.mark.parametrize("byte_order", ["little", "big"])
@pytest.mark.parametrize("offset", [0, 512])
def test_raw_round_trip(tmp_path, volume, byte_order, offset):
    path = tmp_path / "v.raw"
    data = volume.astype("<u2" if byte_order == "little" else ">u2").tobytes()
    path.write_bytes(b"H" * offset + data)
    vol = read_volume(path, dtype="uint16", shape=volume.shape, byte_order=byte_order,
                      offset=offset)
    _check(vol, volume)


@pytest.mark.parametrize("order", ["C", "F"])
def test_npy_round_trip(tmp_path, volume, order):
    np.save(tmp_path / "v.npy", np.asarray(volume, order=order))
    _check(read_volume(tmp_path / "v.npy"), volume)


def test_zarr_array_and_group_round_trip(tmp_path, volume):
    zarr.create_array(str(tmp_path / "a.zarr"), data=volume, chunks=(3, 4, 5))
    _check(read_volume(tmp_path / "a.zarr"), volume)
    group = zarr.open_group(str(tmp_path / "g.zarr"), mode="w")
    group.create_array("scan", data=volume, chunks=(4, 4, 4))
    group.create_array("other", data=volume[0])  # 2D: not a candidate
    _check(read_volume(tmp_path / "g.zarr"), volume)
    _check(read_volume(tmp_path / "g.zarr", dataset="scan"), volume)


def test_hdf5_round_trip(tmp_path, volume):
    with h5py.File(tmp_path / "v.h5", "w") as fh:
        fh.create_dataset("entry/data", data=volume, chunks=(2, 9, 11))
        fh.create_dataset("entry/angles", data=np.arange(5.0))
    _check(read_volume(tmp_path / "v.h5"), volume)
    _check(read_volume(tmp_path / "v.h5", dataset="entry/data"), volume)


def test_hdf5_needs_dataset_when_ambiguous(tmp_path, volume):
    with h5py.File(tmp_path / "two.h5", "w") as fh:
        fh["a"] = volume
        fh["b"] = volume
    with pytest.raises(WetpathError, match=r"two\.h5: HDF5 file holds 2 3D datasets"):
        read_volume(tmp_path / "two.h5")
    with pytest.raises(WetpathError, match="no dataset 'c'"):
        read_volume(tmp_path / "two.h5", dataset="c")


def test_missing_file(tmp_path):
    with pytest.raises(WetpathError, match=r"nope\.tif: input file does not exist") as info:
        read_volume(tmp_path / "nope.tif")
    assert "\n" not in str(info.value)


@pytest.mark.parametrize(("dtype", "shape"), [("uint16", (7, 9, 11)), ("uint8", (7, 9, 12)),
                                               ("float32", (7, 9, 11))])
def test_raw_size_mismatch_names_file_and_sizes(tmp_path, dtype, shape):
    path = tmp_path / "scan.raw"
    path.write_bytes(np.zeros((7, 9, 11), np.uint8).tobytes())  # 693 bytes
    expected = int(np.prod(shape)) * np.dtype(dtype).itemsize
    with pytest.raises(WetpathError, match=rf"scan\.raw: raw file has 693 bytes but dtype "
                                           rf"{dtype} .* needs {expected} bytes"):
        read_volume(path, dtype=dtype, shape=shape)


def test_raw_needs_layout(tmp_path):
    (tmp_path / "s.raw").write_bytes(b"\0" * 8)
    with pytest.raises(WetpathError, match="needs dtype and shape"):
        read_volume(tmp_path / "s.raw")


def test_inconsistent_tiff_pages(tmp_path):
    with tifffile.TiffWriter(tmp_path / "bad.tif") as tw:
        tw.write(np.zeros((8, 8), np.uint8))
        tw.write(np.zeros((8, 8), np.uint8))
        tw.write(np.zeros((6, 8), np.uint8))
    with pytest.raises(WetpathError, match=r"bad\.tif: TIFF pages of inconsistent shape: page 0 "
                                           r"is \(8, 8\), page 2 is \(6, 8\)"):
        read_volume(tmp_path / "bad.tif")


def test_inconsistent_slices(tmp_path):
    folder = tmp_path / "slices"
    folder.mkdir()
    tifffile.imwrite(folder / "s0.tif", np.zeros((8, 8), np.uint8))
    tifffile.imwrite(folder / "s1.tif", np.zeros((8, 9), np.uint8))
    with pytest.raises(WetpathError, match="slices of inconsistent shape"):
        read_volume(folder)


def test_unknown_suffix_and_not_3d(tmp_path):
    (tmp_path / "v.xyz").write_text("?")
    with pytest.raises(WetpathError, match="cannot tell the format"):
        read_volume(tmp_path / "v.xyz")
    np.save(tmp_path / "flat.npy", np.zeros((4, 4)))
    with pytest.raises(WetpathError, match="expected a 3D volume"):
        read_volume(tmp_path / "flat.npy")


def test_truncated_tiff_is_one_line_error(tmp_path, volume):
    tifffile.imwrite(tmp_path / "t.tif", volume)
    data = (tmp_path / "t.tif").read_bytes()
    (tmp_path / "t.tif").write_bytes(data[:40])
    with pytest.raises(WetpathError, match=r"t\.tif: cannot read as tiff") as info:
        np.asarray(read_volume(tmp_path / "t.tif"))
    assert "\n" not in str(info.value)


@settings(max_examples=25, deadline=None)
@given(shape=st.tuples(*[st.integers(1, 5)] * 3),
       dtype=st.sampled_from(["uint8", "int16", "uint16", "int32", "float32", "float64"]),
       byte_order=st.sampled_from(["little", "big"]), offset=st.integers(0, 64),
       seed=st.integers(0, 2**16))
def test_raw_round_trip_property(tmp_path_factory, shape, dtype, byte_order, offset, seed):
    rng = np.random.default_rng(seed)
    arr = (rng.random(shape) * 100).astype(dtype)
    path = tmp_path_factory.mktemp("raw") / "x.raw"
    dt = np.dtype(dtype).newbyteorder("<" if byte_order == "little" else ">")
    path.write_bytes(b"\x07" * offset + arr.astype(dt).tobytes())
    vol = read_volume(path, dtype=dtype, shape=shape, byte_order=byte_order, offset=offset)
    np.testing.assert_array_equal(np.asarray(vol), arr)


def test_imagej_hyperstack_round_trip(tmp_path, volume):
    tifffile.imwrite(tmp_path / "ij.tif", volume, imagej=True)
    with read_volume(tmp_path / "ij.tif") as vol:
        _check(vol, volume)


def test_tiff_with_channels_rejected(tmp_path):
    tifffile.imwrite(tmp_path / "rgb.tif", np.zeros((3, 8, 8, 3), np.uint8), photometric="rgb")
    with pytest.raises(WetpathError, match=r"rgb\.tif: TIFF image has shape"):
        read_volume(tmp_path / "rgb.tif")
