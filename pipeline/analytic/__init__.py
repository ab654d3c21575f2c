"""Exact spectra and stationary laws by model family (used by ``verify`` and the tests)."""

from pipeline.analytic.lattice import LatticeExact, chain_spectrum, chain_stationary

__all__ = ["LatticeExact", "chain_spectrum", "chain_stationary"]
