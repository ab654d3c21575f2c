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


def _tasep_ring_generator(L: int) -> np.ndarray:
    """Totally asymmetric exclusion on a ring of L sites with L/2 particles, hop rate 1 to the
    right, built by plain loops over configurations (a test-only reference)."""
    import itertools

    states = [sum(1 << i for i in c) for c in itertools.combinations(range(L), L // 2)]
    index = {s: k for k, s in enumerate(states)}
    W = np.zeros((len(states), len(states)))
    for k, s in enumerate(states):
        for i in range(L):
            j = (i + 1) % L
            if s >> i & 1 and not s >> j & 1:
                W[index[s ^ (1 << i) ^ (1 << j)], k] += 1.0
                W[k, k] -= 1.0
    return W


@pytest.mark.slow
def test_tasep_ring_gap_exponent_is_between_kpz_and_diffusive():
    # Gwa and Spohn 1992 (Phys. Rev. A 46, 844): the TASEP gap on a ring at half filling
    # closes as L^(-3/2) (KPZ), not L^(-2). At L = 6..12 (dense numpy eigenvalues of a
    # hand-built generator) the fitted exponent is about 1.60: the approach to 3/2 from
    # above is slow (local slopes 1.601, 1.605, 1.599 between neighbouring sizes).
    sizes = np.array([6, 8, 10, 12])
    gaps = []
    for L in sizes:
        values = np.linalg.eigvals(_tasep_ring_generator(int(L)))
        values = values[np.argsort(-values.real)]
        assert abs(values[0]) < 1e-9
        gaps.append(-values[1].real)
    fit = fit_power_law(sizes, gaps)
    assert fit.as_dict()["fit_range"] == [6, 12]
    assert 1.5 < fit.z < 1.7
    assert fit.z_stderr < 0.01
    assert abs(fit.z - 2.0) > 30 * fit.z_stderr  # clearly not diffusive
