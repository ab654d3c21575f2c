"""Exact results for the exclusion process.

* Ring, any rates: the stationary law is uniform over the ``C(L, N)`` configurations (every
  configuration has as many ways in as out, so the uniform law balances each state; Liggett
  1985, Interacting Particle Systems, ch. VIII, and common practice), hence density ``N/L``
  and current ``(p - q) N (L - N) / (L (L - 1))`` per bond (the probability that a bond has
  a particle followed by a hole is ``N (L - N) / (L (L - 1))``).
* Symmetric ring (``p = q``), ``1 <= N <= L - 1``: the spectral gap equals the one-particle
  gap ``2 p (1 - cos(2 pi / L))`` (Caputo, Liggett and Richthammer 2010, Proof of Aldous'
  spectral gap conjecture, J. Amer. Math. Soc. 23, Thm 1.1, for the interchange process, whose
  gap the exclusion process shares).
* Totally asymmetric open segment (``q = gamma = delta = 0``): the stationary current is
  ``J = p Z_{L-1} / Z_L`` with ``Z_L = sum_{k=1}^{L} k (2L-1-k)! / (L! (L-k)!)
  (b^{k+1} - a^{k+1}) / (b - a)``, ``a = p/alpha``, ``b = p/beta`` (Derrida, Evans, Hakim and
  Pasquier 1993, J. Phys. A 26, 1493, eq. (39); from memory, checked against dense solves in
  the tests); for ``alpha = beta = p`` this is ``p C_L / C_{L+1}`` with Catalan numbers.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from pipeline.models.exclusion import ExclusionProcess

__all__ = ["ExclusionExact", "open_tasep_current", "ring_current"]

UNIFORM_SOURCE = ("Liggett 1985, Interacting Particle Systems, ch. VIII: the uniform law on "
                  "C(L, N) configurations is stationary for exclusion on a ring")
GAP_SOURCE = ("Caputo, Liggett and Richthammer 2010, Proof of Aldous' spectral gap "
              "conjecture, Thm 1.1: gap = 2 p (1 - cos(2 pi / L))")
RING_CURRENT_SOURCE = "uniform law: current (p - q) N (L - N) / (L (L - 1)) per bond"
OPEN_CURRENT_SOURCE = ("Derrida, Evans, Hakim and Pasquier 1993, J. Phys. A 26, 1493, eq. (39) "
                       "(matrix product solution; from memory)")


def ring_current(sites: int, particles: int, right: float, left: float) -> float:
    """Stationary current per bond of exclusion on a ring (rate units)."""
    L, N = sites, particles
    if L < 2:
        return 0.0
    return (right - left) * N * (L - N) / (L * (L - 1))


def _partition(length: int, a: float, b: float) -> float:
    """``Z_L`` of the open TASEP (module docstring), ``a = p/alpha``, ``b = p/beta``."""
    if length == 0:
        return 1.0
    total = 0.0
    for k in range(1, length + 1):
        weight = k * math.factorial(2 * length - 1 - k) / (
            math.factorial(length) * math.factorial(length - k))
        if abs(b - a) <= 1e-12 * max(abs(a), abs(b)):
            ratio = (k + 1) * a**k  # the limit of (b^(k+1) - a^(k+1)) / (b - a)
        else:
            ratio = (b ** (k + 1) - a ** (k + 1)) / (b - a)
        total += weight * ratio
    return total


def open_tasep_current(sites: int, right: float, alpha: float, beta: float) -> float:
    """Stationary current of the totally asymmetric open segment (rate units)."""
    a, b = right / alpha, right / beta
    return right * _partition(sites - 1, a, b) / _partition(sites, a, b)


class ExclusionExact:
    """Known results of an :class:`~pipeline.models.exclusion.ExclusionProcess`."""

    def __init__(self, model: ExclusionProcess) -> None:
        self.model = model
        ring = model.boundary == "periodic"
        self.has_stationary = ring
        occupied = ring and 1 <= model.particles <= model.sites - 1
        self.gap_known = occupied and model.right == model.left and model.sites >= 2
        self.open_tasep = (not ring and model.left == 0 and model.gamma == 0
                           and model.delta == 0 and model.alpha > 0 and model.beta > 0
                           and model.right > 0)
        self.spectrum_sources = (GAP_SOURCE,) if self.gap_known else ()
        self.stationary_sources = (UNIFORM_SOURCE,) if ring else ()
        observable_sources = ((RING_CURRENT_SOURCE,) if ring else
                              (OPEN_CURRENT_SOURCE,) if self.open_tasep else ())
        self.observable_sources = observable_sources
        self.sources = self.spectrum_sources + self.stationary_sources + observable_sources

    @classmethod
    def for_model(cls, model: ExclusionProcess) -> ExclusionExact | None:
        exact = cls(model)
        return exact if exact.sources else None

    def slowest_eigenvalues(self, count: int) -> np.ndarray | None:
        """Not known beyond the gap (see :meth:`gap`)."""
        return None

    def gap(self) -> float | None:
        """The exact spectral gap ``-Re lambda_1``, or None."""
        if not self.gap_known:
            return None
        m = self.model
        return 2.0 * m.right * (1.0 - math.cos(2.0 * math.pi / m.sites))

    def stationary(self, start: int, stop: int) -> np.ndarray | None:
        if not self.has_stationary:
            return None
        return np.full(stop - start, 1.0 / self.model.n_states)

    def observables(self) -> dict[str, np.ndarray]:
        """Exact stationary expectations of the model's observables, where known."""
        m = self.model
        if m.boundary == "periodic":
            current = ring_current(m.sites, m.particles, m.right, m.left)
            return {"density": np.full(m.sites, m.particles / m.sites),
                    "current": np.full(m.sites, current)}
        if self.open_tasep:
            return {"current": np.full(m.sites + 1,
                                       open_tasep_current(m.sites, m.right, m.alpha, m.beta))}
        return {}
