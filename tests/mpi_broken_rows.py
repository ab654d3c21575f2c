"""Driver for test_mpi_slepc: assemble, under mpiexec, a model whose last rows (owned by
the last rank) are broken (a column no longer sums to 0); every rank writes the error it
ends with to ``DIRECTORY/rank-R.txt`` (files, not stdout: mpiexec may interleave the lines
of two ranks)."""

from __future__ import annotations

import os
import sys

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from pipeline.backends.slepc_ import SlepcBackend  # noqa: E402
from pipeline.errors import GaplineError  # noqa: E402
from pipeline.parallel import world  # noqa: E402
from tests.test_backend_slepc import _BrokenModel  # noqa: E402

try:
    SlepcBackend().assemble(_BrokenModel())
    outcome = "no error"
except GaplineError as error:
    outcome = str(error)
with open(os.path.join(sys.argv[1], f"rank-{world().rank}.txt"), "w") as handle:
    handle.write(outcome)
