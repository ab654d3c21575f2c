"""Checks of computed results against exact results and certificates."""

from pipeline.verification.checks import Check, compare_multisets, spectral_gap

__all__ = ["Check", "compare_multisets", "spectral_gap"]
