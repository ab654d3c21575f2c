"""Exact results for the hypercubic lattice walk.

The generator of a walk with independent axes is the Kronecker sum of the 1D generators, so
its eigenvalues are all sums ``lambda_0(k_0) + ... + lambda_{d-1}(k_{d-1})`` of 1D eigenvalues
and its stationary law is the product of the 1D laws (common practice: eigenvalues of a
Kronecker sum are the pairwise sums; Horn and Johnson 1991, Topics in Matrix Analysis, 4.4).

1D spectra, forward rate ``u``, backward rate ``v``, ``L`` sites:

* ring: ``-(u+v) + u e^{-iq} + v e^{iq}``, ``q = 2 pi k / L``, ``k = 0..L-1`` (eigenvalues of
  a circulant matrix; Gray 2006, Toeplitz and Circulant Matrices: A Review, eq. 3.7);
* reflecting chain: ``0`` and ``-(u+v) + 2 sqrt(uv) cos(pi k / L)``, ``k = 1..L-1``
  (birth-death chain with constant rates; from memory, cf. Kac 1947 random walk and the
  Ehrenfest model, checked against dense eigensolvers in the tests);
* absorbing chain: ``-(u+v) + 2 sqrt(uv) cos(pi k / (L+1))``, ``k = 1..L`` (tridiagonal
  Toeplitz matrix; Smith 1985, Numerical Solution of PDEs, eq. 2.23; from memory).

Stationary law per axis: uniform on a ring, ``∝ (u/v)^x`` on a reflecting chain (detailed
balance). Random-trap disorder (every exit from site y scaled by ``tau_y``) makes
``W = W_0 diag(tau)``, so ``p ∝ p_0 / tau`` exactly; random-barrier disorder keeps detailed
balance along reflecting axes and symmetric rings, where ``p_0`` stays stationary.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from pipeline.modes import grouping_tolerance, order_modes, real_part_groups

if TYPE_CHECKING:
    from pipeline.models.lattice import LatticeWalk

__all__ = ["LatticeExact", "chain_spectrum", "chain_stationary"]

RING_SOURCE = "Gray 2006, Toeplitz and Circulant Matrices: A Review, eq. 3.7 (circulant spectrum)"
REFLECTING_SOURCE = "birth-death chain with constant rates, 0 and -(u+v)+2sqrt(uv)cos(pi k/L)"
ABSORBING_SOURCE = "Smith 1985, tridiagonal Toeplitz eigenvalues -(u+v)+2sqrt(uv)cos(pi k/(L+1))"
KRONECKER_SOURCE = "Horn and Johnson 1991, Topics in Matrix Analysis, Thm 4.4.5 (Kronecker sum)"
STATIONARY_SOURCE = "detailed balance along each axis: uniform ring, (u/v)^x reflecting chain"
TRAP_SOURCE = "W = W0 diag(tau) for random traps, so p = p0/tau (common practice)"


def chain_spectrum(size: int, boundary: str, forward: float, backward: float) -> np.ndarray:
    """All ``size`` eigenvalues of a 1D walk (complex128, unordered)."""
    u, v = forward, backward
    if boundary == "periodic":
        q = 2.0 * np.pi * np.arange(size) / size
        values = -(u + v) + u * np.exp(-1j * q) + v * np.exp(1j * q)
        return values.astype(complex)
    root = 2.0 * math.sqrt(u * v)
    if boundary == "reflecting":
        k = np.arange(1, size)
        rest = -(u + v) + root * np.cos(np.pi * k / size)
        return np.concatenate([[0.0], rest]).astype(complex)
    if boundary == "absorbing":
        k = np.arange(1, size + 1)
        return (-(u + v) + root * np.cos(np.pi * k / (size + 1))).astype(complex)
    raise ValueError(f"unknown boundary {boundary!r}")


def chain_stationary(size: int, boundary: str, forward: float, backward: float) -> np.ndarray:
    """Stationary law of a conserving 1D walk (float64 ``[size]``, sums to 1)."""
    if boundary == "periodic":
        return np.full(size, 1.0 / size)
    if boundary != "reflecting":
        raise ValueError("an absorbing chain has no stationary law")
    x = np.arange(size, dtype=float)
    if backward == 0:
        return (x == size - 1).astype(float)
    if forward == 0:
        return (x == 0).astype(float)
    log_weight = x * math.log(forward / backward)
    weight = np.exp(log_weight - log_weight.max())
    return weight / weight.sum()


class LatticeExact:
    """Exact spectrum and stationary law of a :class:`~pipeline.models.lattice.LatticeWalk`.

    ``has_spectrum`` is False with disorder (no closed form); ``has_stationary`` is True when
    the stationary law is known (see the module docstring for when).
    """

    def __init__(self, model: LatticeWalk) -> None:
        self.model = model
        disorder = model.disorder
        self.has_spectrum = disorder is None
        if not model.conserving:
            self.has_stationary = False
        elif disorder is None or disorder.on == "sites":
            self.has_stationary = True
        else:
            self.has_stationary = all(
                kind == "reflecting" or u == v
                for kind, u, v in zip(model.boundary, model.forward, model.backward, strict=True)
            )
        spectrum_sources: list[str] = []
        if self.has_spectrum:
            kinds = set(model.boundary)
            spectrum_sources += [{"periodic": RING_SOURCE, "reflecting": REFLECTING_SOURCE,
                                  "absorbing": ABSORBING_SOURCE}[k] for k in sorted(kinds)]
            if model.dims > 1:
                spectrum_sources.append(KRONECKER_SOURCE)
        stationary_sources: list[str] = []
        if self.has_stationary:
            stationary_sources.append(STATIONARY_SOURCE)
            if disorder is not None:
                stationary_sources.append(TRAP_SOURCE if disorder.on == "sites" else
                                          "random barriers keep detailed balance "
                                          "(common practice)")
        self.spectrum_sources = tuple(spectrum_sources)
        self.stationary_sources = tuple(stationary_sources)
        self.sources = self.spectrum_sources + self.stationary_sources
        self._trap_sum: float | None = None

    @classmethod
    def for_model(cls, model: LatticeWalk) -> LatticeExact | None:
        exact = cls(model)
        return exact if (exact.has_spectrum or exact.has_stationary) else None

    @property
    def scale(self) -> float:
        """``||W||_1`` of the ordered lattice: twice the largest exit rate."""
        return 2.0 * sum(u + v for u, v in zip(self.model.forward, self.model.backward,
                                               strict=True))

    def slowest_eigenvalues(self, count: int) -> np.ndarray | None:
        """The ``count`` slowest eigenvalues, slowest first, extended to finish the last
        group of equal real parts (so a multiset comparison can pick any member of it)."""
        if not self.has_spectrum:
            return None
        m = self.model
        count = min(count, m.n_states)
        keep = count + 8
        combined = np.zeros(1, dtype=complex)
        for axis in range(m.dims):
            axis_values = chain_spectrum(m.shape[axis], m.boundary[axis], m.forward[axis],
                                         m.backward[axis])
            axis_values = _slowest_with_ties(axis_values, keep, self.scale)
            combined = (combined[:, None] + axis_values[None, :]).ravel()
            combined = _slowest_with_ties(combined, keep, self.scale)
        ordered = combined[order_modes(combined, grouping_tolerance(combined, self.scale))]
        tolerance = grouping_tolerance(ordered, self.scale)
        groups = real_part_groups(ordered, tolerance)
        last_group = groups[count - 1]
        return ordered[groups <= last_group]

    def stationary(self, start: int, stop: int) -> np.ndarray | None:
        """Exact stationary probabilities of states ``start..stop-1`` (float64)."""
        if not self.has_stationary:
            return None
        m = self.model
        coordinates = m.coordinates(start, stop)
        probability = np.ones(stop - start)
        for axis in range(m.dims):
            law = chain_stationary(m.shape[axis], m.boundary[axis], m.forward[axis],
                                   m.backward[axis])
            probability *= law[coordinates[:, axis]]
        if m.disorder is not None and m.disorder.on == "sites":
            probability /= m.trap_factors(start, stop) * self._trap_normalization()
        return probability

    def _trap_normalization(self, block: int = 1 << 20) -> float:
        """``sum_y p0(y) / tau(y)``, streamed over blocks of states."""
        if self._trap_sum is None:
            m = self.model
            total = 0.0
            for start in range(0, m.n_states, block):
                stop = min(start + block, m.n_states)
                coordinates = m.coordinates(start, stop)
                p0 = np.ones(stop - start)
                for axis in range(m.dims):
                    p0 *= chain_stationary(m.shape[axis], m.boundary[axis], m.forward[axis],
                                           m.backward[axis])[coordinates[:, axis]]
                total += float(np.sum(p0 / m.trap_factors(start, stop)))
            self._trap_sum = total
        return self._trap_sum


def _slowest_with_ties(values: np.ndarray, keep: int, scale: float) -> np.ndarray:
    """The ``keep`` values of largest real part plus any that tie with the last kept."""
    if values.size <= keep:
        return values
    tolerance = grouping_tolerance(values, scale)
    order = np.argsort(-values.real, kind="stable")
    threshold = values.real[order[keep - 1]] - tolerance
    return values[values.real >= threshold]
