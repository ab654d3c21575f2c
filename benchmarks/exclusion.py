"""Exclusion ring at L = 26, N = 13 (10.4M states): assembly and solve against scipy baselines.

Measures, in one process:

* ``assemble``: ``ScipyBackend().assemble(model)`` for the symmetric exclusion ring
  (``right = left = 1``): combinatorial ranking of the row blocks, block checks, CSR,
  column sums. Reported as states/s and nonzeros/s.
* ``assemble baseline``: what a numpy user would write by hand: all ``2^L`` bit patterns,
  kept when ``popcount == N`` (sorted, so a state's index is its position), and for each bond
  the neighbour's index by ``np.searchsorted``; COO to CSR with ``scipy.sparse``.
* ``solve``: gapline's method ``krylov`` (symmetric Lanczos, ``eigsh(which='LA')`` on ``W``;
  the stationary vector is its mode 0).
* ``solve baseline``: ``scipy.sparse.linalg.eigs(W, k, which='LR')`` on the baseline matrix,
  the call a user would write for the rightmost eigenvalues.

Both solves are checked against the exact gap ``2 (1 - cos(2 pi / L))`` (Caputo, Liggett and
Richthammer 2010) and the uniform stationary law. The two matrices are compared entry by
entry. Writes benchmarks/results/exclusion.json.

    python benchmarks/exclusion.py [--sites 26 --particles 13 --modes 4 --tolerance 1e-8]
"""

from __future__ import annotations

import argparse
import gc
import json
import math
import os
import platform
import resource
import sys
import time
from pathlib import Path

import numpy as np
import scipy
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from pipeline.backends.scipy_ import ScipyBackend
from pipeline.models.exclusion import ExclusionProcess

DEFAULT_OUTPUT = Path(__file__).resolve().parent / "results" / "exclusion.json"
TOLERANCE = 1e-8
BASELINE_RESTARTS = 60  # ARPACK restarts the baseline may take (about 16 products each)


def baseline_matrix(sites: int, particles: int, rate: float) -> sp.csr_matrix:
    """Symmetric exclusion ring built the direct numpy way (sorted pattern table)."""
    all_patterns = np.arange(2**sites, dtype=np.uint64)
    states = all_patterns[np.bitwise_count(all_patterns) == particles]
    del all_patterns
    n = states.size
    rows, cols = [], []
    exits = np.zeros(n)
    one = np.uint64(1)
    for c in range(sites):
        d = (c + 1) % sites
        a = (states >> np.uint64(c)) & one
        b = (states >> np.uint64(d)) & one
        movable = np.flatnonzero(a != b)  # a hop across the bond exists (either way)
        target = states[movable] ^ ((one << np.uint64(c)) | (one << np.uint64(d)))
        rows.append(np.searchsorted(states, target))
        cols.append(movable)
        exits[movable] += rate
    rows.append(np.arange(n))
    cols.append(np.arange(n))
    data = np.concatenate([np.full(sum(r.size for r in rows[:-1]), rate), -exits])
    return sp.csr_matrix((data, (np.concatenate(rows), np.concatenate(cols))), shape=(n, n))


def peak_rss_gib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20


