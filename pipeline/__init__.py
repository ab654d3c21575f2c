"""gapline: spectral analysis of large sparse Markov generators.

Conventions used everywhere in the package (documented in README.md):

* ``W[i, j]`` (``i != j``) is the rate of the jump from state ``j`` to state ``i``;
  ``W[j, j] = -(total exit rate of j)``; the master equation is ``dp/dt = W p``.
  Columns of a conserving generator sum to zero; a sub-generator (probability can leave
  the system) has column sums ``<= 0``.
* Modes are ordered slowest first: decreasing real part, then increasing imaginary part
  (see :mod:`pipeline.modes`); multiplicities are kept.
"""

import os as _os

__version__ = "0.1.0"

__all__ = ["__version__"]


def _one_blas_thread_per_rank() -> None:
    """Under an MPI launch with several ranks, one BLAS thread per rank unless the user says
    otherwise (threaded OpenBLAS in every rank oversubscribes the cores, and skinny products
    then run several times slower; measured). Must run before numpy is imported."""
    # the world-size variables of Open MPI, MPICH/Slurm's PMI and Intel MPI (the launcher
    # detection itself is pipeline.parallel.MPI_ENVIRONMENT; this module imports no numpy)
    sizes = (_os.environ.get(key, "") for key in ("OMPI_COMM_WORLD_SIZE", "PMI_SIZE",
                                                    "MPI_LOCALNRANKS"))
    if any(size.isdigit() and int(size) > 1 for size in sizes):
        for key in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS"):
            _os.environ.setdefault(key, "1")


_one_blas_thread_per_rank()
