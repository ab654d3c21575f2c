"""Exclusion process: particles on a 1D lattice of ``L`` sites, at most one per site.

A particle hops to the right neighbour at rate ``right`` (p) and to the left one at rate
``left`` (q) when that neighbour is empty. Sites are numbered ``0..L-1`` from left to right;
a configuration is a bit pattern (uint64) whose bit ``c`` is the occupation of site ``c``.

* ``periodic`` (a ring with a fixed number ``N`` of particles): states are the ``C(L, N)``
  patterns with ``N`` bits set, numbered by the combinatorial number system (colex rank):
  ``rank = sum_k C(c_k, k)`` over the occupied sites ``c_1 < ... < c_N`` (Knuth 2011, TAOCP
  vol. 4A, 7.2.1.3, eq. (20)). A hop across an inner bond ``(c, c+1)`` moves the k-th
  particle by one site and changes the rank by ``C(c, k - 1)``, so ranks of neighbours are
  computed without any table of states; only the wrap bond ``(L-1, 0)`` needs a full rank.
* ``open`` (a segment): every pattern is a state (``2^L`` states, state = pattern);
  particles enter site 0 at rate ``alpha``, leave it to the left at ``gamma``, leave site
  ``L-1`` to the right at ``beta`` and enter it at ``delta``.

Observables (linear in the distribution): the density profile ``<n_c>`` per site and the
particle current per bond, ``p <n_c (1 - n_{c+1})> - q <(1 - n_c) n_{c+1}>`` (left to right
positive). Bonds are ``(c, c+1 mod L)`` on a ring; on a segment the bonds are the entry
``in -> 0``, the inner bonds, and the exit ``L-1 -> out``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from pipeline.errors import ModelError
from pipeline.models.base import LinearObservable, Model, RowBlock, compress_stencil

__all__ = ["ExclusionProcess", "binomial_table", "rank_patterns", "unrank_patterns"]

MAX_RING_STATES = 2**40  # ranks are int64; far beyond what fits in memory anyway
MAX_OPEN_SITES = 40
LU_WARNING_STATES = 20_000


def binomial_table(size: int) -> np.ndarray:
    """``table[c, k] = C(c, k)`` for ``0 <= c, k <= size`` (int64; exact below 2^63)."""
    table = np.zeros((size + 1, size + 1), dtype=np.int64)
    for c in range(size + 1):
        for k in range(c + 1):
            table[c, k] = math.comb(c, k)
    return table


def rank_patterns(patterns: np.ndarray, sites: int, table: np.ndarray) -> np.ndarray:
    """Colex ranks of uint64 bit patterns (all with the same number of set bits): int64."""
    rank = np.zeros(patterns.shape, dtype=np.int64)
    count = np.zeros(patterns.shape, dtype=np.int64)
    for c in range(sites):  # a loop over sites, vectorized over states
        bit = ((patterns >> np.uint64(c)) & np.uint64(1)).astype(bool)
        count += bit
        rank += np.where(bit, table[c, count], 0)
    return rank


def unrank_patterns(ranks: np.ndarray, particles: int, table: np.ndarray) -> np.ndarray:
    """Bit patterns (uint64) of colex ranks: the inverse of :func:`rank_patterns`."""
    remaining = np.asarray(ranks, dtype=np.int64).copy()
    patterns = np.zeros(remaining.shape, dtype=np.uint64)
    for k in range(particles, 0, -1):  # the k-th particle sits at the largest c, C(c,k) <= r
        column = table[:, k]
        site = np.searchsorted(column, remaining, side="right") - 1
        patterns |= np.left_shift(np.uint64(1), site.astype(np.uint64))
        remaining -= column[site]
    return patterns


class ExclusionProcess(Model):
    """Exclusion process on a ring (fixed ``N``) or an open segment; see the module docstring."""

    name = "exclusion"

    def __init__(self, sites: int, boundary: str, right: float, left: float,
                 particles: int | None = None, alpha: float = 0.0, beta: float = 0.0,
                 gamma: float = 0.0, delta: float = 0.0) -> None:
        self.sites = int(sites)
        self.boundary = boundary
        self.right, self.left = float(right), float(left)
        self.alpha, self.beta, self.gamma, self.delta = (float(alpha), float(beta),
                                                         float(gamma), float(delta))
        if boundary == "periodic":
            if particles is None or not 0 <= particles <= self.sites:
                raise ModelError(f"model.particles: must be in 0..{self.sites}, got {particles}")
            self.particles = int(particles)
            self._n_states = math.comb(self.sites, self.particles)
            if self._n_states > MAX_RING_STATES or self.sites > 62:
                raise ModelError(f"model.sites: C({self.sites}, {self.particles}) states are "
                                 "too many; fix: fewer sites")
            self.table = binomial_table(self.sites)
        else:
            if self.sites > MAX_OPEN_SITES:
                raise ModelError(f"model.sites: 2^{self.sites} states are too many for an "
                                 f"open segment (at most {MAX_OPEN_SITES} sites)")
            self.particles = None
            self._n_states = 2**self.sites
            self.table = None
        fits = self.nnz_upper_bound(0, self._n_states) < 2**31 - 1
        self.index_dtype = np.int32 if fits else np.int64

    @classmethod
    def from_config(cls, config: Any) -> ExclusionProcess:
        return cls(config.sites, config.boundary, config.right, config.left,
                   particles=config.particles, alpha=config.alpha, beta=config.beta,
                   gamma=config.gamma, delta=config.delta)

    # -- Model interface ---------------------------------------------------------------

    @property
    def n_states(self) -> int:
        return self._n_states

    @property
    def conserving(self) -> bool:
        return True

    def _directions(self) -> int:
        return int(self.right > 0) + int(self.left > 0)

    def nnz_upper_bound(self, start: int, stop: int) -> int:
        rows = stop - start
        if self.boundary == "periodic":
            # A bond can carry a hop only where its two sites differ: at most
            # 2 min(N, L - N) such bonds on a ring, each with one direction.
            walls = 2 * min(self.particles, self.sites - self.particles)
            return rows * (1 + min(walls, self.sites))
        return rows * (self.sites + 2)

    def nnz_count(self) -> int:
        """Exact number of stored nonzeros: diagonal plus one entry per possible hop."""
        n, L = self._n_states, self.sites
        if self.boundary == "periodic":
            N = self.particles
            if N in (0, L):
                return n
            if L == 2:  # both bonds of a 2-ring join the same two states: one entry each
                return n + 2 * int(self._directions() > 0)
            # Each bond has sites (0, 1) in C(L-2, N-1) states, and (1, 0) in as many.
            return n + L * math.comb(L - 2, N - 1) * self._directions()
        inner = (L - 1) * 2 ** (L - 2) * self._directions() if L >= 2 else 0
        half = 2 ** (L - 1)
        boundary = half * sum(rate > 0 for rate in (self.alpha, self.beta, self.gamma,
                                                    self.delta))
        return n + inner + boundary

    def patterns(self, start: int, stop: int) -> np.ndarray:
        """Bit patterns (uint64) of states ``start..stop-1``."""
        if self.boundary == "periodic":
            return unrank_patterns(np.arange(start, stop, dtype=np.int64), self.particles,
                                   self.table)
        return np.arange(start, stop, dtype=np.uint64)

    def occupation(self, start: int, stop: int) -> np.ndarray:
        """Occupations ``n_c`` of states ``start..stop-1``: uint8 ``[state, site]``."""
        patterns = self.patterns(start, stop)
        shifts = np.arange(self.sites, dtype=np.uint64)
        return ((patterns[:, None] >> shifts[None, :]) & np.uint64(1)).astype(np.uint8)

    def state_labels(self, start: int, stop: int) -> dict[str, np.ndarray]:
        return {"pattern": self.patterns(start, stop)}

    def row_block(self, start: int, stop: int) -> RowBlock:
        """Rows ``start..stop-1`` of ``W``: for each bond, the state whose hop across it
        leads into the row's state, and the diagonal."""
        rows = stop - start
        L, p, q = self.sites, self.right, self.left
        patterns = self.patterns(start, stop)
        state = np.arange(start, stop, dtype=np.int64)
        one = np.uint64(1)
        bits = [((patterns >> np.uint64(c)) & one).astype(bool) for c in range(L)]
        periodic = self.boundary == "periodic"
        inner_bonds = L - 1 if L > 1 else 0
        width = inner_bonds + (1 if periodic and L > 2 else 0) + (0 if periodic else 2) + 1
        dtype = self.index_dtype  # every index and shifted index fits (see __init__)
        columns = np.empty((rows, width), dtype=dtype)
        values = np.zeros((rows, width))
        state = state.astype(dtype)
        hops_right = np.zeros(rows, dtype=np.int64)  # possible hops out, by direction
        hops_left = np.zeros(rows, dtype=np.int64)
        count_below = np.zeros(rows, dtype=np.int64)  # particles on sites < c
        for c in range(inner_bonds):  # a loop over bonds, vectorized over states
            here, there = bits[c], bits[c + 1]
            # Into the row's state across (c, c+1): a right hop when it has (0, 1) here (the
            # particle came from c), a left hop when it has (1, 0) (it came from c+1).
            came_right = there > here
            came_left = here > there
            direction = came_left.astype(dtype) - came_right.astype(dtype)  # +1, -1 or 0
            if periodic:
                step = self.table[c].take(count_below).astype(dtype)  # the rank change
                np.add(state, direction * step, out=columns[:, c])
            else:
                np.bitwise_xor(state, dtype(3 << c), out=columns[:, c])
            values[:, c] = came_right * p + came_left * q
            hops_right += came_left  # (1, 0): the particle can hop right
            hops_left += came_right
            count_below += here
        exit_rate = hops_right * p + hops_left * q
        slot = inner_bonds
        if periodic and L > 2:
            # The wrap bond (L-1, 0): the moved particle changes its index, so rank in full.
            first, last = bits[0], bits[L - 1]
            came_right = first & ~last  # came from L-1 to 0
            came_left = ~first & last  # came from 0 to L-1
            source = patterns ^ ((one << np.uint64(L - 1)) | one)
            differs = came_right | came_left
            columns[:, slot] = state
            if differs.any():
                columns[differs, slot] = rank_patterns(source[differs], L, self.table)
            values[:, slot] = came_right * p + came_left * q
            exit_rate += came_left * p + came_right * q
            slot += 1
        elif periodic and L == 2:
            # Both bonds of a 2-ring join the same two states: one entry carries both.
            differs = bits[0] ^ bits[1]
            values[:, 0] = np.where(differs, p + q, 0.0)
            exit_rate = np.where(differs, p + q, 0.0)
        elif not periodic:
            first, last = bits[0], bits[L - 1]
            columns[:, slot] = state ^ 1
            values[:, slot] = np.where(first, self.alpha, self.gamma)
            exit_rate += np.where(first, self.gamma, self.alpha)
            columns[:, slot + 1] = state ^ (1 << (L - 1))
            values[:, slot + 1] = np.where(last, self.delta, self.beta)
            exit_rate += np.where(last, self.beta, self.delta)
            slot += 2
        columns[:, slot] = state
        values[:, slot] = -exit_rate
        present = values != 0.0
        present[:, slot] = True
        return compress_stencil(start, stop, columns, values, present)

    def exact(self):
        from pipeline.analytic.exclusion import ExclusionExact

        return ExclusionExact.for_model(self)

    def describe(self) -> dict[str, Any]:
        info = super().describe()
        info.update(sites=self.sites, boundary=self.boundary, right=self.right, left=self.left,
                    state_order="colex rank of the bit pattern (bit c = site c)"
                    if self.boundary == "periodic" else "state = bit pattern (bit c = site c)")
        if self.boundary == "periodic":
            info["particles"] = self.particles
        else:
            info.update(alpha=self.alpha, beta=self.beta, gamma=self.gamma, delta=self.delta)
        return info

    def warnings(self) -> list[str]:
        if self._n_states <= LU_WARNING_STATES:
            return []
        return [f"{self._n_states} exclusion states: ranked states have no locality, so the "
                "sparse LU of solve.method 'shift-invert' fills in heavily (x380 at 12870 "
                "states); for large systems use solve.method = 'krylov' (not certified)"]

    def observables(self) -> dict[str, LinearObservable]:
        L = self.sites
        bonds = L if self.boundary == "periodic" else L + 1
        return {
            "density": LinearObservable("site", L, self._density,
                                        "mean occupation <n_c> of each site"),
            "current": LinearObservable(
                "bond", bonds, self._current,
                "particle current per bond, left to right positive (ring: bond c joins c and "
                "c+1 mod L; segment: entry, inner bonds, exit)"),
        }

    def _density(self, start: int, stop: int) -> np.ndarray:
        return self.occupation(start, stop).astype(np.float64)

    def _current(self, start: int, stop: int) -> np.ndarray:
        n = self.occupation(start, stop).astype(np.float64)
        p, q = self.right, self.left
        if self.boundary == "periodic":
            following = np.roll(n, -1, axis=1)
            return p * n * (1 - following) - q * (1 - n) * following
        inner = p * n[:, :-1] * (1 - n[:, 1:]) - q * (1 - n[:, :-1]) * n[:, 1:]
        entry = self.alpha * (1 - n[:, :1]) - self.gamma * n[:, :1]
        leaving = self.beta * n[:, -1:] - self.delta * (1 - n[:, -1:])
        return np.hstack([entry, inner, leaving])