def summarize(values: np.ndarray, vector0: np.ndarray, exact_gap: float, n: int) -> dict:
    order = np.argsort(-values.real)
    values = values[order]
    p = np.real(vector0)
    p = p / p.sum()
    return {
        "eigenvalues": [float(v.real) for v in values],
        "gap": float(-values[1].real),
        "gap_relative_error": float(abs(-values[1].real - exact_gap) / exact_gap),
        "stationary_l1_error_vs_uniform": float(np.abs(p - 1.0 / n).sum()),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sites", type=int, default=26)
    parser.add_argument("--particles", type=int, default=13)
    parser.add_argument("--modes", type=int, default=4)
    parser.add_argument("--tolerance", type=float, default=TOLERANCE)
    parser.add_argument("--output", type=Path, default=DEFAULT_OUTPUT)
    args = parser.parse_args(argv)
    os.environ.setdefault("GAPLINE_PROGRESS", "off")
    L, N, k = args.sites, args.particles, args.modes
    exact_gap = 2.0 * (1.0 - math.cos(2.0 * math.pi / L))
    model = ExclusionProcess(L, "periodic", 1.0, 1.0, particles=N)
    n = model.n_states
    print(f"exclusion ring L={L} N={N}: {n} states, exact gap {exact_gap:.10f}", flush=True)
    results: dict = {"sites": L, "particles": N, "states": n, "modes": k,
                     "exact_gap": exact_gap}

    args.output.parent.mkdir(parents=True, exist_ok=True)

    def save() -> None:  # after every phase, so an interrupted run keeps what it measured
        args.output.write_text(json.dumps(results, indent=2))

    backend = ScipyBackend()
    started = time.perf_counter()
    operator = backend.assemble(model)
    seconds = time.perf_counter() - started
    results["assemble"] = {"seconds": seconds, "states_per_second": n / seconds,
                           "nnz": operator.nnz, "nnz_per_second": operator.nnz / seconds,
                           "peak_rss_gib": peak_rss_gib()}
    print(f"assemble: {seconds:.1f} s, {n / seconds / 1e6:.2f}M states/s, "
          f"{operator.nnz / seconds / 1e6:.1f}M nonzeros/s ({operator.nnz} nonzeros)",
          flush=True)

    started = time.perf_counter()
    baseline = baseline_matrix(L, N, 1.0)
    seconds = time.perf_counter() - started
    results["assemble_baseline"] = {"seconds": seconds, "states_per_second": n / seconds}
    print(f"assemble baseline (numpy pattern table + searchsorted): {seconds:.1f} s, "
          f"{n / seconds / 1e6:.2f}M states/s", flush=True)
    W = operator.handle["W"]
    difference = abs(W - baseline).max()
    results["matrices_max_difference"] = float(difference)
    print(f"matrices agree: max |difference| = {difference:.1e}", flush=True)
    save()

    started = time.perf_counter()
    modes = backend.slowest_modes(operator, k, method="krylov", tolerance=args.tolerance,
                                  vectors=False)
    stationary = backend.stationary(operator)
    seconds = time.perf_counter() - started
    ours = summarize(modes.values, stationary.distribution, exact_gap, n)
    ours.update(seconds=seconds, method=modes.method, certified=modes.certified,
                matrix_products=modes.info.get("matrix_products"),
                max_residual=float(modes.residuals.max()),
                stationary_residual=stationary.residual)
    results["solve"] = ours
    save()
    print(f"solve ({modes.method}): {seconds:.1f} s, gap {ours['gap']:.10f} (relative error "
          f"{ours['gap_relative_error']:.1e}), stationary L1 error vs uniform "
          f"{ours['stationary_l1_error_vs_uniform']:.1e}, certified={modes.certified}",
          flush=True)
    del operator, W
    gc.collect()

    started = time.perf_counter()
    converged = True
    try:
        values, vectors = spla.eigs(baseline, k=k, which="LR", tol=args.tolerance,
                                    v0=np.random.default_rng(1).standard_normal(n),
                                    maxiter=BASELINE_RESTARTS)
    except spla.ArpackNoConvergence as failure:
        values, vectors, converged = failure.eigenvalues, failure.eigenvectors, False
    seconds = time.perf_counter() - started
    if values.size >= 2:
        theirs = summarize(values, vectors[:, np.argmax(values.real)], exact_gap, n)
    else:
        theirs = {"eigenvalues": [complex(v).real for v in values]}
    theirs.update(seconds=seconds, converged=converged,
                  note="" if converged else f"no convergence within {BASELINE_RESTARTS} "
                  "ARPACK restarts: the time is a lower bound")
    results["solve_baseline"] = theirs
    print(f"solve baseline (scipy eigs which='LR'): {seconds:.1f} s, converged={converged}, "
          f"gap {theirs.get('gap')} (relative error {theirs.get('gap_relative_error')})",
          flush=True)
    results["ratios"] = {
        "assemble_speedup": results["assemble_baseline"]["seconds"]
        / results["assemble"]["seconds"],
        "solve_speedup": theirs["seconds"] / ours["seconds"],
    }
    results["machine"] = {"platform": platform.platform(), "cpus": os.cpu_count(),
                          "python": sys.version.split()[0], "numpy": np.__version__,
                          "scipy": scipy.__version__, "peak_rss_gib": peak_rss_gib()}
    print(f"assembly {results['ratios']['assemble_speedup']:.2f}x the baseline, solve "
          f"{results['ratios']['solve_speedup']:.2f}x the baseline; peak RSS "
          f"{peak_rss_gib():.1f} GiB", flush=True)
    save()
    return 0


if __name__ == "__main__":
    sys.exit(main())
