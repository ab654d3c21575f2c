"""Matrix-vector throughput of the assembled generator against the copy bandwidth measured
in the same run, on 1 and 2 MPI ranks.

The matrix is the slepc backend's own (the driven torus, ``--size`` squared states, AIJ from
the model's row blocks). Bytes per product, the usual streaming count for CSR (common
practice, e.g. the roofline model of Williams, Waterman and Patterson 2009): values 8 +
column index 4 per nonzero, row pointer 4 per row, x read once 8 and y written 8 per row.
The copy bandwidth is that of ``VecCopy`` over vectors of the same total size as the matrix
(read 8 + write 8 bytes per entry), the STREAM "copy" kernel's count (McCalpin 1995).

    python benchmarks/spmv.py [--size 2048] [--repeat 20]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def child(size: int, repeat: int) -> None:
    os.environ.setdefault("GAPLINE_PROGRESS", "off")
    sys.path.insert(0, str(ROOT))
    from petsc4py import PETSc

    from pipeline.backends.slepc_ import SlepcBackend
    from pipeline.models.lattice import LatticeWalk
    from pipeline.parallel import world

    parallel = world()
    model = LatticeWalk((size, size), ("periodic", "periodic"), (1.0, 0.8), (0.6, 0.8))
    operator = SlepcBackend().assemble(model)
    W = operator.handle["W"]
    n, nnz = operator.n_states, operator.nnz
    x, y = W.createVecs()
    x.set(1.0)
    index_bytes = PETSc.IntType(0).itemsize
    spmv_bytes = nnz * (8 + index_bytes) + n * (index_bytes + 16)

    def best_of(action, count: int) -> float:
        times = []
        for _ in range(count):
            parallel.barrier()
            started = time.perf_counter()
            action()
            parallel.barrier()
            times.append(time.perf_counter() - started)
        return min(times)

    W.mult(x, y)  # warm up (first touch of y, communication setup)
    spmv_seconds = best_of(lambda: W.mult(x, y), repeat)
    # Copy kernel over the same number of bytes as the matrix stream (entries of 8 bytes).
    entries_local = max(1, (spmv_bytes // 16) // parallel.size)
    source = PETSc.Vec().createMPI((entries_local, PETSc.DECIDE), comm=PETSc.COMM_WORLD)
    target = source.duplicate()
    source.set(1.0)
    source.copy(target)
    copy_seconds = best_of(lambda: source.copy(target), repeat)
    copy_bytes = 16 * entries_local * parallel.size
    if parallel.is_root:
        result = {"ranks": parallel.size, "states": n, "nnz": nnz,
                  "spmv_seconds": spmv_seconds, "spmv_gb_per_s": spmv_bytes / spmv_seconds / 1e9,
                  "copy_seconds": copy_seconds,
                  "copy_gb_per_s": copy_bytes / copy_seconds / 1e9}
        result["ratio"] = result["spmv_gb_per_s"] / result["copy_gb_per_s"]
        print("RESULT " + json.dumps(result), flush=True)


def launch(size: int, repeat: int, ranks: int) -> dict:
    command = [sys.executable, __file__, "--child", "--size", str(size), "--repeat",
               str(repeat)]
    if ranks > 1:
        command = ["mpiexec", "--allow-run-as-root", "--oversubscribe", "-n", str(ranks),
                   *command]
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    completed = subprocess.run(command, capture_output=True, text=True, env=env)
    lines = [line for line in completed.stdout.splitlines() if line.startswith("RESULT ")]
    if completed.returncode != 0 or not lines:
        raise SystemExit(f"ranks={ranks} failed: {completed.stderr[-2000:]}")
    return json.loads(lines[-1][len("RESULT "):])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=2048)
    parser.add_argument("--repeat", type=int, default=20)
    parser.add_argument("--child", action="store_true")
    args = parser.parse_args()
    if args.child:
        child(args.size, args.repeat)
        return
    results = [launch(args.size, args.repeat, ranks) for ranks in (1, 2)]
    print(f"SpMV of the driven torus {args.size}x{args.size} against VecCopy, same run")
    print(f"{'ranks':>5} {'SpMV GB/s':>10} {'copy GB/s':>10} {'ratio':>7}  (target >= 0.75)")
    for r in results:
        print(f"{r['ranks']:>5} {r['spmv_gb_per_s']:>10.2f} {r['copy_gb_per_s']:>10.2f} "
              f"{r['ratio']:>7.2f}  {'met' if r['ratio'] >= 0.75 else 'NOT met'}")
    out = ROOT / "benchmarks" / "results"
    out.mkdir(exist_ok=True)
    (out / f"spmv_{args.size}.json").write_text(json.dumps(results, indent=1))


if __name__ == "__main__":
    main()
