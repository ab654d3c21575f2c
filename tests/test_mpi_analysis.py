"""Stages ``analyze`` and ``evolve`` under a real ``mpiexec -n 2`` on the slepc backend: the
same results as the scipy backend on one process (to 1e-9) and the published formulas, each
with its source; rank-owned chunks of ``[time, state]``; an error in one rank's rows of a
start law ends both ranks with the same one-line error."""

from __future__ import annotations

import math

import numpy as np
import pytest
import zarr
from scipy.special import ive

from pipeline.parallel import ownership_ranges, state_chunk

from .conftest import write_config
from .test_mpi_slepc import MPIEXEC, _run_with

pytestmark = [
    pytest.mark.skipif(MPIEXEC is None, reason="mpiexec is not installed (make installs "
                       "openmpi-bin)"),
    pytest.mark.slow,
]

AGREEMENT = 1e-9  # 2 ranks (slepc) against 1 process (scipy), relative to the array's size

RING_U, RING_V, RING_SIZE, RING_ORIGIN = 1.3, 0.4, 400, 200
RING_TIMES = (0.0, 5.0, 10.0, 20.0)
# name: (model fields, extra tables)
CASES = {
    # Large enough that the walker never wraps by t = 20 (drift 18, spread 7.5, 200 sites
    # to the far side). dense_limit below n: shift-invert, and the mode expansion with left
    # vectors from W^T rather than the gathered dense matrix.
    "ring": (f'size = [{RING_SIZE}]\nboundary = ["periodic"]\nforward = [{RING_U}]\n'
             f'backward = [{RING_V}]\n',
             f"dense_limit = 100\n[evolve]\nstart = [{RING_ORIGIN}]\n"
             f"times = {list(RING_TIMES)}\nmodes = 5\n"),
    "reflecting": ('size = [60]\nboundary = ["reflecting"]\nforward = [1.04]\n'
                   'backward = [0.96]\n', ""),
    "absorbing": ('size = [25]\nboundary = ["absorbing"]\nforward = [0.9]\nbackward = [0.6]\n',
                  ""),
    "symmetric": ('size = [31]\nboundary = ["absorbing"]\nforward = [0.5]\nbackward = [0.5]\n',
                  "[analyze]\nstart = [15]\n"),
}


