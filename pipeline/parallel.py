"""The MPI world of a run: rank, size, collectives, and the ownership of state rows.

Every stage runs the same under ``mpiexec -n P``. Collective work (assembly, solving) goes
through the PETSc/SLEPc backend; everything else (configs, logs, store metadata) is done
once, on rank 0, and shared with :meth:`World.bcast`. Without MPI (or with one process)
the world is a single rank and every collective is the identity.

Ownership: the state axis is cut into chunks of :func:`state_chunk` rows; each rank owns a
run of whole chunks (:func:`ownership_ranges`), so the rows a rank assembles and the zarr
chunks it writes coincide and no two ranks ever write into one chunk.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from functools import lru_cache
from typing import Any

import numpy as np

__all__ = ["World", "launched_by_mpi", "ownership_ranges", "state_chunk", "world"]

#: the largest number of states per chunk of a state-axis array in the store
MAX_STATE_CHUNK = 1 << 20
#: environment variables an MPI launcher sets for its processes (Open MPI, MPICH, Slurm's PMI)
MPI_ENVIRONMENT = ("OMPI_COMM_WORLD_SIZE", "PMI_SIZE", "PMIX_RANK", "MPI_LOCALNRANKS")


def launched_by_mpi() -> bool:
    """True when this process was started by an MPI launcher (mpiexec, srun)."""
    return any(name in os.environ for name in MPI_ENVIRONMENT)


class World:
    """The processes of this run (MPI_COMM_WORLD, or just this process)."""

    def __init__(self, comm: Any = None) -> None:
        self.comm = comm
        self.rank = 0 if comm is None else int(comm.Get_rank())
        self.size = 1 if comm is None else int(comm.Get_size())

    @property
    def is_root(self) -> bool:
        return self.rank == 0

    def on_root(self, action: Callable[[], Any]) -> Any:
        """Run ``action`` on rank 0 only; every rank returns its result or raises its error
        (so no rank is left waiting when rank 0 fails)."""
        result, error = None, None
        if self.is_root:
            try:
                result = action()
            except Exception as exc:  # shared below, re-raised on every rank
                error = exc
        if self.size > 1:
            result, error = self.bcast((result, error))
        if error is not None:
            raise error
        return result

    def collective(self, action: Callable[[], Any]) -> Any:
        """Run ``action`` on every rank; when any rank fails, every rank raises the first
        failure (a model error in one rank's rows must not leave the others hanging)."""
        result, error = None, None
        try:
            result = action()
        except Exception as exc:  # shared below
            error = exc
        if self.size > 1:
            errors = self.allgather(error)
            error = next((failure for failure in errors if failure is not None), None)
        if error is not None:
            raise error
        return result

    def barrier(self) -> None:
        if self.comm is not None and self.size > 1:
            self.comm.Barrier()

    def bcast(self, value: Any, root: int = 0) -> Any:
        """``value`` of rank ``root`` on every rank (any picklable object)."""
        if self.comm is None or self.size == 1:
            return value
        return self.comm.bcast(value, root=root)

    def gather(self, value: Any) -> list[Any] | None:
        """Every rank's ``value`` on rank 0 (None elsewhere)."""
        if self.comm is None or self.size == 1:
            return [value]
        return self.comm.gather(value, root=0)

    def scatter(self, values: list[Any] | None) -> Any:
        """Item ``r`` of rank 0's ``values`` (one per rank) on rank ``r``."""
        if self.comm is None or self.size == 1:
            return values[0]
        return self.comm.scatter(values, root=0)

    def allgather(self, value: Any) -> list[Any]:
        if self.comm is None or self.size == 1:
            return [value]
        return self.comm.allgather(value)

    def sum(self, value: Any) -> Any:
        """Sum over ranks of a number or numpy array (every rank gets it)."""
        if self.comm is None or self.size == 1:
            return value
        if isinstance(value, np.ndarray):
            result = np.empty_like(value)
            self.comm.Allreduce(np.ascontiguousarray(value), result)
            return result
        return self.comm.allreduce(value)

    def max(self, value: float) -> float:
        if self.comm is None or self.size == 1:
            return value
        from mpi4py import MPI

        return self.comm.allreduce(value, op=MPI.MAX)

    def min(self, value: float) -> float:
        if self.comm is None or self.size == 1:
            return value
        from mpi4py import MPI

        return self.comm.allreduce(value, op=MPI.MIN)


@lru_cache(maxsize=1)
def world() -> World:
    """This run's world: MPI_COMM_WORLD when launched by MPI, else a single rank."""
    if not launched_by_mpi():
        return World(None)
    try:
        from mpi4py import MPI
    except ImportError:  # no bindings: behave as one process (the backends refuse duplicates)
        return World(None)
    return World(MPI.COMM_WORLD)


def state_chunk(n_states: int, ranks: int) -> int:
    """Rows per chunk of state-axis arrays: a power of two, at most ``MAX_STATE_CHUNK``,
    small enough that every rank owns at least one chunk when there are enough states."""
    share = max(1, -(-n_states // max(ranks, 1)))
    chunk = 1 << max(0, (share - 1).bit_length())  # next power of two >= share
    return int(min(MAX_STATE_CHUNK, chunk))


def ownership_ranges(n_states: int, ranks: int) -> list[tuple[int, int]]:
    """Rows ``[start, stop)`` owned by each rank: runs of whole chunks, balanced by count."""
    chunk = state_chunk(n_states, ranks)
    chunks = -(-n_states // chunk) if n_states else 0
    bounds = [min(n_states, (r * chunks // ranks) * chunk) for r in range(ranks + 1)]
    bounds[-1] = n_states
    return [(bounds[r], bounds[r + 1]) for r in range(ranks)]
