"""The HTML report: self-contained, complete, atomic, and rendered by headless Chromium."""

from __future__ import annotations

import base64
import importlib.util
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from wetpath._history import branch_summary, build_history
from wetpath._plots import mid_plane_slices
from wetpath._report import flag_warnings, write_report
from wetpath.synthetic import tube_meniscus

from .tube_bundle_series import tube_bundle_path

ROOT = Path(__file__).resolve().parents[1]


def _load_checker():
    spec = importlib.util.spec_from_file_location("check_report", ROOT / "scripts/check_report.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _write(tmp_path: Path) -> Path:
    states, increments = tube_bundle_path(jitter=0.3)
    increments.loc[3, "flag_large_step"] = True
    history = build_history(states, increments, sigma_n_per_m=0.025)
    # mid-plane slices through the axis of the widest tube (r = 15 µm = 7.5 voxels of 2 µm)
    slices, axes = mid_plane_slices(
        [(f"{label} ({step})", tube_meniscus(7.5, theta, apex))
         for label, step, theta, apex in (("first", "t00", 40, -8), ("mid-path", "t10", 65, 6),
                                           ("last", "t20", 40, 0))], axis=1)
    assert axes == ("z", "x")
    return write_report(
        tmp_path / "report.html", history=history,
        branches=branch_summary(history, n_boot=200), states=states, increments=increments,
        config={"series": "bundle <A>", "sigma_n_per_m": 0.025, "static_tol": 0.005},
        provenance={"code_hash": "c0de",
                    "inputs": {"t00.tif": "sha256:aa11", "t01.tif": "sha256:bb22"},
                    "versions": {"wetpath-data": "7"}},
        warnings=["registration drift <checked>"], slices=slices, slice_axes=axes,
        figures_dir=tmp_path / "figures")


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.imgs = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "img":
            self.imgs.append(dict(attrs))


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    """One report for the module, written over an older file to exercise the atomic replace."""
    tmp = tmp_path_factory.mktemp("report")
    (tmp / "report.html").write_text("old")
    return _write(tmp)


def test_report_is_self_contained_and_complete(report):
    out, tmp_path = report, report.parent
    page = out.read_text(encoding="utf-8")
    parser = _Tags()
    parser.feed(page)
    # seven figures, all embedded PNGs that decode to PNG files
    assert len(parser.imgs) == 7
    for img in parser.imgs:
        assert img["src"].startswith("data:image/png;base64,")
        assert base64.b64decode(img["src"].split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    # nothing is loaded from elsewhere and nothing runs
    assert "script" not in parser.tags and "link" not in parser.tags
    assert not re.search(r"(src|href)=\"(https?:|//|file:)", page)
    # the answer, the configuration, checksums, versions and warnings are all there
    assert "branch 2 (imbibition)" in page and "branch 1 (drainage)" in page
    assert "hysteresis vs branch 1" in page
    assert "sha256:aa11" in page and "sha256:bb22" in page and "c0de" in page
    assert "&quot;static_tol&quot;: 0.005" in page
    assert "numpy" in page and "matplotlib" in page and "wetpath-data" in page
    assert "increment t03→t04: large step" in page
    assert "increment t08→t09: no wetted area change" in page
    assert "registration drift &lt;checked&gt;" in page and "bundle &lt;A&gt;" in page
    # figures also kept as PNG and SVG files
    assert len(list((tmp_path / "figures").glob("*.svg"))) == 7


def test_report_replaced_atomically(report):
    assert report.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    assert sorted(p.name for p in report.parent.iterdir()) == ["figures", "report.html"]


def test_flag_warnings():
    _, increments = tube_bundle_path()
    increments["flag_mixed_direction"] = [i == 5 for i in range(len(increments))]
    increments.loc[2, "theta_energy_deg"] = np.nan
    lines = flag_warnings(increments)
    assert lines == ["increment t02→t03: energy-balance angle undefined",
                     "increment t05→t06: mixed direction",
                     "increment t08→t09: no wetted area change",
                     "increment t16→t17: no wetted area change"]


@pytest.fixture(scope="module")
def chromium():
    checker = _load_checker()
    path = checker.ensure_chromium(install=True)
    if path is None:
        pytest.skip("Chromium is not installed and could not be installed (apt-get install "
                    "-y chromium)")
    return checker, path


def test_report_renders_in_headless_chromium(tmp_path, chromium, report):
    checker, path = chromium
    found = checker.check_report(report, screenshot=tmp_path / "shot.png", chromium=path)
    assert found["errors"] == [] and found["broken"] == []
    assert found["images"] == 7 and found["ok"]
    assert found["title"] == "wetpath report: bundle <A>"
    shot = tmp_path / "shot.png"
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the screenshot covers the page: 1280 px wide, about as tall as the page
    from matplotlib.image import imread
    h, w = imread(shot).shape[:2]
    assert w == 1280 and h >= min(found["height"], 16000)


def test_checker_catches_a_broken_image(tmp_path, chromium):
    checker, path = chromium
    from matplotlib.image import imsave
    imsave(tmp_path / "present.png", np.zeros((4, 4)))
    page = ("<!DOCTYPE html><html><head><title>t</title></head><body>"
            '<img src="data:image/png;base64,AAAA" alt="broken">'
            '<img src="present.png" alt="present">'
            '<img src="missing.png" alt="absent"></body></html>')
    (tmp_path / "bad.html").write_text(page)
    found = checker.check_report(tmp_path / "bad.html", chromium=path)
    assert not found["ok"] and found["images"] == 3
    # relative references resolve beside the report: only the two bad images fail
    assert sorted(found["broken"]) == ["absent", "broken"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.html", "present.png"]