def _config(directory, name: str, backend: str, extra: str | None = None):
    fields, tables = CASES[name]
    text = (f'[run]\nname = "{name}"\n[model]\ntype = "lattice"\n{fields}'
            f'[solve]\nmodes = 4\nbackend = "{backend}"\nvectors = true\n'
            + (tables if extra is None else extra))
    return write_config(directory, f"{name}-{backend}", text)


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Every case on scipy (1 process) and on slepc under mpiexec -n 2: {(name, label): run
    group}."""
    directory = tmp_path_factory.mktemp("mpi-analysis")
    results = {}
    for name in CASES:
        for label, backend, ranks in (("scipy", "scipy", 1), ("slepc-2", "slepc", 2)):
            store = directory / f"{name}-{label}.zarr"
            outcome = _run_with(_config(directory, name, backend), store, ranks, [])
            assert outcome.returncode == 0, outcome.stderr[-3000:]
            results[name, label] = zarr.open_group(str(store / name), mode="r")
    return results


def _same(two, one, scale: float | None = None) -> None:
    """2-rank and 1-process arrays agree to AGREEMENT times ``scale`` (default: the largest
    value; a current that vanishes is measured against the flux)."""
    two, one = np.asarray(two, dtype=float), np.asarray(one, dtype=float)
    assert two.shape == one.shape
    if scale is None:
        scale = max(float(np.abs(one).max(initial=0.0)), 1e-300)
    assert float(np.abs(two - one).max(initial=0.0)) <= AGREEMENT * scale


def _attrs(runs, name, group):
    return [dict(runs[name, label][group].attrs) for label in ("slepc-2", "scipy")]


@pytest.mark.parametrize("name", ["ring", "reflecting"])
def test_currents_on_two_ranks_equal_one_process(runs, name):
    two, one = (runs[name, label]["analysis"] for label in ("slepc-2", "scipy"))
    flux = float(np.abs(one["channel_flux"][:]).max())
    for array in ("channel_flux", "channel_current", "drift"):
        _same(two[array][:], one[array][:], scale=flux)
    a, b = (attrs["currents"] for attrs in _attrs(runs, name, "analysis"))
    assert a["entropy_production"] == pytest.approx(b["entropy_production"],
                                                    rel=AGREEMENT, abs=1e-15)
    assert a["detailed_balance"] is b["detailed_balance"]
    assert dict(two.attrs)["ranks"] == 2


def test_biased_ring_entropy_production_on_two_ranks(runs):
    # Uniform stationary law, one cycle: sigma = (u - v) ln(u/v) per unit time
    # (Schnakenberg 1976, Rev. Mod. Phys. 48, 571, eq. 7.6); drift u - v.
    group = runs["ring", "slepc-2"]["analysis"]
    currents = dict(group.attrs)["currents"]
    u, v = RING_U, RING_V
    assert currents["entropy_production"] == pytest.approx((u - v) * math.log(u / v),
                                                           rel=1e-10)
    np.testing.assert_allclose(group["channel_current"][:], [u - v, -(u - v)], rtol=1e-10)
    np.testing.assert_allclose(group["drift"][:], [u - v], rtol=1e-10)
    assert currents["detailed_balance"] is False


def test_reflecting_chain_detailed_balance_on_two_ranks(runs):
    # Birth-death chain: reversible, so every current and the entropy production vanish
    # (Kelly 1979, Reversibility and Stochastic Networks, 1.5; Schnakenberg 1976); its law
    # is p(x) ∝ (u/v)^x, so the flux of +1 hops is u sum_{x < L-1} p(x) (Kelly 1.3).
    group = runs["reflecting", "slepc-2"]["analysis"]
    currents = dict(group.attrs)["currents"]
    assert currents["detailed_balance"] is True
    assert abs(currents["entropy_production"]) < 1e-13
    assert currents["balance_defect"] < 1e-11
    np.testing.assert_allclose(group["channel_current"][:], 0.0, atol=1e-13)
    u, v, size = 1.04, 0.96, 60
    law = (u / v) ** np.arange(size)
    law /= law.sum()
    np.testing.assert_allclose(group["channel_flux"][:], [u * law[:-1].sum(),
                                                          v * law[1:].sum()], rtol=1e-10)


@pytest.mark.parametrize("name", ["absorbing", "symmetric"])
def test_absorption_on_two_ranks_equals_one_process(runs, name):
    two, one = (runs[name, label]["analysis"] for label in ("slepc-2", "scipy"))
    for array in ("quasi_stationary", "mean_absorption_time", "splitting"):
        _same(two[array][:], one[array][:])
    a, b = (attrs["absorption"] for attrs in _attrs(runs, name, "analysis"))
    for key in ("escape_rate", "mean_time_from_quasi_stationary"):
        assert a[key] == pytest.approx(b[key], rel=AGREEMENT)
    _same(a["splitting_from_quasi_stationary"], b["splitting_from_quasi_stationary"])
    assert a["mean_time_residual"] < 1e-13 and a["splitting_sum_defect"] < 1e-12


def test_absorbing_chain_escape_rate_and_quasi_stationary_law_on_two_ranks(runs):
    # Escape rate (u + v) - 2 sqrt(uv) cos(pi/(L+1)); quasi-stationary law
    # ∝ (u/v)^{x/2} sin(pi x/(L+1)), x = 1..L (Feller 1968, vol. 1, XVI.3: the symmetrized
    # tridiagonal Toeplitz matrix); mean absorption time from that law 1 / escape rate
    # (Darroch and Seneta 1967, J. Appl. Prob. 4, 192).
    size, u, v = 25, 0.9, 0.6
    group = runs["absorbing", "slepc-2"]["analysis"]
    absorption = dict(group.attrs)["absorption"]
    rate = (u + v) - 2 * math.sqrt(u * v) * math.cos(math.pi / (size + 1))
    assert absorption["escape_rate"] == pytest.approx(rate, rel=1e-12)
    x = np.arange(1, size + 1)
    law = (u / v) ** (x / 2) * np.sin(math.pi * x / (size + 1))
    np.testing.assert_allclose(group["quasi_stationary"][:], law / law.sum(), atol=1e-12)
    assert absorption["mean_time_from_quasi_stationary"] == pytest.approx(1 / rate, rel=1e-10)
    # Leaving at the high end first from x: ((q/p)^x - 1) / ((q/p)^(L+1) - 1), p = u/(u+v)
    # (Feller 1968, vol. 1, XIV.2, eq. 2.4).
    ratio = v / u
    np.testing.assert_allclose(group["splitting"][:, 1],
                               (ratio**x - 1) / (ratio ** (size + 1) - 1), rtol=1e-10)


def test_symmetric_walk_mean_absorption_time_on_two_ranks(runs):
    # Gambler's ruin: E T_x = x (L + 1 - x) / (u + v) (Feller 1968, vol. 1, XIV.3, eq. 3.4;
    # Norris 1997, Markov Chains, thm. 3.3.3); from the middle x = 16 (state 15) of L = 31
    # it is 16 * 16 / 1.0, and both exits are equally likely (Feller XIV.2). State 15 is
    # owned by rank 0, so the start summaries come from the owner rank.
    size, rate = 31, 0.5
    group = runs["symmetric", "slepc-2"]["analysis"]
    absorption = dict(group.attrs)["absorption"]
    x = np.arange(1, size + 1)
    np.testing.assert_allclose(group["mean_absorption_time"][:], x * (size + 1 - x)
                               / (2 * rate), rtol=1e-11)
    assert absorption["mean_time_from_start"] == pytest.approx(16 * 16 / (2 * rate),
                                                               rel=1e-12)
    np.testing.assert_allclose(absorption["splitting_from_start"], [0.5, 0.5], rtol=1e-12)


def test_ring_evolution_on_two_ranks_is_the_bessel_solution(runs):
    # Biased walk without wrap-around: p(r, t) = e^{-(u+v)t} (u/v)^{r/2} I_r(2t sqrt(uv))
    # (Feller 1971, An Introduction to Probability Theory, vol. 1 and vol. 2 II.7), with
    # ive(r, z) = I_r(z) e^{-z}; mean r = (u - v) t and variance (u + v) t (Feller vol. 1).
    group = runs["ring", "slepc-2"]["evolution"]
    u, v = RING_U, RING_V
    r = np.arange(RING_SIZE) - RING_ORIGIN
    probability = group["probability"][:]
    for row, t in enumerate(group["time"][:]):
        if t == 0:
            np.testing.assert_array_equal(probability[row], (r == 0).astype(float))
            continue
        z = 2 * t * math.sqrt(u * v)
        exact = ive(np.abs(r), z) * np.exp(z - (u + v) * t) * (u / v) ** (r / 2.0)
        np.testing.assert_allclose(probability[row], exact, atol=1e-12, rtol=0)
    times = np.asarray(RING_TIMES)
    np.testing.assert_allclose(group["mean_coordinate"][:, 0], RING_ORIGIN + (u - v) * times,
                               rtol=1e-10)
    np.testing.assert_allclose(group["variance_coordinate"][:, 0], (u + v) * times,
                               rtol=1e-9, atol=1e-9)
    attrs = dict(group.attrs)
    assert attrs["conservation_defect"] < 1e-12 and attrs["negative_mass"] < 1e-12


def test_ring_evolution_on_two_ranks_equals_one_process(runs):
    two, one = (runs["ring", label]["evolution"] for label in ("slepc-2", "scipy"))
    for array in ("probability", "total_probability", "mean_coordinate",
                  "variance_coordinate", "mode_expansion", "mode_expansion_difference"):
        _same(two[array][:], one[array][:])
    a, b = _attrs(runs, "ring", "evolution")
    assert "SLEPc MFN" in a["method"] and "expm_multiply" in b["method"]
    assert a["mode_expansion_modes"] == b["mode_expansion_modes"] == 5


def test_each_rank_writes_the_state_chunks_it_owns(runs):
    group = runs["ring", "slepc-2"]
    chunk = state_chunk(RING_SIZE, 2)
    assert group["evolution/probability"].chunks == (len(RING_TIMES), chunk)
    assert group["analysis/class_of_state"].shape == (RING_SIZE,)
    for start, stop in ownership_ranges(RING_SIZE, 2):  # rank boundaries are chunk ones
        assert start % chunk == 0 and (stop % chunk == 0 or stop == RING_SIZE)
    absorbing = runs["absorbing", "slepc-2"]["analysis"]
    assert absorbing["splitting"].chunks[0] == state_chunk(25, 2)


def test_a_bad_start_law_in_one_ranks_rows_is_one_line_on_every_rank(tmp_path):
    """A negative entry only in rank 1's rows of the start file: both ranks must stop with
    the same one-line error (the checks are reductions), not leave rank 0 waiting."""
    law = np.zeros(RING_SIZE)
    law[[10, RING_SIZE - 5]] = [1.5, -0.5]  # sums to 1; the negative entry is rank 1's
    np.save(tmp_path / "law.npy", law)
    extra = f'[evolve]\nstart = "{tmp_path / "law.npy"}"\ntimes = [1.0]\n'
    outcome = _run_with(_config(tmp_path, "ring", "slepc", extra=extra), tmp_path / "s.zarr",
                        2, [])
    assert outcome.returncode == 2, outcome.stderr[-2000:]
    errors = [line for line in outcome.stderr.splitlines() if line.startswith("gapline")]
    assert len(errors) == 1 and errors[0].startswith("gapline: error: evolve.start:"), errors
    assert "negative" in errors[0] and "Traceback" not in outcome.stderr


def test_currents_per_closed_class_on_two_ranks(tmp_path):
    """Several closed classes: the laws of a one-process solve, then `--from analyze` on 2
    ranks (class {3, 4} straddles the ranks' rows 0..3 and 4..6). Two-state class {3, 4}:
    every two-state chain is reversible (Kelly 1979, 1.5), so no current; the cycle
    0 -> 1 -> 2 -> 0 has one-way hops, so its entropy production is infinite (Schnakenberg
    1976: ln of a zero reverse flux). Both equal the one-process currents."""
    import scipy.sparse as sp

    from .test_analysis import two_closed_classes

    sp.save_npz(tmp_path / "w.npz", sp.csr_matrix(two_closed_classes()))
    config = write_config(tmp_path, "classes", '[run]\nname = "classes"\n[model]\n'
                          f'type = "matrix"\nfile = "{tmp_path / "w.npz"}"\n[solve]\n'
                          'modes = 3\nbackend = "slepc"\nclosed_classes = "per-class"\n')
    store = tmp_path / "s.zarr"
    outcome = _run_with(config, store, 1, [])
    assert outcome.returncode == 0, outcome.stderr[-2000:]
    one = zarr.open_group(str(store / "classes" / "analysis"), mode="r")
    flux, current = one["class_channel_flux"][:], one["class_channel_current"][:]
    per_class = dict(one.attrs)["currents"]["per_class"]
    outcome = _run_with(config, store, 2, ["--from", "analyze"])
    assert outcome.returncode == 0, outcome.stderr[-2000:]
    two = zarr.open_group(str(store / "classes" / "analysis"), mode="r")
    assert dict(two.attrs)["ranks"] == 2
    _same(two["class_channel_flux"][:], flux)
    _same(two["class_channel_current"][:], current, scale=float(np.abs(flux).max()))
    laws = zarr.open_group(str(store / "classes" / "stationary"), mode="r")
    for entry, law in zip(dict(two.attrs)["currents"]["per_class"],
                          laws["class_distributions"][:], strict=True):
        states = tuple(np.flatnonzero(law > 0))
        if states == (3, 4):
            assert entry["detailed_balance"] is True
            assert abs(entry["entropy_production"]) < 1e-15
        else:
            assert states == (0, 1, 2) and entry["entropy_production"] == "inf"
    for mine, reference in zip(dict(two.attrs)["currents"]["per_class"], per_class,
                               strict=True):
        assert mine["class"] == reference["class"]
        if reference["entropy_production"] == "inf":
            assert mine["entropy_production"] == "inf"
        else:
            assert mine["entropy_production"] == pytest.approx(
                reference["entropy_production"], rel=AGREEMENT, abs=1e-15)
