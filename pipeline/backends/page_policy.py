"""The page policy of the slepc backend's process: numpy's transparent huge-page advice off.

Once PETSc is initialized, freed memory stays with the process and is reused (observed
with Debian's PETSc 3.18: a freed 112 MiB array is not returned to the system, while it is
after MPI initialization alone), so what memory costs is its first touch, once per page of
the peak. numpy asks the kernel for transparent huge pages on every array of 4 MiB
or more (``madvise``); on a virtual machine whose memory the host backs lazily, the first
touch of a huge page costs several times that of small pages (measured here: 2.4 s against
0.4 s per GiB, and 16.9 s against 15.0 s for the 1024² benchmark), while huge pages gain
about 4% on the streaming block products afterwards (benchmarks/README.md). The advice is
turned off unless the user chose it with numpy's own ``NUMPY_MADVISE_HUGEPAGE`` variable
(numpy documents it, reference/global_state.html), which is always respected.
"""

from __future__ import annotations

import os

__all__ = ["prefer_small_pages"]


def prefer_small_pages() -> bool:
    """Turn numpy's huge-page advice off for this process unless ``NUMPY_MADVISE_HUGEPAGE``
    is set; ``True`` when it is off afterwards (arrays allocated before keep their pages)."""
    if "NUMPY_MADVISE_HUGEPAGE" in os.environ:
        return os.environ["NUMPY_MADVISE_HUGEPAGE"].strip() == "0"
    import numpy as np

    toggle = getattr(getattr(getattr(np, "_core", None), "multiarray", None),
                     "_set_madvise_hugepage", None)
    if toggle is None:  # a numpy without the switch: nothing to change
        return False
    toggle(False)
    return True
