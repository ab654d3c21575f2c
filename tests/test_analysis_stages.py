"""The ``analyze`` and ``evolve`` stages end to end: store contents, config errors, show."""

from __future__ import annotations

import math

import numpy as np
import pytest
import zarr

from pipeline.config import load_config, parse_config
from pipeline.errors import ConfigError, SolverError
from pipeline.stages import solve as solve_stage
from pipeline.stages.base import RunContext
from pipeline.stages.runner import run_pipeline
from pipeline.store import Store

from .conftest import assert_one_line_user_error, ring_config, run_cli, write_config
from .test_analysis import dense_model, two_closed_classes

CHAIN = """\
[run]
name = "{name}"

[model]
type = "lattice"
size = [{size}]
boundary = ["absorbing"]
forward = [{u}]
backward = [{v}]

[solve]
modes = 4
backend = "scipy"
{extra}
"""


def _chain(tmp_path, name="chain", size=25, u=0.9, v=0.6, extra=""):
    return write_config(tmp_path, name, CHAIN.format(name=name, size=size, u=u, v=v,
                                                     extra=extra))


def _analysis(store_path, run):
    return zarr.open_group(str(store_path), mode="r")[run]["analysis"]


def test_absorbing_chain_escape_rate_and_quasi_stationary_law(tmp_path, quiet):
    # Escape rate (u + v) - 2 sqrt(uv) cos(pi/(L+1)); quasi-stationary law
    # ∝ (u/v)^{x/2} sin(pi x/(L+1)), x = 1..L: the slowest eigenpair of the absorbing chain
    # (Feller 1968, vol. 1, XVI.3; the symmetrized tridiagonal Toeplitz matrix).
    size, u, v = 25, 0.9, 0.6
    store = tmp_path / "s.zarr"
    outcome = run_pipeline(load_config(_chain(tmp_path, size=size, u=u, v=v)),
                           store_path=str(store))
    assert outcome.verified is True
    group = _analysis(store, "chain")
    absorption = group.attrs["absorption"]
    exact_rate = (u + v) - 2 * math.sqrt(u * v) * math.cos(math.pi / (size + 1))
    assert absorption["escape_rate"] == pytest.approx(exact_rate, rel=1e-12)
    x = np.arange(1, size + 1)
    law = (u / v) ** (x / 2) * np.sin(math.pi * x / (size + 1))
    np.testing.assert_allclose(group["quasi_stationary"][:], law / law.sum(), atol=1e-12)
    # From the quasi-stationary law the absorption time is exponential (Darroch and Seneta
    # 1967): mean 1 / escape rate.
    assert absorption["mean_time_from_quasi_stationary"] == pytest.approx(1 / exact_rate,
                                                                          rel=1e-10)


def test_symmetric_chain_mean_time_from_the_middle(tmp_path, quiet):
    # Gambler's ruin: E T_x = x (L + 1 - x) / (u + v) (Feller 1968, vol. 1, XIV.3, eq. 3.4).
    size, rate = 31, 0.5
    store = tmp_path / "s.zarr"
    path = _chain(tmp_path, size=size, u=rate, v=rate, extra="[analyze]\nstart = [15]\n")
    run_pipeline(load_config(path), store_path=str(store))
    absorption = _analysis(store, "chain").attrs["absorption"]
    assert absorption["mean_time_from_start"] == pytest.approx(16 * 16 / (2 * rate), rel=1e-12)
    # Splitting from the middle of a symmetric chain: 1/2 each way (Feller XIV.2).
    np.testing.assert_allclose(absorption["splitting_from_start"], [0.5, 0.5], rtol=1e-12)


def test_reflecting_chain_reports_detailed_balance(tmp_path, quiet):
    # Zero currents and entropy production on a reversible chain (Schnakenberg 1976).
    path = ring_config(tmp_path, extra="")
    text = path.read_text().replace('"periodic"', '"reflecting"')
    path.write_text(text)
    store = tmp_path / "s.zarr"
    run_pipeline(load_config(path), store_path=str(store))
    currents = _analysis(store, "ring").attrs["currents"]
    assert currents["detailed_balance"] is True
    assert abs(currents["entropy_production"]) < 1e-13
    assert currents["balance_defect"] < 1e-12


