"""The zarr store: layout, xarray access, atomic stage commits under interruption."""

from __future__ import annotations

import os

import numpy as np
import pytest
import xarray as xr
import zarr

import pipeline.stages.solve
import pipeline.store
from pipeline.config import load_config
from pipeline.errors import StoreError
from pipeline.stages.runner import run_pipeline
from pipeline.store import Store, open_results

from .conftest import norm1, reference_generator, ring_config, slowest_first, tolerance_for

RUN = "ring"
SIZE = 40
CHECK_KEYS = {"name", "source", "value", "reference", "tolerance", "passed"}


@pytest.fixture
def store_path(tmp_path):
    return tmp_path / "store.zarr"


def _run(tmp_path, store_path, modes=5, extra="", **options):
    config = load_config(ring_config(tmp_path, RUN, SIZE, modes, extra))
    return run_pipeline(config, store_path=str(store_path), **options)


def _ring_reference():
    W = reference_generator((SIZE,), ("periodic",), (1.3,), (0.4,))
    return W, slowest_first(np.linalg.eigvals(W), tolerance_for(W))


def test_layout(tmp_path, store_path, quiet):
    outcome = _run(tmp_path, store_path)
    assert outcome.verified is True
    root = zarr.open_group(str(store_path), mode="r")
    assert "gapline_store" in root.attrs
    run = root[RUN]
    spectrum = run["spectrum"]
    eigenvalues = spectrum["eigenvalues"]
    assert eigenvalues.dtype == np.complex128
    assert eigenvalues.shape == (5,)
    assert list(eigenvalues.metadata.dimension_names) == ["mode"]
    residuals = spectrum["residuals"]
    assert residuals.dtype == np.float64
    assert list(residuals.metadata.dimension_names) == ["mode"]
    distribution = run["stationary"]["distribution"]
    assert distribution.dtype == np.float64
    assert distribution.shape == (SIZE,)
    assert list(distribution.metadata.dimension_names) == ["state"]
    # Stored values against the dense reference: the 5 slowest modes of the ring, uniform law.
    W, values = _ring_reference()
    np.testing.assert_allclose(np.sort_complex(eigenvalues[:]), np.sort_complex(values[:5]),
                               atol=1e-9 * norm1(W))
    np.testing.assert_allclose(distribution[:], 1.0 / SIZE, rtol=1e-12)
    verify = dict(run["verify"].attrs)
    assert verify["passed"] is True
    assert verify["checks"]
    for check in verify["checks"]:
        assert set(check) == CHECK_KEYS
        assert check["passed"] is True
        assert isinstance(check["source"], str) and check["source"]
    attrs = dict(run.attrs)
    for key in ("config", "versions", "timings", "stages"):
        assert key in attrs
    assert attrs["config"]["solve"]["modes"] == 5
    assert attrs["config"]["model"]["size"] == [SIZE]
    assert {"numpy", "scipy", "zarr", "gapline"} <= set(attrs["versions"])
    assert set(attrs["timings"]) == {"assemble", "solve", "analyze", "evolve", "verify", "report"}
    assert set(attrs["stages"]) == {"assemble", "solve", "analyze", "evolve", "verify", "report"}
    for stage, record in attrs["stages"].items():
        assert record["fingerprint"], stage
    for group in ("assemble", "spectrum", "stationary", "verify", "report"):
        assert run[group].attrs["complete"] is True
        assert Store(store_path).group_status(RUN, group) == "complete"
    assert Store(store_path).runs() == [RUN]


def test_xarray_and_open_results(tmp_path, store_path, quiet):
    _run(tmp_path, store_path)
    spectrum = xr.open_zarr(str(store_path), group=f"{RUN}/spectrum", consolidated=False)
    assert spectrum["eigenvalues"].dims == ("mode",)
    assert spectrum["residuals"].dims == ("mode",)
    assert spectrum["eigenvalues"].dtype == np.complex128
    stationary = xr.open_zarr(str(store_path), group=f"{RUN}/stationary", consolidated=False)
    assert stationary["distribution"].dims == ("state",)
    results = open_results(store_path, RUN)
    assert isinstance(results, xr.Dataset)
    assert results["eigenvalues"].dims == ("mode",)
    assert results["distribution"].dims == ("state",)
    assert results.sizes["mode"] == 5 and results.sizes["state"] == SIZE
    np.testing.assert_array_equal(results["eigenvalues"].values, spectrum["eigenvalues"].values)
    assert float(results["distribution"].sum()) == pytest.approx(1.0, abs=1e-13)


