"""Reaction networks on a finite state projection: row blocks, published laws, bad input."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from pipeline.config import load_config
from pipeline.errors import ConfigError
from pipeline.models import build_model
from pipeline.models.expressions import Expression
from pipeline.observables import stationary_expectations

from .conftest import write_config
from .model_helpers import available_backends, check_error, dense_W, rightmost, solve

BACKENDS = available_backends()

ISOMERIZATION = """
[model]
type = "reactions"
species = ["A"]
bounds = [{n}]
parameters = {{ n = {n}, k2 = {k2} }}

[[model.reactions]]
reactants = {{ A = 1 }}
rate = {k1}

[[model.reactions]]
products = {{ A = 1 }}
propensity = "k2 * (n - A)"
"""

BIRTH_DEATH = """
[model]
type = "reactions"
species = ["X"]
bounds = [{bound}]
truncation = "{truncation}"

[[model.reactions]]
products = {{ X = 1 }}
rate = {birth}

[[model.reactions]]
reactants = {{ X = 1 }}
rate = {death}
"""


def model_from(tmp_path, text, name="net"):
    return build_model(load_config(write_config(tmp_path, name, text)).model)


def test_two_species_rows_against_loops(tmp_path):
    # A + B -> C (mass action c C(a,1) C(b,1)), 2A -> B (c C(a,2)), C -> A + B: each jump by
    # plain loops over the states of the projection.
    model = model_from(tmp_path, """
