"""History figures: files, labels and units, branch legend, phase colours, colour-blind safety."""

from __future__ import annotations

import itertools
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from matplotlib.colors import to_rgb
from matplotlib.image import imread
from skimage.color import deltaE_ciede2000, rgb2lab

from wetpath import WetpathError
from wetpath._history import build_history
from wetpath._plots import (
    BRANCH_COLOURS,
    EVENT_COLOURS,
    PHASE_COLOURS,
    PLOTS,
    _branch_states,
    mid_plane_slices,
    plot_history,
    plot_phase_slices,
)

from .tube_bundle_series import tube_bundle_path


@pytest.fixture(scope="module")
def history():
    states, increments = tube_bundle_path(jitter=0.3)
    states["theta_topo_deg"] = 40.0 + 25.0 * (np.arange(len(states)) > 8)
    increments["n_coalesce"] = np.arange(len(increments)) % 3
    increments["n_breakup"] = np.arange(len(increments)) % 2
    return build_history(states, increments, sigma_n_per_m=0.025)


def _svg_text(path) -> str:
    root = ET.parse(path).getroot()  # also proves the SVG is well-formed XML
    return " ".join(t for el in root.iter() for t in (el.text,) if t)


def test_every_figure_written_with_labels_and_units(tmp_path, history):
    slices = [("first", np.full((20, 30), 2, np.uint8)), ("last", np.full((20, 30), 3, np.uint8))]
    written = plot_history(history, tmp_path, slices=slices, voxel_size_um=2.0)
    assert set(written) == {*PLOTS, "phase_slices"}
    expected = {
        "angle_vs_saturation": ["wetting saturation S_w [–]", "effective contact angle θ_w [°]",
                                "energy balance (per increment)", "topological (per state)"],
        "pc_vs_saturation": ["capillary pressure P_c [kPa]"],
        "a_nw_vs_saturation": ["specific n–w area a_nw [1/µm]"],
        "euler_vs_saturation": ["Euler characteristic χ_n [–]"],
        "angle_vs_time": ["time [s]", "effective contact angle θ_w [°]"],
        "events_vs_time": ["events per increment [count]", "coalescence", "break-up"],
        "phase_slices": ["x [µm]", "y [µm]", "solid", "wetting", "non-wetting"],
    }
    for name, (png, svg) in written.items():
        assert png.suffix == ".png" and svg.suffix == ".svg"
        image = imread(png)
        assert image.shape[0] > 300 and image.shape[1] > 500
        text = _svg_text(svg)
        for label in expected[name]:
            assert label in text, (name, label)
        if name not in ("events_vs_time", "phase_slices"):
            for legend in ("branch 1: drainage", "branch 2: imbibition", "branch 3: drainage"):
                assert legend in text, (name, legend)


def test_svg_is_reproducible(tmp_path, history):
    a = PLOTS["angle_vs_saturation"](history, tmp_path / "a")[1].read_bytes()
    b = PLOTS["angle_vs_saturation"](history, tmp_path / "b")[1].read_bytes()
    assert a == b


def test_curvature_shown_without_tension_and_missing_data_said(tmp_path, history):
    bare = history.drop(columns=["theta_topo_deg", "theta_energy_deg", "euler_n"]).copy()
    bare["pc_pa"] = np.nan
    text = _svg_text(PLOTS["pc_vs_saturation"](bare, tmp_path / "pc")[1])
    assert "n–w total curvature κ [1/µm]" in text
    assert "no contact angle in this series" in _svg_text(
        PLOTS["angle_vs_saturation"](bare, tmp_path / "angle")[1])
    assert "no Euler characteristic χ_n in this series" in _svg_text(
        PLOTS["euler_vs_saturation"](bare, tmp_path / "euler")[1])
    no_events = history.drop(columns=["n_coalesce", "n_breakup"])
    assert "no cluster event in this series" in _svg_text(
        PLOTS["events_vs_time"](no_events, tmp_path / "events")[1])