def test_vectors_stored(tmp_path, store_path, quiet):
    _run(tmp_path, store_path, modes=5, extra="vectors = true\n")
    results = open_results(store_path, RUN)
    vectors = results["vectors"]
    assert vectors.dims == ("state", "mode")
    assert vectors.shape == (SIZE, 5)
    assert vectors.dtype == np.complex128
    # W v = lambda v with the reference W.
    W, _ = _ring_reference()
    v = vectors.values
    lam = results["eigenvalues"].values
    assert np.linalg.norm(W @ v - v * lam, axis=0).max() <= 1e-10 * norm1(W)
    np.testing.assert_allclose(np.linalg.norm(v, axis=0), 1.0, rtol=1e-12)


# ---------------------------------------------------------------------------------------
# Interruption


def _eigenvalues(store_path):
    return Store(store_path).group(RUN, "spectrum")["eigenvalues"][:]


def _no_staging_run(store_path):
    store = Store(store_path)
    assert store.runs() == [RUN]
    assert all(not name.startswith("_") for name in store.runs())


def test_interrupted_array_write_keeps_the_old_spectrum(tmp_path, store_path, quiet,
                                                        monkeypatch):
    _run(tmp_path, store_path, modes=5)
    old = _eigenvalues(store_path)
    calls = {"n": 0}
    original = pipeline.store._fill_array

    def failing(array, spec):
        calls["n"] += 1
        if calls["n"] == 2:
            raise RuntimeError("disk full (simulated)")
        return original(array, spec)

    monkeypatch.setattr(pipeline.store, "_fill_array", failing)
    with pytest.raises(RuntimeError, match="simulated"):
        _run(tmp_path, store_path, modes=9, start="solve")
    monkeypatch.setattr(pipeline.store, "_fill_array", original)
    leftovers = list((store_path / pipeline.store.STAGING).iterdir())
    assert any(path.name.startswith(RUN) for path in leftovers), "expected a staging leftover"
    store = Store(store_path)
    # Never replaced: still readable as complete, and still the old one.
    assert store.group_status(RUN, "spectrum") == "complete"
    assert store.group_status(RUN, "stationary") == "complete"
    np.testing.assert_array_equal(_eigenvalues(store_path), old)
    _no_staging_run(store_path)
    np.testing.assert_array_equal(open_results(store_path, RUN)["eigenvalues"].values, old)
    # A clean rerun commits the new spectrum.
    _run(tmp_path, store_path, modes=9, start="solve")
    assert _eigenvalues(store_path).shape == (9,)
    assert Store(store_path).group_status(RUN, "spectrum") == "complete"


def test_interrupted_rerun_keeps_run_attrs_of_the_committed_results(tmp_path, store_path,
                                                                    quiet, monkeypatch):
    # The run's attrs (config, shown by open_results) must describe the stored results, not
    # a rerun that never committed.
    _run(tmp_path, store_path, modes=5)
    monkeypatch.setattr(pipeline.stages.solve, "run", _raise)
    with pytest.raises(RuntimeError, match="simulated"):
        _run(tmp_path, store_path, modes=9, start="solve")
    results = open_results(store_path, RUN)
    assert results.sizes["mode"] == 5
    assert results.attrs["config"]["solve"]["modes"] == 5


def _raise(ctx):
    raise RuntimeError("killed (simulated)")


def test_stage_failure_leaves_the_store_untouched(tmp_path, store_path, quiet, monkeypatch):
    _run(tmp_path, store_path, modes=5)
    old = _eigenvalues(store_path)
    monkeypatch.setattr(pipeline.stages.solve, "run", _raise)
    with pytest.raises(RuntimeError, match="simulated"):
        _run(tmp_path, store_path, modes=9, start="solve")
    store = Store(store_path)
    for group in ("assemble", "spectrum", "stationary", "verify", "report"):
        assert store.group_status(RUN, group) == "complete", group
    np.testing.assert_array_equal(_eigenvalues(store_path), old)
    _no_staging_run(store_path)


