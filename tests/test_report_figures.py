"""gapline report: PNG figures and one HTML page for runs and collected sweeps."""

from __future__ import annotations

import re

import matplotlib.image
import pytest

from .conftest import assert_one_line_user_error, ring_config, run_cli, write_config

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (W3C/ISO 15948), section 5.2

TORUS = """\
[run]
name = "figtorus"

[model]
type = "lattice"
size = [12, 8]
boundary = ["reflecting", "periodic"]
forward = [1.2, 1.0]
backward = [0.8, 0.6]

[solve]
modes = 6
backend = "scipy"
"""


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    directory = tmp_path_factory.mktemp("figures")
    for path in (ring_config(directory, "figring", 24, 5), write_config(directory, "figtorus",
                                                                          TORUS)):
        result = run_cli("run", path, "--store", "s.zarr", cwd=directory)
        assert result.returncode == 0, result.stderr
    return directory


def _images(page):
    return re.findall(r'<img src="([^"]+)"', page.read_text())


def test_run_report_draws_modes_and_stationary(store):
    result = run_cli("report", "s.zarr", "figtorus", "--out", "torus-report", cwd=store)
    assert result.returncode == 0, result.stderr
    page = store / "torus-report" / "index.html"
    assert result.stdout.strip() == f"report: {page.relative_to(store)}"
    images = _images(page)
    assert images == ["figtorus-modes.png", "figtorus-stationary.png"]
    for name in images:
        path = store / "torus-report" / name
        assert path.read_bytes()[:8] == PNG_SIGNATURE
        height, width, _ = matplotlib.image.imread(path).shape
        assert width >= 600 and height >= 400  # readable size
    text = page.read_text()
    assert "spectral gap (1/time)" in text and "exact modes from:" in text
    assert "heat map" in text  # 2D lattice: a heat map, not a profile


def test_report_of_everything(store):
    result = run_cli("report", "s.zarr", cwd=store)
    assert result.returncode == 0, result.stderr
    page = store / "s.zarr.report" / "all" / "index.html"
    images = _images(page)
    assert "figring-stationary.png" in images and "figtorus-modes.png" in images
    assert "profile" in page.read_text()  # the 1D ring: a profile


def test_sweep_report_draws_gap_against_size(tmp_path):
    from .test_sweep import sweep_config

    path = sweep_config(tmp_path, sweep="figsweep", lines='grid = { "model.size" = '
                        '[16, 24, 32, 48] }', workers=1)
    assert run_cli("sweep", path, "--store", "s.zarr", cwd=tmp_path).returncode == 0
    assert run_cli("collect", "s.zarr", "figsweep", cwd=tmp_path).returncode == 0
    result = run_cli("report", "s.zarr", "figsweep", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    page = tmp_path / "s.zarr.report" / "figsweep" / "index.html"
    assert _images(page) == ["figsweep-gap-vs-size.png"]
    assert "z = " in page.read_text() and "sizes 16..48" in page.read_text()


def test_unknown_name_is_a_one_line_error(store):
    result = run_cli("report", "s.zarr", "nothing-here", cwd=store)
    line = assert_one_line_user_error(result)
    assert "neither a run nor a collected sweep" in line