[model]
type = "reactions"
species = ["A", "B", "C"]
bounds = [3, 2, 2]
[[model.reactions]]
reactants = { A = 1, B = 1 }
products = { C = 1 }
rate = 0.7
[[model.reactions]]
reactants = { A = 2 }
products = { B = 1 }
rate = 0.3
[[model.reactions]]
reactants = { C = 1 }
products = { A = 1, B = 1 }
rate = 1.1
""")
    shape = (4, 3, 3)
    n = math.prod(shape)
    W = np.zeros((n, n))
    for index in range(n):
        a, b, c = np.unravel_index(index, shape)
        for rate, change in ((0.7 * a * b, (-1, -1, 1)), (0.3 * a * (a - 1) / 2, (-2, 1, 0)),
                             (1.1 * c, (1, 1, -1))):
            target = (a + change[0], b + change[1], c + change[2])
            W[index, index] -= rate  # 'leak': jumps out of the projection are exits
            if all(0 <= t < s for t, s in zip(target, shape, strict=True)):
                W[np.ravel_multi_index(target, shape), index] += rate
    np.testing.assert_allclose(dense_W(model, [5, 17]), W, atol=1e-14)
    assert not model.conserving


@pytest.mark.parametrize("backend_name", BACKENDS)
def test_isomerization_spectrum_and_binomial_law(tmp_path, backend_name):
    # Jahnke and Huisinga 2007, Solving the chemical master equation for monomolecular
    # reaction systems analytically, J. Math. Biol. 54, 1: for A <-> B with n molecules the
    # eigenvalues are -m (k1 + k2), m = 0..n, and the stationary law of A is
    # Binomial(n, k2 / (k1 + k2)).
    n, k1, k2 = 25, 0.6, 0.9
    model = model_from(tmp_path, ISOMERIZATION.format(n=n, k1=k1, k2=k2))
    assert model.conserving  # the propensity vanishes at the bound: nothing leaks
    modes, stationary, _ = solve(backend_name, model, 6, method="shift-invert")
    np.testing.assert_allclose(modes.values.real, -np.arange(6) * (k1 + k2), atol=1e-9)
    np.testing.assert_allclose(stationary.distribution,
                               stats.binom.pmf(np.arange(n + 1), n, k2 / (k1 + k2)), atol=1e-12)
    means = stationary_expectations(model, stationary.distribution)["mean_counts"][1]
    assert means[0] == pytest.approx(n * k2 / (k1 + k2), rel=1e-10)


@pytest.mark.parametrize("backend_name", BACKENDS)
def test_birth_death_poisson_law_and_truncation_outflow(tmp_path, backend_name):
    # Constant birth b, linear death d x: the stationary law is Poisson(b / d) (e.g. Gardiner
    # 2009, Stochastic Methods, 11.1; common practice). Truncated at 40 with 'reflect', the
    # outflow the projection drops is b P(X = 40) under the computed law.
    birth, death, bound = 3.0, 0.5, 40
    model = model_from(tmp_path, BIRTH_DEATH.format(bound=bound, truncation="reflect",
                                                    birth=birth, death=death))
    _, stationary, _ = solve(backend_name, model, 3, method="dense")
    poisson = stats.poisson.pmf(np.arange(bound + 1), birth / death)
    np.testing.assert_allclose(stationary.distribution, poisson / poisson.sum(), atol=1e-12)
    observed = stationary_expectations(model, stationary.distribution)
    outflow = observed["outflow"][1][0]
    assert outflow == pytest.approx(birth * stationary.distribution[-1], rel=1e-12)
    assert outflow < 1e-10


@pytest.mark.parametrize("backend_name", BACKENDS)
def test_leaking_projection_decay_rate_is_the_outflow(tmp_path, backend_name):
    # With 'leak' the slowest mode v0 (quasi-stationary state) loses mass at rate -lambda_0 =
    # sum_x v0(x) outflow(x) / sum v0 (1^T W v0 = lambda_0 1^T v0; definition of W); a tight
    # bound gives a visible truncation error, checked against a dense eigensolver.
    model = model_from(tmp_path, BIRTH_DEATH.format(bound=8, truncation="leak", birth=3.0,
                                                    death=0.5))
    modes, _, _ = solve(backend_name, model, 2, method="dense", vectors=True)
    v0 = np.real(modes.vectors[:, 0])
    v0 /= v0.sum()
    leak = float(v0 @ model.outflow(0, model.n_states)[:, 0])
    assert -modes.values[0].real == pytest.approx(leak, rel=1e-10)
    assert -modes.values[0].real == pytest.approx(-rightmost(dense_W(model), 1)[0].real,
                                                  rel=1e-10)
    assert leak > 1e-3


def test_expression_language_is_a_whitelist():
    expression = Expression("k * hill(A, K, 2) + max(A - 1, 0) ** 0.5", ("A", "k", "K"), "f")
    A = np.arange(5.0)
    expected = 2.0 * A**2 / (9.0 + A**2) + np.maximum(A - 1, 0) ** 0.5
    np.testing.assert_allclose(expression({"A": A, "k": 2.0, "K": 3.0}), expected)
    for text, fragment in [("__import__('os')", "unknown function"), ("A.real", "Attribute"),
                           ("[A]", "List"), ("A if A else 1", "IfExp"), ("B * 2", "'B'"),
                           ("k *", "cannot parse"), ("lambda: 1", "Lambda")]:
        with pytest.raises(ConfigError, match=fragment):
            Expression(text, ("A", "k"), "model.reactions[0].propensity")


@pytest.mark.parametrize("reactions,fragment", [
    ('reactants = { Z = 1 }\nrate = 1.0', "unknown species 'Z'"),
    ('products = { X = 1 }\npropensity = "2 * Y"', "unknown name 'Y'"),
    ('products = { X = 1 }', "exactly one of rate"),
    ('products = { X = 9 }\nrate = 1.0', "model.reactions[0]: changes X by 9"),
    ('reactants = { X = 1 }\npropensity = "2.0"', "would make a count negative"),
    ('products = { X = 1 }\npropensity = "1 - X"', "propensity is -"),
    ('reactants = { X = 1 }\nproducts = { X = 1 }\nrate = 1.0', "changes nothing"),
])
def test_bad_reaction_input_is_one_line(tmp_path, capsys, reactions, fragment):
    path = write_config(tmp_path, "bad", f"""
[model]
type = "reactions"
species = ["X"]
bounds = [4]
[[model.reactions]]
{reactions}
""")
    check_error(capsys, path, fragment)
