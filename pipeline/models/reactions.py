"""Chemical master equation of a reaction network on a finite state projection.

States are copy-number vectors ``x`` with ``0 <= x_s <= bound_s``, numbered in C order of
the shape ``(bound_0 + 1, ..., bound_{S-1} + 1)`` (mixed radix, first species slowest).
Reaction ``r`` changes ``x`` by ``nu_r = products - reactants`` at propensity ``a_r(x)``:
mass action ``c_r prod_s C(x_s, reactants_s)`` (Gillespie 1977, J. Phys. Chem. 81, 2340,
eq. (8)-(9): the number of distinct reactant combinations), or a custom expression
(:mod:`pipeline.models.expressions`).

The projection (Munsky and Khammash 2006, J. Chem. Phys. 124, 044104) keeps the states
inside the bounds. A jump leading outside is either

* ``leak`` (default): kept as an exit, so ``W`` is a sub-generator; the decay rate of the
  slowest mode is the outflow of the quasi-stationary state (the truncation error rate).
  When no jump leaves (propensities vanish at the bounds), ``W`` conserves;
* ``reflect``: dropped, so ``W`` conserves; the stationary rate at which probability would
  have left (``sum_x p(x) * outflow(x)``) is stored as the observable ``outflow``.

Inconsistent input is an error, not a result: a propensity that is negative or not finite
in some state, a custom propensity that is positive where the reaction would make a count
negative, or a reaction whose change is larger than a species' projection.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from pipeline.errors import ModelError
from pipeline.models.base import LinearObservable, Model, RowBlock, compress_stencil
from pipeline.models.expressions import Expression

__all__ = ["Reaction", "ReactionNetwork"]

LEAK_BLOCK = 1 << 16


class Reaction:
    """One reaction: change vector, reactant counts, and its propensity function."""

    def __init__(self, name: str, species: tuple[str, ...], reactants: dict[str, int],
                 products: dict[str, int], rate: float | None, propensity: str | None,
                 parameters: dict[str, float], label: str) -> None:
        self.name, self.label = name, label
        self.reactants = np.array([reactants.get(s, 0) for s in species], dtype=np.int64)
        self.change = np.array([products.get(s, 0) - reactants.get(s, 0) for s in species],
                               dtype=np.int64)
        self.rate = rate
        self.parameters = parameters
        self.species = species
        self.expression = None
        if propensity is not None:
            self.expression = Expression(propensity, (*species, *parameters),
                                         f"{label}.propensity")

    def propensity(self, counts: np.ndarray) -> np.ndarray:
        """``a(x)`` for counts ``[state, species]`` (int64): float64 ``[state]``."""
        if self.expression is None:
            value = np.full(counts.shape[0], float(self.rate))
            for s, need in enumerate(self.reactants):
                if need:
                    x = counts[:, s].astype(np.float64)
                    combinations = np.ones_like(x)
                    for k in range(int(need)):  # falling factorial x (x-1) ... / need!
                        combinations *= np.clip(x - k, 0, None)
                    value *= combinations / math.factorial(int(need))
            return value
        values: dict[str, Any] = dict(self.parameters)
        for s, name in enumerate(self.species):
            values[name] = counts[:, s].astype(np.float64)
        result = np.broadcast_to(np.asarray(self.expression(values), dtype=np.float64),
                                 (counts.shape[0],))
        return np.array(result)


class ReactionNetwork(Model):
    """Finite state projection of a reaction network; see the module docstring."""

    name = "reactions"

    def __init__(self, species: tuple[str, ...], bounds: tuple[int, ...],
                 reactions: list[Reaction], truncation: str = "leak") -> None:
        self.species = tuple(species)
        self.bounds = np.array(bounds, dtype=np.int64)
        self.shape = tuple(int(b) + 1 for b in bounds)
        self.reactions = reactions
        self.truncation = truncation
        self._n_states = math.prod(self.shape)
        self.strides = np.array([math.prod(self.shape[s + 1:]) for s in range(len(species))],
                                dtype=np.int64)
        for reaction in reactions:
            for s, step in enumerate(reaction.change):
                if abs(int(step)) > int(self.bounds[s]):
                    raise ModelError(
                        f"{reaction.label}: changes {self.species[s]} by {int(step)} but "
                        f"model.bounds keeps only 0..{int(self.bounds[s])}, so every firing "
                        f"leaves the projection; fix: raise model.bounds for {self.species[s]}")
        fits = self.nnz_upper_bound(0, self._n_states) < 2**31 - 1
        self.index_dtype = np.int32 if fits else np.int64
        # With 'leak', W is a sub-generator only if some jump really leaves (a propensity
        # that vanishes at the bounds keeps the projection closed): one streamed pass.
        self.leaks = any(
            bool(self.outflow(start, min(start + LEAK_BLOCK, self._n_states)).any())
            for start in range(0, self._n_states, LEAK_BLOCK)
        )

    @classmethod
    def from_config(cls, config: Any) -> ReactionNetwork:
        parameters = dict(config.parameters)
        reactions = [
            Reaction(r.name, tuple(config.species), dict(r.reactants), dict(r.products), r.rate,
                     r.propensity, parameters, f"model.reactions[{i}]")
            for i, r in enumerate(config.reactions)
        ]
        return cls(tuple(config.species), tuple(config.bounds), reactions, config.truncation)

    # -- Model interface ---------------------------------------------------------------

    @property
    def n_states(self) -> int:
        return self._n_states

    @property
    def conserving(self) -> bool:
        return self.truncation == "reflect" or not self.leaks

    def nnz_upper_bound(self, start: int, stop: int) -> int:
        return (stop - start) * (len(self.reactions) + 1)

    def counts(self, start: int, stop: int) -> np.ndarray:
        """Copy numbers of states ``start..stop-1``: int64 ``[state, species]``."""
        flat = np.arange(start, stop, dtype=np.int64)
        return np.stack(np.unravel_index(flat, self.shape), axis=1).astype(np.int64)

    def state_labels(self, start: int, stop: int) -> dict[str, np.ndarray]:
        return {"counts": self.counts(start, stop)}

    def _rates(self, reaction: Reaction, counts: np.ndarray) -> np.ndarray:
        """Checked propensities of ``reaction`` at ``counts`` ``[state, species]``."""
        value = reaction.propensity(counts)
        bad = ~np.isfinite(value) | (value < 0)
        if bad.any():
            at = int(np.argmax(bad))
            raise ModelError(f"{reaction.label}: propensity is {value[at]} at "
                             f"{self._state_text(counts[at])}; it must be finite and >= 0")
        if reaction.expression is not None:
            impossible = ((counts + reaction.change) < 0).any(axis=1) & (value > 0)
            if impossible.any():
                at = int(np.argmax(impossible))
                raise ModelError(
                    f"{reaction.label}: propensity is {value[at]:g} > 0 at "
                    f"{self._state_text(counts[at])}, where the reaction would make a count "
                    "negative; fix: make it vanish there (e.g. multiply by the reactant)")
        return value

    def _state_text(self, counts: np.ndarray) -> str:
        return ", ".join(f"{name}={int(c)}" for name, c in zip(self.species, counts, strict=True))

    def _inside(self, counts: np.ndarray) -> np.ndarray:
        return ((counts >= 0) & (counts <= self.bounds)).all(axis=1)

    def row_block(self, start: int, stop: int) -> RowBlock:
        """Rows ``start..stop-1``: for each reaction, the state it fires from into the row's
        state (if inside the projection), and the diagonal."""
        rows = stop - start
        counts = self.counts(start, stop)
        state = np.arange(start, stop, dtype=np.int64)
        width = len(self.reactions) + 1
        columns = np.empty((rows, width), dtype=self.index_dtype)
        values = np.zeros((rows, width))
        exit_rate = np.zeros(rows)
        for slot, reaction in enumerate(self.reactions):  # a loop over reactions
            source = counts - reaction.change
            inside = self._inside(source)
            columns[:, slot] = np.where(inside, state - int(reaction.change @ self.strides),
                                        state)
            incoming = np.zeros(rows)
            if inside.any():
                incoming[inside] = self._rates(reaction, source[inside])
            values[:, slot] = incoming
            own = self._rates(reaction, counts)
            if self.truncation == "reflect":
                own = np.where(self._inside(counts + reaction.change), own, 0.0)
            exit_rate += own
        columns[:, -1] = state
        values[:, -1] = -exit_rate
        present = values != 0.0
        present[:, -1] = True
        return compress_stencil(start, stop, columns, values, present)

    def outflow(self, start: int, stop: int) -> np.ndarray:
        """Rate at which each state's jumps leave the projection: float64 ``[state, 1]``."""
        counts = self.counts(start, stop)
        total = np.zeros(stop - start)
        for reaction in self.reactions:
            leaving = ~self._inside(counts + reaction.change)
            total += np.where(leaving, self._rates(reaction, counts), 0.0)
        return total[:, None]

    def observables(self) -> dict[str, LinearObservable]:
        observables = {
            "mean_counts": LinearObservable(
                "species", len(self.species),
                lambda start, stop: self.counts(start, stop).astype(np.float64),
                "mean copy number of each species (order of model.species)"),
        }
        if self.truncation == "reflect" and self.leaks:
            observables["outflow"] = LinearObservable(
                "outflow_total", 1, self.outflow,
                "truncation error: rate at which the stationary state's jumps would leave the "
                "projection (dropped by truncation = 'reflect')")
        return observables

    def describe(self) -> dict[str, Any]:
        info = super().describe()
        info.update(species=list(self.species), bounds=self.bounds.tolist(),
                    truncation=self.truncation, leaks=self.leaks,
                    reactions=[{"name": r.name, "change": r.change.tolist(),
                                "propensity": r.expression.text if r.expression else
                                f"mass action, c = {r.rate}"} for r in self.reactions])
        return info
