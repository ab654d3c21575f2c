"""The mode ordering rule on hand-made sets (README "Conventions": slowest first, i.e.
decreasing real part, then increasing imaginary part; multiplicities kept)."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.modes import grouping_tolerance, order_modes, real_part_groups, take_slowest


def ordered(values, tolerance=1e-12):
    values = np.asarray(values, dtype=complex)
    return values[order_modes(values, tolerance)]


def test_decreasing_real_part():
    values = [-3.0, 0.0, -0.5, -2.0 + 0j, -1.0]
    np.testing.assert_array_equal(ordered(values), [0.0, -0.5, -1.0, -2.0, -3.0])


def test_conjugate_pair_negative_imaginary_first():
    values = [-1 + 2j, -0.2 + 0j, -1 - 2j, 0, -0.5 + 1j, -0.5 - 1j]
    np.testing.assert_array_equal(
        ordered(values), [0, -0.2, -0.5 - 1j, -0.5 + 1j, -1 - 2j, -1 + 2j])


def test_equal_real_parts_by_increasing_imaginary_part():
    values = [-1 + 3j, -1 + 0j, -1 - 1j, -1 + 1j, -1 - 3j]
    np.testing.assert_array_equal(ordered(values), [-1 - 3j, -1 - 1j, -1, -1 + 1j, -1 + 3j])


def test_near_equal_real_parts_grouped_within_tolerance():
    # Real parts 1e-13 apart: one group under tolerance 1e-12 (imaginary part decides), two
    # groups under tolerance 1e-15 (real part decides).
    a, b = -1 + 1e-13 + 1j, -1 - 1j
    np.testing.assert_array_equal(ordered([a, b], 1e-12), [b, a])
    np.testing.assert_array_equal(ordered([a, b], 1e-15), [a, b])
    np.testing.assert_array_equal(ordered([b, a], 1e-15), [a, b])


def test_multiplicities_kept():
    values = [-1.0, 0.0, -1.0, -1.0, -2 + 1j, -2 + 1j]
    result = ordered(values)
    np.testing.assert_array_equal(result, [0, -1, -1, -1, -2 + 1j, -2 + 1j])


def test_order_is_a_permutation():
    rng = np.random.default_rng(12)
    values = rng.normal(size=40) + 1j * rng.normal(size=40)
    values = np.concatenate([values, values.conj(), values[:5]])
    order = order_modes(values, 1e-12)
    assert sorted(order.tolist()) == list(range(values.size))
    result = values[order]
    assert (np.diff(result.real) <= 1e-12).all()


def test_real_part_groups_labels():
    values = np.array([0, -1 - 1j, -1 + 1j, -1 - 1e-14, -2, -3, -3])
    np.testing.assert_array_equal(real_part_groups(values, 1e-12), [0, 1, 1, 1, 2, 3, 3])
    assert real_part_groups(np.array([]), 1e-12).size == 0


@pytest.mark.parametrize(
    ("count", "expected", "complete"),
    [
        (1, [0], True),
        (2, [0, -1 - 1j], False),  # cuts the conjugate pair
        (3, [0, -1 - 1j, -1 + 1j], True),
        (4, [0, -1 - 1j, -1 + 1j, -2], False),  # cuts the double eigenvalue -2
        (5, [0, -1 - 1j, -1 + 1j, -2, -2], True),
        (6, [0, -1 - 1j, -1 + 1j, -2, -2, -4], True),
        (9, [0, -1 - 1j, -1 + 1j, -2, -2, -4], True),  # more than there are
    ],
)
def test_take_slowest(count, expected, complete):
    values = np.array([-2, -1 + 1j, -4, 0, -2, -1 - 1j], dtype=complex)
    indices, group_complete = take_slowest(values, count, 1e-12)
    np.testing.assert_array_equal(values[indices], expected)
    assert group_complete is complete


def test_take_slowest_tolerance_joins_a_group():
    values = np.array([0, -1, -1 - 1e-10])
    assert take_slowest(values, 2, 1e-9)[1] is False
    assert take_slowest(values, 2, 1e-12)[1] is True


def test_grouping_tolerance_formula():
    # README "Conventions": real parts within max(1e-8 * spread, 1e-12 * ||W||_1) are equal.
    values = np.array([0, -10 + 5j, -3])
    assert grouping_tolerance(values, 1.0) == pytest.approx(1e-7)
    assert grouping_tolerance(values, 1e6) == pytest.approx(1e-6)
    assert grouping_tolerance(np.array([-1.0, -1.0]), 100.0) == pytest.approx(1e-10)
    assert grouping_tolerance(np.array([]), 0.0) > 0


def test_take_slowest_reports_a_cut_inside_a_chained_group():
    # Real parts -1.0, -1.9, -2.8 with tolerance 1.0 form one group by chaining (each step is
    # within the tolerance; pipeline.modes docstring: consecutive real parts). Inside the group
    # the imaginary part orders them: -1.0 (0j), -2.8 (1j), -1.9 (2j). Cutting after the first
    # splits the group, although the next *ordered* mode is 1.8 > tolerance away in real part.
    values = np.array([-1.0 + 0j, -1.9 + 2j, -2.8 + 1j])
    indices, group_complete = take_slowest(values, 1, 1.0)
    np.testing.assert_array_equal(values[indices], [-1.0])
    assert group_complete is False
    assert take_slowest(values, 3, 1.0)[1] is True