def test_biased_ring_entropy_production_in_the_store(tmp_path, quiet):
    # (u - v) ln(u/v) with u = 1.3, v = 0.4 (Schnakenberg 1976), drift u - v.
    store = tmp_path / "s.zarr"
    run_pipeline(load_config(ring_config(tmp_path)), store_path=str(store))
    group = _analysis(store, "ring")
    currents = group.attrs["currents"]
    assert currents["entropy_production"] == pytest.approx(0.9 * math.log(1.3 / 0.4),
                                                           rel=1e-12)
    assert currents["detailed_balance"] is False
    np.testing.assert_allclose(group["drift"][:], [0.9], rtol=1e-12)
    relaxation = group.attrs["relaxation"]
    # Slowest ring mode -(u+v) + u e^{-iq} + v e^{iq}, q = 2 pi / L (Fourier; classic).
    q = 2 * math.pi / 40
    slowest = -(1.7) + 1.3 * np.exp(-1j * q) + 0.4 * np.exp(1j * q)
    assert relaxation["gap"] == pytest.approx(-slowest.real, rel=1e-12)
    assert relaxation["relaxation_time"] == pytest.approx(-1 / slowest.real, rel=1e-12)
    assert relaxation["period"] == pytest.approx(2 * math.pi / abs(slowest.imag), rel=1e-12)
    assert relaxation["resolved"] is True


# ---------------------------------------------------------------------------------------
# Several closed classes through the solve stage


def _solve_context(tmp_path, closed_classes):
    raw = {"run": {"name": "classes"}, "model": {"type": "lattice", "size": [7]},
           "solve": {"closed_classes": closed_classes, "modes": 3}}
    config = parse_config(raw)
    model = dense_model(two_closed_classes())
    return RunContext(config=config, store=Store(tmp_path / "s.zarr", create=True),
                      run="classes", model=model, backend_name="scipy")


def test_two_closed_classes_get_two_stationary_laws(tmp_path, quiet):
    # Against the dense null space of W (numpy SVD): each stored law is in it.
    output = solve_stage.run(_solve_context(tmp_path, "per-class"))
    group = output.groups["stationary"]
    laws = group.arrays["class_distributions"].data
    assert laws.shape == (2, 7)
    W = two_closed_classes()
    np.testing.assert_allclose(W @ laws.T, 0.0, atol=1e-14)
    np.testing.assert_allclose(laws.sum(axis=1), 1.0, rtol=1e-14)
    supports = [set(np.flatnonzero(row > 0)) for row in laws]
    assert sorted(map(sorted, supports)) == [[0, 1, 2], [3, 4]]
    assert group.arrays["class_labels"].data.shape == (2,)


def test_single_stationary_law_refused_for_two_closed_classes(tmp_path, quiet):
    with pytest.raises(SolverError, match=r"^solve.closed_classes: W has 2 closed classes"):
        solve_stage.run(_solve_context(tmp_path, "single"))


# ---------------------------------------------------------------------------------------
# Symmetrized solve through the config


def test_symmetrize_auto_on_a_reversible_chain(tmp_path, quiet):
    path = ring_config(tmp_path, extra='symmetrize = "auto"\n')
    path.write_text(path.read_text().replace('"periodic"', '"reflecting"'))
    store = tmp_path / "s.zarr"
    outcome = run_pipeline(load_config(path), store_path=str(store))
    assert outcome.verified is True  # against the exact chain spectrum (verify stage)
    spectrum = zarr.open_group(str(store), mode="r")["ring"]["spectrum"]
    assert "symmetrized" in spectrum.attrs["method"]
    assert np.all(spectrum["eigenvalues"][:].imag == 0)