def test_branch_lines_start_at_the_turning_state(history):
    # branch 2 (imbibition) must be drawn from the state where drainage ended
    st = _branch_states(history, 2)
    inc = history[(history["record"] == "increment") & (history["branch"] == 2)]
    assert st["step"].iloc[0] == inc["step_from"].iloc[0]
    assert st["step"].iloc[-1] == inc["step_to"].iloc[-1]
    assert len(st) == len(inc) + 1


def test_phase_slice_colours_and_areas(tmp_path):
    # rows 0–9 solid, 10–29 wetting, 30–39 non-wetting: the wetting band covers twice the area
    image = np.full((40, 40), 2, np.uint8)
    image[:10], image[30:] = 1, 3
    png, _ = plot_phase_slices([("bands", image)], tmp_path / "bands")
    rgb = (imread(png)[..., :3] * 255).round().astype(int)
    counts = {}
    for code in (1, 2, 3):
        target = np.array([round(255 * v) for v in to_rgb(PHASE_COLOURS[code])])
        counts[code] = int(np.all(rgb == target, axis=-1).sum())
    assert min(counts.values()) > 1000
    assert counts[2] / counts[1] == pytest.approx(2.0, rel=0.1)
    assert counts[2] / counts[3] == pytest.approx(2.0, rel=0.1)
    with pytest.raises(WetpathError, match="plots: slice 'cube' is not 2D"):
        plot_phase_slices([("cube", np.zeros((2, 2, 2), np.uint8))], tmp_path / "x")
    with pytest.raises(WetpathError, match="outside the phase codes"):
        plot_phase_slices([("bad", np.full((4, 4), 7, np.uint8))], tmp_path / "x")
    with pytest.raises(WetpathError, match="no slices"):
        plot_phase_slices([], tmp_path / "x")


def test_mid_plane_slices():
    volume = np.arange(3 * 4 * 5).reshape(3, 4, 5)
    (one,), axes = mid_plane_slices([("v", volume)])
    assert axes == ("y", "x") and one[0] == "v"
    np.testing.assert_array_equal(one[1], volume[1])
    (one,), axes = mid_plane_slices([("v", volume)], axis=2)
    assert axes == ("z", "y")
    np.testing.assert_array_equal(one[1], volume[:, :, 2])
    with pytest.raises(WetpathError, match="not 3D"):
        mid_plane_slices([("flat", volume[0])])


# Colour-vision deficiency simulation: Machado, Oliveira & Fernandes (2009), IEEE Trans. Vis.
# Comput. Graph. 15(6), 1291–1298, severity 1.0 matrices on linear RGB (values from memory).
_CVD = {
    "protanopia": [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216],
                   [-0.003882, -0.048116, 1.051998]],
    "deuteranopia": [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
                     [-0.011820, 0.042940, 0.968881]],
    "tritanopia": [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602],
                   [0.004733, 0.691367, 0.303900]],
}


def _simulated_lab(colour: str, matrix) -> np.ndarray:
    # sRGB transfer function (IEC 61966-2-1)
    c = np.array(to_rgb(colour))
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    s = np.clip(np.asarray(matrix) @ lin, 0, 1)
    srgb = np.where(s <= 0.0031308, 12.92 * s, 1.055 * s ** (1 / 2.4) - 0.055)
    return rgb2lab(srgb[None, None, :])[0, 0]


@pytest.mark.parametrize("palette", [
    [BRANCH_COLOURS["drainage"], BRANCH_COLOURS["imbibition"]],
    list(PHASE_COLOURS),
    list(EVENT_COLOURS.values()),
])
def test_palettes_stay_apart_under_colour_vision_deficiency(palette):
    # CIEDE2000 ΔE ≥ 15 between every pair (scikit-image's deltaE_ciede2000); a ΔE of ~2 is
    # a just-noticeable difference (common practice), so 15 is clearly distinct
    for name, matrix in [*_CVD.items(), ("normal", np.eye(3))]:
        labs = [_simulated_lab(c, matrix) for c in palette]
        for (i, a), (j, b) in itertools.combinations(enumerate(labs), 2):
            assert deltaE_ciede2000(a, b) >= 15, (name, palette[i], palette[j])