class _RenameFailsFor:
    """Stand-in for the os module of pipeline.store whose rename fails when a given staged
    group is moved into place."""

    def __init__(self, group):
        self.group = group

    def rename(self, source, target):
        if os.path.basename(str(source)) == self.group and pipeline.store.STAGING in str(source):
            raise OSError("power cut (simulated)")
        return os.rename(source, target)

    def __getattr__(self, name):
        return getattr(os, name)


def test_interrupted_commit_is_never_complete(tmp_path, store_path, quiet, monkeypatch):
    # The spectrum has been moved into place, the stationary group not yet, the stage record
    # not updated: the new spectrum must not count as a result.
    _run(tmp_path, store_path, modes=5)
    monkeypatch.setattr(pipeline.store, "os", _RenameFailsFor("stationary"))
    with pytest.raises(OSError, match="simulated"):
        _run(tmp_path, store_path, modes=9, start="solve")
    monkeypatch.undo()
    store = Store(store_path)
    assert store.group_status(RUN, "spectrum") != "complete"
    assert store.group(RUN, "spectrum", required=False) is None
    with pytest.raises(StoreError):
        open_results(store_path, RUN)
    _no_staging_run(store_path)
    # Rerun: whole again.
    _run(tmp_path, store_path, modes=9, start="solve")
    store = Store(store_path)
    assert store.group_status(RUN, "spectrum") == "complete"
    assert store.group_status(RUN, "stationary") == "complete"
    assert _eigenvalues(store_path).shape == (9,)


def test_from_verify_after_changing_solve_settings_errors(tmp_path, store_path, quiet):
    _run(tmp_path, store_path, modes=5)
    before = dict(Store(store_path).group(RUN, "verify").attrs)
    with pytest.raises(StoreError, match="different config"):
        _run(tmp_path, store_path, modes=9, start="verify")
    with pytest.raises(StoreError, match="different config"):
        _run(tmp_path, store_path, modes=9, only="report", extra="")
    # Nothing was re-verified.
    assert dict(Store(store_path).group(RUN, "verify").attrs) == before
    # Same settings: fine.
    outcome = _run(tmp_path, store_path, modes=5, start="verify")
    assert outcome.verified is True
    assert outcome.stages_run == ["verify", "report"]


def test_from_solve_reuses_assembly(tmp_path, store_path, quiet):
    _run(tmp_path, store_path, modes=5)
    assemble_record = Store(store_path).stage_record(RUN, "assemble")
    outcome = _run(tmp_path, store_path, modes=9, start="solve")
    assert outcome.stages_run == ["solve", "analyze", "evolve", "verify", "report"]
    assert outcome.verified is True
    assert Store(store_path).stage_record(RUN, "assemble") == assemble_record
    W, values = _ring_reference()
    np.testing.assert_allclose(np.sort_complex(_eigenvalues(store_path)),
                               np.sort_complex(values[:9]), atol=1e-9 * norm1(W))


def test_not_a_store(tmp_path):
    with pytest.raises(StoreError, match="not found"):
        Store(tmp_path / "nothing.zarr")
    (tmp_path / "junk").mkdir()
    (tmp_path / "junk" / "file.txt").write_text("x")
    with pytest.raises(StoreError, match="not a zarr store"):
        Store(tmp_path / "junk", create=True)


@pytest.mark.parametrize("ordered", [False, True])
def test_pieces_along_the_second_axis_land_at_their_offset(tmp_path, ordered):
    # [time, state] written in two state pieces as two ranks would (axis 1, offset 0 and 8,
    # chunks of 8 states; the ordered path cuts a piece that starts mid-chunk): the result
    # is the whole array, element by element.
    whole = np.arange(3 * 13, dtype=np.float64).reshape(3, 13)
    group = zarr.open_group(str(tmp_path / "a.zarr"), mode="w", zarr_format=3)
    first = pipeline.store.ArraySpec(whole[:, :8], ("time", "state"), shape=(3, 13),
                                     offset=0, chunk_rows=8, axis=1, ordered=ordered)
    array = pipeline.store._create_array(group, "p", first)
    assert array.chunks == (3, 8)
    cut = 5 if ordered else 8
    for low, high in ((0, cut), (cut, 13)):
        piece = pipeline.store.ArraySpec(whole[:, low:high], ("time", "state"),
                                         shape=(3, 13), offset=low, chunk_rows=8, axis=1,
                                         ordered=ordered)
        pipeline.store._fill_array(array, piece)
    np.testing.assert_array_equal(array[:], whole)
