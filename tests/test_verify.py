"""The verify stage and its comparisons, against spectra written out by hand."""

from __future__ import annotations

import numpy as np
import zarr

from pipeline.config import load_config
from pipeline.stages.runner import run_pipeline
from pipeline.verification.checks import compare_multisets

from .conftest import write_config

SYMMETRIC_RING = """\
[run]
name = "sym"

[model]
type = "lattice"
size = [8]
boundary = "periodic"
forward = 1.0
backward = 1.0

[solve]
modes = 4
backend = "scipy"
"""


def _ring_8_spectrum() -> np.ndarray:
    # Symmetric ring, L = 8, u = v = 1: -2 + 2 cos(2 pi k / 8), k = 0..7 (circulant; Gray 2006,
    # Toeplitz and Circulant Matrices: A Review, eq. 3.7), slowest first:
    # 0, then the double eigenvalues -(2 - sqrt 2), -2, -(2 + sqrt 2), then -4.
    a, b, c = -(2 - np.sqrt(2)), -2.0, -(2 + np.sqrt(2))
    return np.array([0, a, a, b, b, c, c, -4], dtype=complex)


def test_compare_multisets_needs_every_mode_before_the_last_group():
    exact = _ring_8_spectrum()[:5]  # the 4 slowest, extended to finish the last pair: 0 a a b b
    a, b = exact[1], exact[3]
    assert compare_multisets(np.array([0, a, a, b]), exact) < 1e-15  # cut inside the last pair
    # One copy of the double eigenvalue a is missing and a second copy of b stands in for it:
    # not the 4 slowest modes, although every computed value has an exact partner.
    assert compare_multisets(np.array([0, a, b, b]), exact) >= abs(a - b)


def test_verify_fails_when_a_multiplicity_is_missing(tmp_path, quiet):
    config = load_config(write_config(tmp_path, "sym", SYMMETRIC_RING))
    store = tmp_path / "store.zarr"
    assert run_pipeline(config, store_path=str(store)).verified is True
    exact = _ring_8_spectrum()
    eigenvalues = zarr.open_array(str(store / "sym" / "spectrum" / "eigenvalues"), mode="r+")
    np.testing.assert_allclose(eigenvalues[:], exact[:4], atol=1e-12)
    # What a Krylov solver that found only one vector of the double eigenvalue would store.
    eigenvalues[:] = np.array([exact[0], exact[1], exact[3], exact[4]])
    outcome = run_pipeline(config, store_path=str(store), only="verify")
    assert outcome.verified is False
    checks = {c["name"]: c for c in zarr.open_group(str(store / "sym" / "verify")).attrs["checks"]}
    assert checks["spectrum.slowest_set"]["passed"] is False


def test_verify_fails_on_an_unconverged_stationary_iteration(tmp_path, quiet):
    # Inverse iteration (dense_limit = 0) stores an error estimate; verify must not pass a
    # stationary vector whose estimate exceeds verify.tolerance, whatever its residual.
    text = SYMMETRIC_RING.replace("modes = 4", "modes = 4\nmethod = \"shift-invert\"\n"
                                  "dense_limit = 0").replace("size = [8]", "size = [40]")
    config = load_config(write_config(tmp_path, "sym", text))
    store = tmp_path / "store.zarr"
    assert run_pipeline(config, store_path=str(store)).verified is True
    group = zarr.open_group(str(store / "sym" / "stationary"), mode="r+")
    checks = {c["name"]: c for c in zarr.open_group(str(store / "sym" / "verify")).attrs["checks"]}
    assert checks["stationary.convergence"]["passed"] is True
    group.attrs["error_estimate"] = 1e-4  # what a solve that ran out of steps records
    assert run_pipeline(config, store_path=str(store), only="verify").verified is False
    checks = {c["name"]: c for c in zarr.open_group(str(store / "sym" / "verify")).attrs["checks"]}
    assert checks["stationary.convergence"]["passed"] is False
    assert checks["stationary.residual"]["passed"] is True  # the residual alone cannot tell
