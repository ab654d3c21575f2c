"""The coarse start of the symmetric-part search (pipeline/backends/coarse_start.py) and the
one-factorization path of the slepc backend built on it, against published lattice spectra:
the torus spectrum is the Kronecker sum of two circulant spectra (Horn and Johnson 1991,
Topics in Matrix Analysis, 4.4; Gray 2006, Toeplitz and Circulant Matrices, eq. 3.7)."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.models.lattice import LatticeWalk

from .conftest import multiset_distance, published_lattice_spectrum, slowest_set

slepc_backend = pytest.importorskip("pipeline.backends.slepc_")
SlepcBackend = slepc_backend.SlepcBackend
pytestmark = pytest.mark.skipif(SlepcBackend.unavailable_reason() is not None,
                                reason=str(SlepcBackend.unavailable_reason()))

DRIVEN = ((96, 96), ("periodic", "periodic"), (1.0, 0.8), (0.6, 0.8))


def test_lattice_aggregates_are_blocks_of_neighbouring_sites():
    model = LatticeWalk((10, 7), ("periodic", "reflecting"), (1.0, 1.0), (1.0, 1.0))
    labels = model.state_aggregates(0, 70, 16)
    coordinates = model.coordinates(0, 70)
    assert np.unique(labels).size == 3 * 2  # ceil(10/4) x ceil(7/4) blocks of 4 x 4
    for label in np.unique(labels):  # a loop over aggregates
        block = coordinates[labels == label]
        assert np.all(block.max(axis=0) - block.min(axis=0) <= 3)
    # the labels of a row range are those of the whole lattice restricted to it
    np.testing.assert_array_equal(model.state_aggregates(13, 50, 16), labels[13:50])
    assert np.unique(LatticeWalk((64,), ("periodic",), (1.0,), (1.0,)).state_aggregates(
        0, 64, 16)).size == 4


def test_coarse_estimates_are_close_lower_bounds_of_the_spectrum():
    """Rayleigh–Ritz values from any subspace are lower bounds of the top eigenvalues one by
    one (Cauchy interlacing; Parlett 1998, 10.1); here they are also within 1%."""
    from pipeline.backends.coarse_start import coarse_start
    from pipeline.backends.inertia_certificate import symmetric_part

    shape, boundary, forward, backward = DRIVEN
    model = LatticeWalk(shape, boundary, forward, backward)
    backend = SlepcBackend()
    operator = backend.assemble(model)
    start, stop = operator.handle["rows"]
    n = operator.n_states
    S, norm_s = symmetric_part(operator.handle["W"], np.ones(stop - start))
    null = np.full(stop - start, 1 / np.sqrt(n))
    found = coarse_start(backend.world, S, null, model.state_aggregates(start, stop, 16), 14,
                         1e-9 * 3.2)
    S.destroy()
    assert found is not None and found.info["states_per_aggregate"] == 16
    # S = (W + W^T)/2 is the symmetric torus with rates (0.8, 0.8) on both axes
    exact = np.sort(published_lattice_spectrum(shape, boundary, (0.8, 0.8),
                                               (0.8, 0.8)).real)[::-1][1:15]
    assert np.all(found.estimates <= exact + 1e-12 * norm_s)
    assert np.all(found.estimates >= exact * 1.01)
    vectors = found.vectors
    np.testing.assert_allclose(vectors.T @ vectors, np.eye(14), atol=1e-10)
    assert np.abs(null @ vectors).max() < 1e-10


@pytest.fixture(scope="module")
def coarse_and_plain():
    """The driven torus solved with the coarse start (size threshold lowered) and with the
    coarse start refused (an impossible gap), so the pseudo-random path runs."""
    shape, boundary, forward, backward = DRIVEN
    results = {}
    for label, threshold, gap in (("coarse", 0, 0.05), ("plain", 0, 1e9)):
        patch = pytest.MonkeyPatch()
        patch.setattr(slepc_backend, "COARSE_START_MIN_STATES", threshold)
        patch.setattr(slepc_backend, "COARSE_GAP", gap)
        backend = SlepcBackend()
        operator = backend.assemble(LatticeWalk(shape, boundary, forward, backward))
        results[label] = backend.slowest_modes(operator, 13, method="shift-invert",
                                               tolerance=1e-12, vectors=True)
        patch.undo()
    return results


@pytest.mark.parametrize("label", ["coarse", "plain"])
def test_both_starts_certify_the_published_slowest_set(coarse_and_plain, label):
    modes = coarse_and_plain[label]
    shape, boundary, forward, backward = DRIVEN
    exact = slowest_set(published_lattice_spectrum(shape, boundary, forward, backward), 13,
                        1e-9)
    assert modes.certified
    assert multiset_distance(modes.values, exact) <= 1e-9
    assert modes.residuals.max() <= 1e-9


def test_the_coarse_start_needs_one_factorization(coarse_and_plain):
    coarse = coarse_and_plain["coarse"].info["rounds"][0]
    plain = coarse_and_plain["plain"].info["rounds"][0]
    assert coarse["start"].startswith("aggregated")
    assert coarse["coarse_start"]["outcome"] == "certified"
    assert coarse["factorizations"] == 1 and plain["factorizations"] == 2
    assert plain["start"] == "pseudo-random"
    assert plain["coarse_start"]["outcome"] == "no clear gap among the coarse estimates"
    assert coarse["solved_columns"] < plain["solved_columns"]
