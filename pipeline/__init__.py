"""gapline: spectral analysis of large sparse Markov generators.

Conventions used everywhere in the package (documented in README.md):

* ``W[i, j]`` (``i != j``) is the rate of the jump from state ``j`` to state ``i``;
  ``W[j, j] = -(total exit rate of j)``; the master equation is ``dp/dt = W p``.
  Columns of a conserving generator sum to zero; a sub-generator (probability can leave
  the system) has column sums ``<= 0``.
* Modes are ordered slowest first: decreasing real part, then increasing imaginary part
  (see :mod:`pipeline.modes`); multiplicities are kept.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
