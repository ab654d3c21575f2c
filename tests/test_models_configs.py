"""The shipped model-library configs run end to end, verify, and match outside references."""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
import scipy.io
from scipy import stats

from pipeline.analytic.exclusion import open_tasep_current
from pipeline.config import load_config
from pipeline.stages.runner import run_pipeline
from pipeline.store import Store

CONFIGS = Path(__file__).parents[1] / "configs"
MODEL_CONFIGS = ["sorter-loop.toml", "tunnel-lane.toml", "bike-docks.toml",
                 "espresso-queue.toml", "gallery-walk.toml", "pump-maintenance.toml"]


def run_config(tmp_path, name):
    config = load_config(CONFIGS / name)
    outcome = run_pipeline(config, store_path=str(tmp_path / "store.zarr"))
    store = Store(tmp_path / "store.zarr")
    model = tomllib.loads((CONFIGS / name).read_text(encoding="utf-8"))["model"]
    return outcome, store, config.run.name, model


@pytest.mark.parametrize("name", MODEL_CONFIGS)
def test_model_config_runs_and_verifies(tmp_path, quiet, name):
    outcome, store, run, model = run_config(tmp_path, name)
    assert outcome.verified, store.group(run, "verify").attrs["checks"]
    values = store.group(run, "spectrum")["eigenvalues"][:]
    stationary = store.group(run, "stationary")
    p = stationary["distribution"][:]
    if name == "sorter-loop.toml":
        # Uniform law on C(L, N) and current (p - q) N (L - N) / (L (L - 1)) (Liggett 1985).
        L, N = model["sites"], model["particles"]
        np.testing.assert_allclose(p, 1 / math.comb(L, N), atol=1e-13)
        np.testing.assert_allclose(stationary["current"][:], (model["right"] - model["left"])
                                   * N * (L - N) / (L * (L - 1)), rtol=1e-12)
    elif name == "tunnel-lane.toml":
        # Derrida, Evans, Hakim and Pasquier 1993, eq. (39) (from memory).
        np.testing.assert_allclose(stationary["current"][:], open_tasep_current(
            model["sites"], model["right"], model["alpha"], model["beta"]), rtol=1e-10)
    elif name == "bike-docks.toml":
        # Jahnke and Huisinga 2007: eigenvalues -m (k1 + k2), binomial law.
        k1, k2 = 0.3, model["parameters"]["to_river"]
        n = model["parameters"]["fleet"]
        np.testing.assert_allclose(values.real, -np.arange(values.size) * (k1 + k2), atol=1e-9)
        np.testing.assert_allclose(p, stats.binom.pmf(np.arange(n + 1), n, k2 / (k1 + k2)),
                                   atol=1e-12)
    elif name == "espresso-queue.toml":
        # Poisson(b / d) law of a birth-death chain with linear death (common practice),
        # truncated: the stored outflow is b P(X = bound).
        birth, death = 2.5, 0.4
        poisson = stats.poisson.pmf(np.arange(p.size), birth / death)
        np.testing.assert_allclose(p, poisson / poisson.sum(), atol=1e-12)
        assert stationary["outflow"][0] == pytest.approx(birth * p[-1], rel=1e-10)
    elif name == "pump-maintenance.toml":
        # Against LAPACK on the file's matrix (numpy.linalg.eigvals).
        W = scipy.io.mmread(CONFIGS / model["file"]).toarray()
        dense = np.sort(np.linalg.eigvals(W).real)[::-1][: values.size]
        np.testing.assert_allclose(values.real, dense, atol=1e-12)
    elif name == "gallery-walk.toml":
        assert stationary["distribution"].shape == (6,)
        assert store.group(run, "spectrum").attrs["certified"] is True
