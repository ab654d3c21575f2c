"""The completeness certificate: farthest point of the spectrum enclosure, by brute force."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.backends.completeness import SpectrumEnclosure, farthest_enclosed_distance
from pipeline.models.lattice import Disorder, LatticeWalk

from .conftest import dense_generator


def _region_samples(centers, radii, bound, threshold, rng, count=40_000):
    """Points of the region (union of disks) ∩ {Re z >= t} ∩ {|Im z| <= B}: dense samples of
    every boundary curve (circles, the line Re z = t, the lines |Im z| = B) and random
    interior points, each kept only if it lies in the region."""
    points = []
    angle = np.linspace(0, 2 * np.pi, count)
    for c, r in zip(centers, radii, strict=True):
        points.append(c + r * np.exp(1j * angle))  # circle
        y = np.linspace(-r, r, count)
        points.append(threshold + 1j * y)  # line Re z = t
        x = np.linspace(c - r, c + r, count)
        if np.isfinite(bound):
            points.append(x + 1j * bound)
            points.append(x - 1j * bound)
        # random points of the disk
        rho = r * np.sqrt(rng.uniform(size=count))
        phi = rng.uniform(0, 2 * np.pi, size=count)
        points.append(c + rho * np.exp(1j * phi))
    z = np.concatenate(points)
    inside = np.zeros(z.size, dtype=bool)
    for c, r in zip(centers, radii, strict=True):
        inside |= np.abs(z - c) <= r * (1 + 1e-12)
    keep = inside & (z.real >= threshold) & (np.abs(z.imag) <= bound)
    return z[keep]


@pytest.mark.parametrize("seed", range(40))
def test_farthest_enclosed_distance_against_brute_force(seed):
    # Disks as Gershgorin gives them for a generator: centre -(exit rate) <= 0, radius <= the
    # exit rate, so no disk reaches right of 0; the shift is a small positive number.
    rng = np.random.default_rng(seed)
    disks = int(rng.integers(1, 5))
    centers = -rng.uniform(0.0, 5.0, size=disks)
    radii = -centers * rng.uniform(0.2, 1.0, size=disks)
    radii[0] = -centers[0]  # a conserving column: the disk touches 0
    bound = float(rng.choice([rng.uniform(0.05, 3.0), np.inf, 0.0]))
    shift = float(rng.uniform(1e-9, 1e-3))
    threshold = float(rng.uniform((centers - radii).min() - 0.5, 0.1))
    _compare_with_brute_force(centers, radii, bound, shift, threshold, rng)


def _compare_with_brute_force(centers, radii, bound, shift, threshold, rng):
    enclosure = SpectrumEnclosure(centers, radii, bound)
    value = farthest_enclosed_distance(enclosure, shift, threshold)
    samples = _region_samples(centers, radii, bound, threshold, rng)
    if samples.size == 0:
        assert value == 0.0
        return
    brute = float(np.abs(samples - shift).max())
    scale = float((radii + np.abs(centers)).max())
    # An upper bound of the true farthest distance (conservative) ...
    assert value >= brute - 1e-12 * scale, f"not conservative: {value} < {brute}"
    # ... and a tight one: boundary sampling comes within ~2 r / count of it.
    assert value <= brute + 1e-4 * scale, f"not tight: {value} > {brute}"


def test_farthest_distance_when_a_disk_reaches_past_the_shift():
    # The docstring asks only shift >= c. Disk |z + 1| <= 3 (reaching Re z = 2, right of the
    # shift 0), strip |Im z| <= 0.5, half-plane Re z >= -0.5: the farthest region point is
    # where the circle meets Im z = +-0.5 on the right, (-1 + sqrt(9 - 0.25), +-0.5), at
    # distance hypot(-1 + sqrt(8.75), 0.5) ~ 2.02 (elementary geometry).
    enclosure = SpectrumEnclosure(np.array([-1.0]), np.array([3.0]), 0.5)
    expected = np.hypot(-1 + np.sqrt(8.75), 0.5)
    assert farthest_enclosed_distance(enclosure, 0.0, -0.5) >= expected * (1 - 1e-12)
    # The same by brute force, for random disks that reach past the shift.
    rng = np.random.default_rng(99)
    for _ in range(10):
        centers = -rng.uniform(0.0, 3.0, size=2)
        radii = rng.uniform(0.5, 4.0, size=2)
        _compare_with_brute_force(centers, radii, float(rng.uniform(0.05, 1.0)), 1e-6,
                                  float(rng.uniform(-1.0, 0.0)), rng)


def test_empty_region_is_zero():
    enclosure = SpectrumEnclosure(np.array([-3.0]), np.array([1.0]), 0.5)
    assert farthest_enclosed_distance(enclosure, 1e-9, -1.0) == 0.0


def test_simple_cases_by_hand():
    # One disk |z + 2| <= 2, shift 0.
    enclosure = SpectrumEnclosure(np.array([-2.0]), np.array([2.0]), np.inf)
    # Whole disk kept: the farthest point is the leftmost one, -4.
    assert farthest_enclosed_distance(enclosure, 0.0, -5.0) == pytest.approx(4.0)
    # Cut at Re z = -2: the corners -2 +- 2i, at distance sqrt(8).
    assert farthest_enclosed_distance(enclosure, 0.0, -2.0) == pytest.approx(np.sqrt(8.0))
    # With |Im z| <= 1 the leftmost point -4 is still kept.
    strip = SpectrumEnclosure(np.array([-2.0]), np.array([2.0]), 1.0)
    assert farthest_enclosed_distance(strip, 0.0, -5.0) == pytest.approx(4.0)
    # Cut at Re z = -3 as well: the corners -3 +- i (the circle is at height sqrt(3) there).
    assert farthest_enclosed_distance(strip, 0.0, -3.0) == pytest.approx(np.hypot(3.0, 1.0))
    # Two disks: the farther one decides.
    two = SpectrumEnclosure(np.array([-2.0, -1.0]), np.array([2.0, 1.0]), np.inf)
    assert farthest_enclosed_distance(two, 0.0, -1.0) == pytest.approx(np.hypot(1.0, np.sqrt(3)))


def _own_enclosure(W):
    """Gershgorin column disks (Gershgorin 1931; Horn and Johnson 2013, Matrix Analysis,
    6.1.1) and the Bendixson bound |Im lambda| <= ||(W - W^T)/2||_2 (Bendixson 1902), built
    here from the dense matrix."""
    centers = np.diag(W).copy()
    radii = np.abs(W).sum(axis=0) - np.abs(centers)
    bound = float(np.linalg.norm((W - W.T) / 2, 2))
    return SpectrumEnclosure(centers, radii, bound)


MODELS = {
    "driven-torus": LatticeWalk((10, 9), ("periodic", "periodic"), (1.0, 0.8), (0.4, 0.8)),
    "barriers-3d": LatticeWalk((4, 5, 3), ("periodic", "reflecting", "absorbing"),
                               (1.3, 0.9, 0.5), (0.4, 0.6, 1.2),
                               Disorder("bonds", "lognormal", 0.5, 1.5, 0.9, 1)),
    "traps-2d": LatticeWalk((8, 7), ("periodic", "reflecting"), (1.2, 0.5), (0.3, 0.9),
                            Disorder("sites", "uniform", 0.2, 3.0, 0.5, 2)),
}


@pytest.mark.parametrize("name", sorted(MODELS))
def test_certificate_is_conservative_on_random_generators(name):
    # Every eigenvalue with Re >= t lies within farthest_enclosed_distance(t) of the shift.
    W = dense_generator(MODELS[name])
    values = np.linalg.eigvals(W)
    enclosure = _own_enclosure(W)
    shift = 1e-9 * float(-np.diag(W).min())
    scale = float(np.abs(W).sum(axis=0).max())
    # Thresholds from just below the slowest eigenvalue (rounding can put 0 at +1e-16,
    # outside the disks) down to the fastest.
    thresholds = [values.real.max() - 1e-12 * scale,
                  *np.quantile(values.real, [0.95, 0.8, 0.5, 0.2, 0.0])]
    for threshold in thresholds:
        slow = values[values.real >= threshold]
        required = farthest_enclosed_distance(enclosure, shift, threshold)
        assert np.abs(slow - shift).max() <= required + 1e-12 * scale
        # compact() keeps the same answer.
        assert farthest_enclosed_distance(enclosure.compact(), shift, threshold) == \
            pytest.approx(required, rel=1e-14)
