"""Phase codes: mapping input label values to the canonical codes."""

import numpy as np
import pytest

from wetpath import PhaseCodes, WetpathError
from wetpath._codes import to_canonical


def test_canonical_passthrough_is_identity():
    labels = np.array([[[0, 1, 2, 3]]], dtype=np.uint8)
    assert to_canonical(labels) is labels


def test_remap_from_config_values():
    codes = PhaseCodes.from_mapping({"excluded": 0, "solid": 255, "wetting": 100, "nonwetting": 200})
    labels = np.array([0, 255, 100, 200, 200], dtype=np.uint8).reshape(1, 1, 5)
    np.testing.assert_array_equal(to_canonical(labels, codes).ravel(), [0, 1, 2, 3, 3])


def test_several_values_for_one_phase_and_wide_dtypes():
    codes = {"solid": [10, 11], "wetting": 20, "nonwetting": 30, "excluded": -1}
    labels = np.array([-1, 10, 11, 20, 30], dtype=np.int32).reshape(1, 1, 5)
    np.testing.assert_array_equal(to_canonical(labels, codes).ravel(), [0, 1, 1, 2, 3])


def test_unknown_values_are_listed_with_counts():
    labels = np.array([1, 2, 7, 7, 9], dtype=np.uint8).reshape(1, 1, 5)
    with pytest.raises(WetpathError, match=r"ingest: a\.tif: unexpected label values 7 \(2 voxels\), "
                                           r"9 \(1 voxels\)"):
        to_canonical(labels, path="a.tif", step="ingest")


def test_one_value_for_two_phases_is_refused():
    with pytest.raises(WetpathError, match="given to two phases"):
        PhaseCodes.from_mapping({"solid": 2}).lookup()


def test_unknown_phase_name_is_refused():
    with pytest.raises(WetpathError, match="unknown phase name"):
        PhaseCodes.from_mapping({"oil": 3})


def test_float_labels_are_refused():
    with pytest.raises(WetpathError, match="must be integers"):
        to_canonical(np.zeros((2, 2, 2), dtype=np.float32))
