"""Reading the stored generator back (``[store] matrix = true``) against rebuilding it.

Times, in one process, the checked assembly ``ScipyBackend().assemble(...)`` of a driven 2D
torus (``--size`` squared states) from the model's row blocks and from the CSR arrays that
the assemble stage stores (``StoredGenerator`` over zarr arrays on disk, row block by row
block), after writing those arrays once. Target (medians): reading back costs at most 3x the
rebuild, so a solve rerun without assemble is never much slower than one with it (the point
of storing is models whose rows are expensive, and runs whose model code changed).

    python benchmarks/stored_matrix.py --size 1024 --repeat 3

Prints the medians, the ratio and PASS/FAIL; exits 0 either way.
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time

import numpy as np

from pipeline.backends.scipy_ import ScipyBackend
from pipeline.config import parse_config
from pipeline.models import build_model
from pipeline.models.stored import StoredGenerator
from pipeline.stages.assemble import matrix_group
from pipeline.store import Store

TARGET_RATIO = 3.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=1024)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    config = parse_config({"run": {"name": "bench"},
                           "model": {"type": "lattice", "size": [args.size, args.size],
                                     "forward": [1.0, 0.8], "backward": [0.6, 0.8]}})
    model = build_model(config.model)
    backend = ScipyBackend()
    operator = backend.assemble(model)
    with tempfile.TemporaryDirectory() as directory:
        store = Store(directory, create=True)
        store.open_run("bench", {})
        store.write_stage("bench", "assemble", {"matrix": matrix_group(operator)}, "bench")
        group = store.group("bench", "matrix")
        stored = StoredGenerator(group["indptr"], group["indices"], group["data"], model,
                                 "bench")
        reference = operator.handle["W"]
        del operator
        timings = {"model": [], "stored": []}
        for _ in range(args.repeat):
            for name, source in (("model", model), ("stored", stored)):
                started = time.perf_counter()
                built = backend.assemble(source)
                timings[name].append(time.perf_counter() - started)
                if name == "stored":
                    W = built.handle["W"]
                    assert (W != reference).nnz == 0 and np.array_equal(W.indptr,
                                                                         reference.indptr)
                del built
    medians = {name: statistics.median(values) for name, values in timings.items()}
    ratio = medians["stored"] / medians["model"]
    nnz = reference.nnz
    print(f"torus {args.size}x{args.size}: {model.n_states} states, {nnz} nonzeros")
    for name, value in medians.items():
        print(f"  assemble from {name:<6} median {value:.3f} s ({nnz / value / 1e6:.1f}M "
              "nonzeros/s)")
    verdict = "PASS" if ratio <= TARGET_RATIO else "FAIL"
    print(f"  stored / model = {ratio:.2f} (target <= {TARGET_RATIO}): {verdict}")


if __name__ == "__main__":
    main()