def test_symmetrize_always_on_a_driven_ring_is_one_line(tmp_path):
    path = ring_config(tmp_path, extra='symmetrize = "always"\n')
    result = run_cli("run", path, "--store", tmp_path / "s.zarr", cwd=tmp_path)
    line = assert_one_line_user_error(result)
    assert "solve.symmetrize" in line and "detailed balance fails" in line


# ---------------------------------------------------------------------------------------
# Evolution


EVOLVE = "\n[evolve]\nstart = {start}\n{times}\n"


def test_evolve_not_requested_is_a_committed_skip(tmp_path, quiet):
    store = tmp_path / "s.zarr"
    run_pipeline(load_config(ring_config(tmp_path)), store_path=str(store))
    group = Store(store).group("ring", "evolution")
    assert group.attrs["requested"] is False
    assert list(group.array_keys()) == []


def test_evolve_from_a_state_stores_the_time_axis(tmp_path, quiet):
    # Against the Bessel solution of the biased walk (Feller vol. 1) on a ring of 40 sites
    # at short times (the walker has not wrapped: tail below 1e-13).
    path = ring_config(tmp_path, extra=EVOLVE.format(start="[20]", times="times = [0.0, 0.5, 1.0]"))
    store = tmp_path / "s.zarr"
    assert run_pipeline(load_config(path), store_path=str(store)).verified is True
    group = zarr.open_group(str(store), mode="r")["ring"]["evolution"]
    assert list(group["probability"].metadata.dimension_names) == ["time", "state"]
    from scipy.special import ive

    u, v, r = 1.3, 0.4, np.arange(40) - 20
    for row, t in enumerate(group["time"][:]):
        if t == 0:
            continue
        z = 2 * t * math.sqrt(u * v)
        exact = ive(np.abs(r), z) * np.exp(z - (u + v) * t) * (u / v) ** (r / 2.0)
        np.testing.assert_allclose(group["probability"][row], exact, atol=1e-12)
    np.testing.assert_allclose(group["mean_coordinate"][:, 0],
                               20 + (u - v) * group["time"][:], rtol=1e-10)
    assert group.attrs["conservation_defect"] < 1e-12


def test_evolve_from_stationary_stays_put_and_large_runs_keep_observables(tmp_path, quiet):
    extra = EVOLVE.format(start='"stationary"', times="t_end = 5.0\nsteps = 4\nfull_limit = 10")
    store = tmp_path / "s.zarr"
    run_pipeline(load_config(ring_config(tmp_path, extra=extra)), store_path=str(store))
    group = zarr.open_group(str(store), mode="r")["ring"]["evolution"]
    assert "probability" not in group  # 40 states > full_limit
    np.testing.assert_allclose(group["time"][:], np.linspace(0, 5, 4))
    np.testing.assert_allclose(group["total_probability"][:], 1.0, atol=1e-13)
    # The uniform law is stationary: mean coordinate (0 + ... + 39)/40 at every time.
    np.testing.assert_allclose(group["mean_coordinate"][:, 0], 19.5, rtol=1e-12)


def test_evolve_from_a_file(tmp_path, quiet):
    law = np.zeros(40)
    law[[3, 4]] = 0.5
    np.save(tmp_path / "start.npy", law)
    extra = EVOLVE.format(start=f'"{tmp_path / "start.npy"}"', times="times = [0.0, 2.0]")
    store = tmp_path / "s.zarr"
    run_pipeline(load_config(ring_config(tmp_path, extra=extra)), store_path=str(store))
    group = zarr.open_group(str(store), mode="r")["ring"]["evolution"]
    np.testing.assert_allclose(group["probability"][0], law)


@pytest.mark.parametrize("extra, message", [
    ("[evolve]\ntimes = [1.0]\n", r"^evolve.start: missing"),
    ("[evolve]\nstart = 0\n", r"^evolve.times: give either"),
    ("[evolve]\nstart = 0\ntimes = [2.0, 1.0]\n", r"^evolve.times: must be >= 0 and strictly"),
    ("[evolve]\nstart = 0\nt_end = -1.0\n", r"^evolve.t_end: must be > 0"),
    ("[evolve]\nstart = \"here\"\nt_end = 1.0\n", r"^evolve.start: expected 'stationary'"),
    ("[analyze]\nstart = -3\n", r"^analyze.start: a state index must be >= 0"),
    ("[analyze]\nbalance_tolerance = 2.0\n", r"^analyze.balance_tolerance: must be in"),
    ("[analyze]\nbegin = 1\n", r"^analyze.begin: unknown field"),
])
def test_config_errors_name_the_field(tmp_path, extra, message):
    with pytest.raises(ConfigError, match=message):
        load_config(ring_config(tmp_path, extra=extra))


