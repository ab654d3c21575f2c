"""The power-law fit against scipy's own linear regression and exact power laws."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from pipeline.errors import GaplineError
from pipeline.fit import fit_power_law


def test_slope_and_standard_error_match_scipy_linregress():
    rng = np.random.default_rng(7)
    L = np.array([16, 32, 64, 128, 256, 512], dtype=float)
    values = 3.0 * L**-1.5 * np.exp(rng.normal(0, 0.05, L.size))
    fit = fit_power_law(L, values)
    # scipy.stats.linregress: ordinary least squares with the slope's standard error.
    reference = stats.linregress(np.log(L), np.log(values))
    assert fit.z == pytest.approx(-reference.slope, rel=1e-12)
    assert fit.z_stderr == pytest.approx(reference.stderr, rel=1e-10)
    assert fit.amplitude == pytest.approx(np.exp(reference.intercept), rel=1e-12)
    assert fit.as_dict()["fit_range"] == [16, 512]


def test_exact_power_law_with_correction():
    L = np.array([10, 20, 40, 80, 160], dtype=float)
    values = 2.0 * L**-2.0 * np.exp(0.7 * L**-2.0)
    fit = fit_power_law(L, values, omega=2.0)
    assert fit.z == pytest.approx(2.0, abs=1e-10)
    assert fit.correction == pytest.approx(0.7, abs=1e-8)
    np.testing.assert_allclose(fit.prediction(L), values, rtol=1e-10)
    plain = fit_power_law(L, values)
    assert abs(plain.z - 2.0) > 1e-4  # the correction biases a plain fit


@pytest.mark.parametrize(
    ("sizes", "values", "match"),
    [([10, 20], [1.0, 0.5], "at least 3 sizes"),
     ([10, 20, 40], [1.0, 0.0, 0.2], "positive and finite"),
     ([10, 10, 10], [1.0, 1.0, 1.0], "distinct sizes")],
)
def test_bad_input(sizes, values, match):
    with pytest.raises(GaplineError, match=match):
        fit_power_law(sizes, values)
