"""Assembly throughput: nonzeros per second of a driven 2D torus, against scipy.sparse.kron.

Measures, in one process and under the same conditions:

* ``assemble``: ``ScipyBackend().assemble(model)``, the full checked assembly (row blocks,
  block validation, CSR matrix, column sums);
* ``row_blocks``: ``model.row_block`` over the same blocks alone (no copies, no checks);
* ``kron``: the matrix a user would build by hand, ``kron(W_x, I) + kron(I, W_y)`` in CSR
  from 1D ring generators (scipy.sparse).

Each method gets an untimed first call, then ``--repeat`` timed calls back to back; every
result is freed before the next call, so each timed call starts from the same state.
Targets (on the medians): the full assembly reaches >= 30e6 nonzeros/s and is faster than
the kron baseline. "Cold" runs call each method once more in a fresh process, after a
pause (see benchmarks/README.md).

    python benchmarks/assemble.py --size 2048 --repeat 5

Writes benchmarks/results/assemble.json; exits 0 whether or not the targets are met.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import platform
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import scipy
import scipy.sparse as sp

from pipeline.backends.scipy_ import ScipyBackend
from pipeline.models.lattice import LatticeWalk

TARGET_RATE = 30e6  # nonzeros per second of the full checked assembly
FORWARD = (1.0, 0.8)  # hop rates to x + 1 along axis 0 and 1
BACKWARD = (0.6, 0.8)  # hop rates to x - 1
METHODS = ("assemble", "row_blocks", "kron")
DEFAULT_OUTPUT = Path(__file__).resolve().parent / "results" / "assemble.json"


def torus(size: int) -> LatticeWalk:
    return LatticeWalk((size, size), ("periodic", "periodic"), FORWARD, BACKWARD)


def ring_generator(length: int, forward: float, backward: float) -> sp.csr_matrix:
    """1D ring: ``W[i, i-1] = forward`` (hop up from i - 1), ``W[i, i+1] = backward``,
    ``W[i, i] = -(forward + backward)``; duplicates (length 2) are summed."""
    i = np.arange(length)
    rows = np.concatenate([i, i, i])
    cols = np.concatenate([(i - 1) % length, (i + 1) % length, i])
    vals = np.concatenate([np.full(length, forward), np.full(length, backward),
                           np.full(length, -(forward + backward))])
    return sp.csr_matrix((vals, (rows, cols)), shape=(length, length))


def build_kron(size: int) -> sp.csr_matrix:
    """The baseline: states ``x * size + y``, axis 0 (x) has stride ``size``."""
    identity = sp.identity(size, format="csr")
    W_x = ring_generator(size, FORWARD[0], BACKWARD[0])
    W_y = ring_generator(size, FORWARD[1], BACKWARD[1])
    return (sp.kron(W_x, identity, format="csr") + sp.kron(identity, W_y, format="csr")).tocsr()


def build_assemble(size: int) -> sp.csr_matrix:
    return ScipyBackend().assemble(torus(size)).handle["W"]


def generate_row_blocks(size: int) -> int:
    """Row blocks as the assembly cuts them, each dropped at once; returns the nonzeros."""
    model, step = torus(size), ScipyBackend.block_rows
    n, nnz = model.n_states, 0
    for start in range(0, n, step):
        nnz += model.row_block(start, min(start + step, n)).nnz
    return nnz


def run_once(method: str, size: int) -> tuple[float, int]:
    """Seconds and nonzeros of one call; the result is freed before returning."""
    gc.collect()
    started = time.perf_counter()
    if method == "row_blocks":
        nnz = generate_row_blocks(size)
        seconds = time.perf_counter() - started
    else:
        W = build_assemble(size) if method == "assemble" else build_kron(size)
        seconds = time.perf_counter() - started
        nnz = int(W.nnz)
        del W
    gc.collect()
    return seconds, nnz


def peak_rss_mib() -> float:
    """Peak RSS of this process so far (getrusage; KiB on Linux)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _status_mib(field: str) -> float | None:
    try:
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith(field + ":"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return None


def compare(size: int) -> dict:
    """Build both matrices once more (untimed) and compare them entry by entry."""
    model = torus(size)
    A = build_assemble(size).sorted_indices()
    B = build_kron(size).sorted_indices()
    A.sum_duplicates()
    B.sum_duplicates()
    result = {"nnz_assemble": int(A.nnz), "nnz_kron": int(B.nnz),
              "nnz_model_count": int(model.nnz_count()),
              "index_dtype_assemble": str(A.indices.dtype),
              "index_dtype_kron": str(B.indices.dtype)}
    same_pattern = (A.nnz == B.nnz and np.array_equal(A.indptr, B.indptr)
                    and np.array_equal(A.indices, B.indices))
    if same_pattern:
        difference = float(np.abs(A.data - B.data).max(initial=0.0))
    else:
        difference = float(abs(A - B).max())
    scale = float(np.abs(B.data).max(initial=0.0))
    result.update(same_pattern=bool(same_pattern), max_abs_difference=difference,
                  tolerance=1e-15 * max(scale, 1.0))
    result["equal"] = bool(difference <= result["tolerance"]
                           and A.nnz == result["nnz_model_count"])
    return result


def cold_run(method: str, size: int, pause: float) -> dict:
    """One call in a fresh process after ``pause`` seconds of idling (see the README)."""
    time.sleep(pause)
    command = [sys.executable, __file__, "--worker", method, "--size", str(size)]
    output = subprocess.run(command, check=True, capture_output=True, text=True).stdout
    return json.loads(output.strip().splitlines()[-1])


def worker(method: str, size: int) -> None:
    """One call in this (fresh) process; its peak RSS is the call's own. getrusage's peak
    survives fork + exec (it would include the parent's RSS), so VmHWM is used on Linux."""
    rss_before = _status_mib("VmRSS")
    seconds, nnz = run_once(method, size)
    peak = _status_mib("VmHWM")
    growth = None if peak is None or rss_before is None else peak - rss_before
    print(json.dumps({"seconds": seconds, "nnz": nnz, "rss_growth_mib": growth,
                      "rss_peak_mib": peak}))


def summarize(seconds: list[float], nnz: int, first: float) -> dict:
    median, best = statistics.median(seconds), min(seconds)
    return {"seconds": seconds, "median_s": median, "best_s": best, "first_call_s": first,
            "nnz": nnz, "median_rate": nnz / median, "best_rate": nnz / best,
            "first_call_rate": nnz / first}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--size", type=int, default=2048, help="torus side (default 2048)")
    parser.add_argument("--repeat", type=int, default=5, help="timed calls of each method")
    parser.add_argument("--cold", type=int, default=1,
                        help="fresh-process calls of each method (0: none; default 1)")
    parser.add_argument("--cold-pause", type=float, default=5.0,
                        help="seconds to idle before each fresh-process call (default 5)")
    parser.add_argument("--output", type=Path, default=DEFAULT_OUTPUT)
    parser.add_argument("--worker", choices=METHODS, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    os.environ.setdefault("GAPLINE_PROGRESS", "off")  # no progress output inside timings
    if args.size < 2 or args.repeat < 1:
        parser.error("--size must be >= 2 and --repeat >= 1")
    if args.worker:
        worker(args.worker, args.size)
        return 0

    n = args.size * args.size
    print(f"assembly benchmark: {args.size}x{args.size} driven torus, {n:,} states, "
          f"forward {FORWARD}, backward {BACKWARD}, block_rows {ScipyBackend.block_rows}, "
          f"{args.repeat} repetitions", flush=True)
    times: dict[str, list[float]] = {method: [] for method in METHODS}
    nnz: dict[str, int] = {}
    rss_start = peak_rss_mib()
    # Per method: one untimed first call (reported: it pays for memory this process has not
    # touched before), then the timed calls back to back. So every timed call follows a call
    # of the same method that has just freed the same amount of memory: the same conditions
    # for all. (Alternating methods would charge the one with the larger footprint for the
    # extra fresh memory it needs after a smaller one.)
    first: dict[str, float] = {}
    for method in METHODS:
        first[method] = run_once(method, args.size)[0]
        for _ in range(args.repeat):
            seconds, nnz[method] = run_once(method, args.size)
            times[method].append(seconds)
    rss_peak = peak_rss_mib()
    results = {method: summarize(times[method], nnz[method], first[method])
               for method in METHODS}
    check = compare(args.size)

    cold: dict[str, list[dict]] = {}
    for method in METHODS if args.cold > 0 else ():
        cold[method] = [cold_run(method, args.size, args.cold_pause) for _ in range(args.cold)]

    baseline = results["kron"]["median_s"]
    for method in ("assemble", "row_blocks"):
        results[method]["speedup_vs_kron_median"] = baseline / results[method]["median_s"]
        results[method]["speedup_vs_kron_best"] = (results["kron"]["best_s"]
                                                   / results[method]["best_s"])
    full = results["assemble"]
    targets = {
        "rate_at_least_30M_per_s": bool(full["median_rate"] >= TARGET_RATE),
        "faster_than_kron": bool(full["median_s"] < baseline),
        "matrices_equal": check["equal"],
    }

    labels = {"assemble": "ScipyBackend.assemble (checked)",
              "row_blocks": "row_block generation only",
              "kron": "scipy.sparse.kron baseline"}
    print()
    print(f"{'method':<34}{'median s':>9}{'best s':>9}{'median nnz/s':>14}{'best nnz/s':>12}"
          f"{'vs kron':>9}{'1st call s':>12}")
    for method in METHODS:
        r = results[method]
        ratio = r.get("speedup_vs_kron_median")
        print(f"{labels[method]:<34}{r['median_s']:>9.3f}{r['best_s']:>9.3f}"
              f"{r['median_rate'] / 1e6:>13.1f}M{r['best_rate'] / 1e6:>11.1f}M"
              f"{'' if ratio is None else f'{ratio:.2f}x':>9}{r['first_call_s']:>12.3f}")
    print(f"(median/best of {args.repeat} timed calls; vs kron = kron median / median; 1st "
          "call = the untimed first call in this process)")
    print(f"nonzeros: {full['nnz']:,} (model count {check['nnz_model_count']:,}); peak RSS "
          f"of this process {rss_peak:.0f} MiB ({rss_start:.0f} MiB before the timings)")
    print(f"matrices equal: {check['equal']} (same pattern: {check['same_pattern']}, "
          f"max |assemble - kron| = {check['max_abs_difference']:.2e})")
    if cold:
        print()
        print(f"cold: one call in a fresh process after {args.cold_pause:g} s idle")
        print(f"{'method':<34}{'seconds':>9}{'nnz/s':>10}{'peak RSS of the call':>22}")
        for method, runs in cold.items():
            for run in runs:
                growth = run["rss_growth_mib"]
                print(f"{labels[method]:<34}{run['seconds']:>9.3f}"
                      f"{run['nnz'] / run['seconds'] / 1e6:>9.1f}M"
                      f"{'?' if growth is None else f'+{growth:.0f} MiB':>22}")
    print()
    verdict = {True: "PASS", False: "FAIL"}
    print(f"{verdict[targets['rate_at_least_30M_per_s']]}  >= 30M nnz/s (full assembly, "
          f"median): {full['median_rate'] / 1e6:.1f}M nnz/s")
    print(f"{verdict[targets['faster_than_kron']]}  faster than scipy.sparse.kron (medians): "
          f"{full['median_s']:.3f} s vs {baseline:.3f} s "
          f"({full['speedup_vs_kron_median']:.2f}x)")
    print(f"{verdict[targets['matrices_equal']]}  same matrix as the kron baseline")

    report = {
        "benchmark": "assemble",
        "size": args.size,
        "n_states": n,
        "forward": FORWARD,
        "backward": BACKWARD,
        "boundary": ["periodic", "periodic"],
        "repeat": args.repeat,
        "block_rows": ScipyBackend.block_rows,
        "results": results,
        "comparison": check,
        "peak_rss_mib": rss_peak,
        "rss_before_timings_mib": rss_start,
        "cold": {"pause_s": args.cold_pause, "runs": cold},
        "targets": {"min_rate": TARGET_RATE, **targets},
        "passed": bool(all(targets.values())),
        "environment": {"python": platform.python_version(), "numpy": np.__version__,
                        "scipy": scipy.__version__, "machine": platform.machine(),
                        "cpus": os.cpu_count(), "platform": platform.platform()},
        "time": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }
    args.output.parent.mkdir(parents=True, exist_ok=True)
    args.output.write_text(json.dumps(report, indent=2) + "\n")
    print(f"results: {args.output}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