def test_evolve_start_out_of_range_is_one_line(tmp_path):
    path = ring_config(tmp_path, extra=EVOLVE.format(start="400", times="times = [1.0]"))
    result = run_cli("run", path, "--store", tmp_path / "s.zarr", cwd=tmp_path)
    assert "evolve.start: state 400 out of range" in assert_one_line_user_error(result)


def test_show_prints_gap_relaxation_currents_entropy(tmp_path):
    path = ring_config(tmp_path)
    assert run_cli("run", path, "--store", tmp_path / "s.zarr", cwd=tmp_path).returncode == 0
    shown = run_cli("show", tmp_path / "s.zarr", "ring", cwd=tmp_path).stdout
    for text in ("relaxation: gap", "relaxation time", "currents per channel: axis0+ 0.9",
                 "entropy production", "detailed balance fails"):
        assert text in shown, shown


def test_evolve_mode_expansion_with_every_mode_equals_krylov(tmp_path, quiet):
    # With all 40 modes the expansion is exact (eigendecomposition of a diagonalizable W;
    # the ring is normal), so both methods must agree at every time.
    extra = EVOLVE.format(start="5", times="times = [0.0, 1.0, 4.0]\nmodes = 40")
    store = tmp_path / "s.zarr"
    run_pipeline(load_config(ring_config(tmp_path, extra=extra)), store_path=str(store))
    group = zarr.open_group(str(store), mode="r")["ring"]["evolution"]
    assert group.attrs["mode_expansion_modes"] == 40
    assert group["mode_expansion_difference"][:].max() < 1e-10
    np.testing.assert_allclose(group["mode_expansion"][:], group["probability"][:], atol=1e-11)


def test_new_shipped_configs_run_and_verify(tmp_path, quiet):
    from .conftest import CONFIGS

    for name in ("drone-corridor-absorption.toml", "tracer-canal-evolution.toml"):
        outcome = run_pipeline(load_config(CONFIGS / name), store_path=str(tmp_path / "s.zarr"))
        assert outcome.verified is True, name


def test_currents_under_each_closed_class(tmp_path, quiet):
    # Two-state class {3, 4}: every two-state chain is reversible (Kelly 1979, 1.5), so no
    # current; the cycle 0 -> 1 -> 2 -> 0 has one-way hops 1 -> 2 and 2 -> 0, so its entropy
    # production is infinite (Schnakenberg 1976: ln of a zero reverse flux).
    from pipeline.stages import analyze as analyze_stage

    ctx = _solve_context(tmp_path, "per-class")
    output = solve_stage.run(ctx)
    ctx.store.open_run(ctx.run, {})
    ctx.store.write_stage(ctx.run, "solve", output.groups, "test-print")
    attrs = analyze_stage.run(ctx).groups["analysis"].attrs
    by_states = {}
    labels = np.asarray(output.groups["stationary"].arrays["class_labels"].data)
    laws = output.groups["stationary"].arrays["class_distributions"].data
    for entry, row in zip(attrs["currents"]["per_class"], laws, strict=True):
        by_states[tuple(np.flatnonzero(row > 0))] = entry
    assert [e["class"] for e in attrs["currents"]["per_class"]] == labels.tolist()
    assert by_states[(3, 4)]["detailed_balance"] is True
    assert by_states[(3, 4)]["entropy_production"] == pytest.approx(0.0, abs=1e-15)
    assert by_states[(0, 1, 2)]["entropy_production"] == math.inf
    assert by_states[(0, 1, 2)]["detailed_balance"] is False
