"""A walker on a d-dimensional hypercubic lattice, optionally with quenched disorder.

States are the sites, numbered by their flat index in C order of the lattice shape:
``state = sum_a x_a * stride_a`` with ``stride_a = prod(size[a+1:])``. Along axis ``a`` the
walker hops to ``x_a + 1`` at rate ``forward[a]`` and to ``x_a - 1`` at rate ``backward[a]``
(rates per unit time). Boundaries per axis:

* ``periodic``: the axis is a ring;
* ``reflecting``: hops off either edge do not exist;
* ``absorbing``: hops off either edge leave the system, so ``W`` is a sub-generator.

Disorder (optional) multiplies rates by seeded random factors: ``bonds`` gives every bond one
factor shared by its two hop directions (random barriers); ``sites`` gives every site one
factor multiplying all hops out of it (random traps). A factor depends only on the seed and
on the bond or site, never on how the rows are cut into blocks or ranks.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from pipeline.errors import ModelError
from pipeline.models.base import Model, RowBlock
from pipeline.models.base import compress_stencil as _compress

__all__ = ["LatticeWalk"]

_FACTOR_CHUNK = 1 << 16  # random factors are drawn in chunks of this many sites


@dataclass(frozen=True)
class Disorder:
    on: str  # "bonds" or "sites"
    law: str  # "uniform" or "lognormal"
    low: float
    high: float
    sigma: float
    seed: int

    def factors(self, stream: int, sites: np.ndarray) -> np.ndarray:
        """Factors of the given sites (any int array) in random stream ``stream``.

        Drawn in fixed chunks of sites, each chunk from its own seed sequence
        ``(seed, stream, chunk)``, so a site's factor never depends on which sites are asked
        for together. Returns float64 of the shape of ``sites``.
        """
        sites = np.asarray(sites, dtype=np.int64)
        chunk_of_site = sites // _FACTOR_CHUNK
        chunks, position = np.unique(chunk_of_site, return_inverse=True)
        table = np.empty((chunks.size, _FACTOR_CHUNK))
        for row, chunk in enumerate(chunks):  # a loop over chunks of 65536 sites
            generator = np.random.default_rng(
                np.random.SeedSequence([self.seed, stream, int(chunk)])
            )
            if self.law == "uniform":
                table[row] = generator.uniform(self.low, self.high, _FACTOR_CHUNK)
            else:
                with np.errstate(over="ignore", under="ignore"):
                    table[row] = np.exp(self.sigma * generator.standard_normal(_FACTOR_CHUNK))
        factors = table[position.reshape(sites.shape), sites % _FACTOR_CHUNK]
        if self.law == "lognormal" and not (np.isfinite(factors).all() and factors.all()):
            raise ModelError(
                f"model.disorder.sigma: {self.sigma:g} puts factors exp(sigma z) outside the "
                "float64 range (an infinite or zero rate); fix: a smaller sigma")
        return factors


class LatticeWalk(Model):
    """Walker on a hypercubic lattice; see the module docstring for conventions."""

    name = "lattice"

    def __init__(
        self,
        size: tuple[int, ...],
        boundary: tuple[str, ...],
        forward: tuple[float, ...],
        backward: tuple[float, ...],
        disorder: Disorder | None = None,
    ) -> None:
        self.shape = tuple(int(s) for s in size)
        self.boundary = tuple(boundary)
        self.forward = tuple(float(r) for r in forward)
        self.backward = tuple(float(r) for r in backward)
        self.disorder = disorder
        self.dims = len(self.shape)
        self.strides = tuple(math.prod(self.shape[a + 1 :]) for a in range(self.dims))
        self._n_states = math.prod(self.shape)
        # int32 column indices whenever every index and the nonzero count fit.
        fits = self._n_states * (2 * self.dims + 1) < 2**31 - 1
        self.index_dtype = np.int32 if fits else np.int64

    @classmethod
    def from_config(cls, config: Any) -> LatticeWalk:
        disorder = None
        if config.disorder is not None:
            d = config.disorder
            disorder = Disorder(d.on, d.law, d.low, d.high, d.sigma, d.seed)
        return cls(config.size, config.boundary, config.forward, config.backward, disorder)

    # -- Model interface ---------------------------------------------------------------

    @property
    def n_states(self) -> int:
        return self._n_states

    @property
    def conserving(self) -> bool:
        return "absorbing" not in self.boundary

    def nnz_upper_bound(self, start: int, stop: int) -> int:
        return (stop - start) * (2 * self.dims + 1)

    def nnz_count(self) -> int:
        """Exact number of stored nonzeros (zero rates are not stored)."""
        n = self._n_states
        total = n  # the diagonal
        for axis in range(self.dims):
            size, kind = self.shape[axis], self.boundary[axis]
            if kind == "periodic" and size == 2:
                total += n if self.forward[axis] + self.backward[axis] > 0 else 0
                continue
            links = n if kind == "periodic" else n - n // size
            total += links * ((self.forward[axis] > 0) + (self.backward[axis] > 0))
        return total

    def coordinates(self, start: int, stop: int) -> np.ndarray:
        """Lattice coordinates of states ``start..stop-1``, int64 ``[state, axis]``."""
        flat = np.arange(start, stop, dtype=np.int64)
        return np.stack(np.unravel_index(flat, self.shape), axis=1).astype(np.int64)

    def state_labels(self, start: int, stop: int) -> dict[str, np.ndarray]:
        return {"coordinate": self.coordinates(start, stop)}

    def state_aggregates(self, start: int, stop: int, size: int) -> np.ndarray:
        """Blocks of ``s^d`` neighbouring sites, ``s = round(size^(1/d))`` per axis (fewer
        along a shorter axis), labelled by their flat block index."""
        side = max(1, round(size ** (1.0 / self.dims)))
        sides = [min(side, extent) for extent in self.shape]
        blocks = tuple(-(-extent // s) for extent, s in zip(self.shape, sides, strict=True))
        coordinates = self.coordinates(start, stop) // np.array(sides, dtype=np.int64)
        return np.ravel_multi_index(tuple(coordinates.T), blocks)

    def row_block(self, start: int, stop: int) -> RowBlock:
        """Rows ``start..stop-1`` of ``W`` (incoming rates and the diagonal)."""
        rows = stop - start
        dims, disorder = self.dims, self.disorder
        # Column layout per row: [from -s_0, ..., from -s_{d-1}, diagonal,
        # from +s_{d-1}, ..., from +s_0]: sorted whenever no wrap-around occurs. Slots that
        # are empty in every row are left out up front: a rate that is exactly zero (one-way
        # hopping; times a disorder factor it stays zero) and the upper neighbour of a size-2
        # ring, which is the lower one (that entry carries both rates).
        merged = [self.boundary[a] == "periodic" and self.shape[a] == 2 for a in range(dims)]
        order = []
        for axis in range(dims):
            u, v = self.forward[axis], self.backward[axis]
            if merged[axis]:
                stored = (u != 0.0 or v != 0.0) if disorder is not None else u + v != 0.0
            else:
                stored = u != 0.0
            if stored:
                order.append(("below", axis))
        order.append(("diagonal", dims))
        for axis in reversed(range(dims)):
            if self.backward[axis] != 0.0 and not merged[axis]:
                order.append(("above", axis))
        slot = {key: position for position, key in enumerate(order)}
        width, diagonal_slot = len(order), slot["diagonal", dims]
        # Column arithmetic is done in the index dtype: shifted by up to a period, an index
        # stays below 2 * n_states, which fits (see __init__).
        state = np.arange(start, stop, dtype=self.index_dtype)
        columns = np.empty((rows, width), dtype=self.index_dtype)
        values = np.empty((rows, width), dtype=np.float64)
        present = None  # made only when some rows miss an entry of a kept slot
        template = np.empty(width)  # without disorder a slot holds one rate in every row
        exit_interior = 0.0  # without disorder: exit rate of rows off every reflecting edge
        exit_rate = np.zeros(rows) if disorder is not None else None
        reflecting_edges = []
        for axis in range(dims):
            size, stride = self.shape[axis], self.strides[axis]
            kind = self.boundary[axis]
            period = size * stride
            low = _edge_rows(start, stop, stride, size, high=False)  # coordinate 0
            high = _edge_rows(start, stop, stride, size, high=True)  # coordinate size - 1
            u, v = self.forward[axis], self.backward[axis]
            # Incoming hops: forward from the site below (x - 1), backward from above (x + 1).
            if disorder is None:
                forward_in, backward_in = (u + v if merged[axis] else u), v
                exit_interior += u
                exit_interior += v
                if kind == "reflecting":
                    reflecting_edges += [low, high]
            else:
                coordinate = (state // stride) % size
                forward_in, backward_in, forward_out, backward_out = self._axis_rates(
                    axis, state, coordinate
                )
                if merged[axis]:
                    forward_in = forward_in + backward_in
                # Exit rate of the row's own state: every hop that exists, off-edge hops of
                # an absorbing axis included (they leave the system).
                if kind == "reflecting":
                    forward_out = np.where(coordinate == size - 1, 0.0, forward_out)
                    backward_out = np.where(coordinate == 0, 0.0, backward_out)
                exit_rate += forward_out
                exit_rate += backward_out
            for name, shift, wrap, edge, rate in (
                ("below", -stride, period, low, forward_in),
                ("above", stride, -period, high, backward_in),
            ):
                position = slot.get((name, axis))
                if position is None:
                    continue
                target = columns[:, position]
                np.add(state, shift, out=target)
                if kind == "periodic":
                    target[edge] += wrap  # across the edge: the far end of the ring
                else:
                    if present is None:
                        present = np.ones((rows, width), dtype=bool)
                    present[edge, position] = False  # no site beyond the edge
                if disorder is None:
                    template[position] = rate
                else:
                    values[:, position] = rate
        columns[:, diagonal_slot] = state
        if disorder is None:
            template[diagonal_slot] = -exit_interior
            values[...] = template
            if reflecting_edges:
                # Rows on a reflecting edge lack the hops off it: their exit rates are summed
                # again in the same order as everywhere else (so bit for bit consistent).
                edge_rows = np.unique(np.concatenate(reflecting_edges))
                edge_state = start + edge_rows
                exit_edge = np.zeros(edge_rows.size)
                for axis in range(dims):
                    size, stride = self.shape[axis], self.strides[axis]
                    forward_out, backward_out = self.forward[axis], self.backward[axis]
                    if self.boundary[axis] == "reflecting":
                        coordinate = (edge_state // stride) % size
                        forward_out = np.where(coordinate == size - 1, 0.0, forward_out)
                        backward_out = np.where(coordinate == 0, 0.0, backward_out)
                    exit_edge += forward_out
                    exit_edge += backward_out
                values[edge_rows, diagonal_slot] = -exit_edge
        else:
            values[:, diagonal_slot] = -exit_rate
            if not values.all():
                # Rates that are exactly zero (a zero factor) are not stored.
                stored = values != 0.0
                stored[:, diagonal_slot] = True
                present = stored if present is None else present & stored
        return _compress(start, stop, columns, values, present)

    def exact(self):
        from pipeline.analytic.lattice import LatticeExact

        return LatticeExact.for_model(self)

    def describe(self) -> dict[str, Any]:
        info = super().describe()
        info.update(
            shape=list(self.shape),
            boundary=list(self.boundary),
            forward=list(self.forward),
            backward=list(self.backward),
            disorder=None if self.disorder is None else self.disorder.__dict__.copy(),
        )
        return info

    def warnings(self) -> list[str]:
        notes = []
        for axis in range(self.dims):
            kind = self.boundary[axis]
            if kind == "periodic":
                continue
            u, v = self.forward[axis], self.backward[axis]
            if u == 0 or v == 0:
                notes.append(
                    f"axis {axis}: one-way hopping on a {kind} axis makes W defective "
                    "(Jordan blocks); eigenvalues are ill-conditioned and match the exact ones "
                    "only to about tolerance**(1/size)"
                )
                continue
            # Similarity to a symmetric matrix costs a factor (u/v)^((L-1)/2): its size is
            # the condition of the eigenvector basis (common practice).
            exponent = 0.5 * (self.shape[axis] - 1) * abs(math.log10(u / v))
            if exponent > 8:
                notes.append(
                    f"axis {axis}: biased {kind} axis (forward/backward = {u / v:.3g}) has an "
                    f"eigenvector condition of about 1e{exponent:.0f}; eigenvalues far from the "
                    "stationary one may be inaccurate even with small residuals"
                )
        return notes

    # -- analysis hooks: channel = 2 * axis + (0 for a hop toward +1, 1 toward -1) --------

    def channel_names(self) -> tuple[str, ...]:
        return tuple(f"axis{a}{sign}" for a in range(self.dims) for sign in ("+", "-"))

    def transition_channels(self, block: RowBlock) -> np.ndarray:
        """Channel of every entry: ``2 * axis`` for a hop toward +1 along ``axis``, ``2 *
        axis + 1`` toward -1, ``-1`` on the diagonal. The single entry of a size-2 ring
        carries both hop rates and is counted as the +1 hop."""
        rows = np.repeat(np.arange(block.start, block.stop, dtype=np.int64),
                         np.diff(block.indptr))
        columns = block.indices.astype(np.int64)
        channels = np.full(columns.shape, -1, dtype=np.int64)
        for axis in range(self.dims):  # a loop over axes
            size, stride = self.shape[axis], self.strides[axis]
            step = ((rows // stride) - (columns // stride)) % size  # target minus source
            channels[step == 1] = 2 * axis
            channels[(step == size - 1) & (step != 1)] = 2 * axis + 1
        return channels

    def channel_displacements(self) -> np.ndarray:
        moves = np.zeros((2 * self.dims, self.dims))
        for axis in range(self.dims):
            moves[2 * axis, axis], moves[2 * axis + 1, axis] = 1.0, -1.0
        return moves

    def exit_names(self) -> tuple[str, ...]:
        return tuple(f"axis{a}-{side}" for a in range(self.dims)
                     if self.boundary[a] == "absorbing" for side in ("low", "high"))

    def exit_rates(self, start: int, stop: int) -> np.ndarray:
        """Rate of the hop off the low (coordinate 0, backward rate) and high (coordinate
        ``size - 1``, forward rate) edge of every absorbing axis, ``[state, exit]``."""
        state = np.arange(start, stop, dtype=np.int64)
        columns = []
        for axis in range(self.dims):
            if self.boundary[axis] != "absorbing":
                continue
            size, stride = self.shape[axis], self.strides[axis]
            coordinate = (state // stride) % size
            _, _, forward_out, backward_out = self._axis_rates(axis, state, coordinate)
            columns.append(np.where(coordinate == 0, backward_out, 0.0))
            columns.append(np.where(coordinate == size - 1, forward_out, 0.0))
        if not columns:
            return np.zeros((stop - start, 0))
        return np.stack(columns, axis=1).astype(np.float64)

    # -- helpers ---------------------------------------------------------------------

    def _axis_rates(
        self, axis: int, state: np.ndarray, coordinate: np.ndarray
    ) -> tuple[Any, Any, Any, Any]:
        """Rates along ``axis`` for each row's state ``x``.

        Returns ``(forward_in, backward_in, forward_out, backward_out)``: the hop from
        ``x - 1`` into ``x``, from ``x + 1`` into ``x``, and out of ``x`` up and down.
        Without disorder these are the plain scalar rates.
        """
        u, v = self.forward[axis], self.backward[axis]
        if self.disorder is None:
            return u, v, u, v
        size, stride = self.shape[axis], self.strides[axis]
        below = np.where(coordinate == 0, state + (size - 1) * stride, state - stride)
        if self.disorder.on == "sites":
            # Random traps: every hop out of site y is scaled by factor(y).
            above = np.where(coordinate == size - 1, state - (size - 1) * stride, state + stride)
            own = self.disorder.factors(self.dims, state)
            return (u * self.disorder.factors(self.dims, below),
                    v * self.disorder.factors(self.dims, above), u * own, v * own)
        # Random barriers: stream 2a holds the bond from y to y + e_a (for y on the high edge:
        # the wrap bond of a ring, or the exit bond of an absorbing axis); stream 2a+1 the
        # exit bond off the low edge of an absorbing axis.
        bond_up = self.disorder.factors(2 * axis, state)
        bond_down = self.disorder.factors(2 * axis, below)
        forward_in, backward_in = u * bond_down, v * bond_up
        forward_out, backward_out = u * bond_up, v * bond_down
        if self.boundary[axis] == "absorbing":
            edge = self.disorder.factors(2 * axis + 1, state)
            backward_out = np.where(coordinate == 0, v * edge, backward_out)
        return forward_in, backward_in, forward_out, backward_out

    def trap_factors(self, start: int, stop: int) -> np.ndarray:
        """Site factors of states ``start..stop-1`` (site disorder only)."""
        return self.disorder.factors(self.dims, np.arange(start, stop, dtype=np.int64))


def _edge_rows(start: int, stop: int, stride: int, size: int, high: bool) -> np.ndarray:
    """Positions (from ``start``) of the states in ``start..stop-1`` whose coordinate along an
    axis of this stride and size is 0, or ``size - 1`` when ``high``.

    Those states form runs of ``stride`` consecutive states, one run every ``size * stride``
    states; the work is proportional to the number of edge states, not of rows.
    """
    if stop <= start:
        return np.empty(0, dtype=np.intp)
    period = size * stride
    offset = (size - 1) * stride if high else 0
    first = start - (start - offset) % period  # the last run starting at or before start
    if stride == 1:
        begin = first if first == start else first + period
        return np.arange(begin - start, stop - start, period, dtype=np.intp)
    if first + period >= stop:  # a single run can meet the block
        return np.arange(max(first, start) - start, min(first + stride, stop) - start,
                         dtype=np.intp)
    run_starts = np.arange(first, stop, period, dtype=np.intp)
    lows = np.maximum(run_starts, start)
    lengths = np.clip(np.minimum(run_starts + stride, stop) - lows, 0, None)
    ends = np.cumsum(lengths)
    return np.repeat(lows - start - (ends - lengths), lengths) + np.arange(ends[-1])
