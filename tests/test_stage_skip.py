"""Up-to-date stages are skipped; a changed field reruns its stage and the later ones only;
a stored generator lets solve rerun without assemble (and without the model's row blocks)."""

from __future__ import annotations

import numpy as np
import pytest

import pipeline.models.lattice
from pipeline.config import load_config
from pipeline.stages.runner import run_is_current, run_pipeline, stage_fingerprints
from pipeline.store import Store

from .conftest import norm1, reference_generator, ring_config, slowest_first, tolerance_for

RUN = "skip-ring"
SIZE = 30


def _run(directory, store_path, overrides=(), extra="", **options):
    config = load_config(ring_config(directory, RUN, SIZE, 5, extra), list(overrides))
    return run_pipeline(config, store_path=str(store_path), **options)


def _finished(store_path):
    store = Store(store_path)
    return {stage: record["finished"] + record["fingerprint"]
            for stage, record in store.run_attrs(RUN)["stages"].items()}


def test_second_run_skips_every_stage(tmp_path, quiet, capsys, monkeypatch):
    store_path = tmp_path / "s.zarr"
    first = _run(tmp_path, store_path)
    assert first.stages_run == ["assemble", "solve", "analyze", "evolve", "verify", "report"]
    monkeypatch.setenv("GAPLINE_PROGRESS", "plain")
    second = _run(tmp_path, store_path)
    assert second.stages_run == []
    assert second.verified is True  # read back from the stored verify result
    log = capsys.readouterr().err
    for stage in ("assemble", "solve", "verify", "report"):
        assert f"stage {stage}: up to date" in log


def test_changed_solver_tolerance_reruns_solve_and_later_not_assemble(tmp_path, quiet):
    store_path = tmp_path / "s.zarr"
    _run(tmp_path, store_path)
    before = Store(store_path).stage_record(RUN, "assemble")
    outcome = _run(tmp_path, store_path, ["solve.tolerance=1e-10"])
    assert outcome.stages_run == ["solve", "analyze", "evolve", "verify", "report"]
    assert Store(store_path).stage_record(RUN, "assemble") == before
    # The rerun results are current and right: dense numpy reference of the same ring.
    config = load_config(ring_config(tmp_path, RUN, SIZE, 5), ["solve.tolerance=1e-10"])
    assert run_is_current(Store(store_path), RUN, stage_fingerprints(config))
    W = reference_generator((SIZE,), ("periodic",), (1.3,), (0.4,))
    reference = slowest_first(np.linalg.eigvals(W), tolerance_for(W))[:5]
    values = Store(store_path).group(RUN, "spectrum")["eigenvalues"][:]
    np.testing.assert_allclose(np.sort_complex(values), np.sort_complex(reference),
                               atol=1e-9 * norm1(W))


def test_changed_verify_tolerance_reruns_verify_and_report_only(tmp_path, quiet):
    store_path = tmp_path / "s.zarr"
    _run(tmp_path, store_path)
    outcome = _run(tmp_path, store_path, ["verify.tolerance=1e-8"])
    assert outcome.stages_run == ["verify", "report"]


def test_changed_model_reruns_everything(tmp_path, quiet):
    store_path = tmp_path / "s.zarr"
    _run(tmp_path, store_path)
    outcome = _run(tmp_path, store_path, ["model.forward[0]=1.1"])
    assert outcome.stages_run == ["assemble", "solve", "analyze", "evolve", "verify", "report"]


def test_interrupted_stage_is_not_up_to_date(tmp_path, quiet, monkeypatch):
    store_path = tmp_path / "s.zarr"
    _run(tmp_path, store_path)
    # A new solve that dies after writing its groups but before its record: the stored
    # record still has the old fingerprint, so the next run redoes solve.
    import pipeline.store as store_module

    original = store_module.Store._write_run_attrs

    def die_on_stage_record(self, run, attrs):
        if "stages" in attrs and attrs["stages"]["solve"]["fingerprint"] != first_solve:
            raise KeyboardInterrupt
        return original(self, run, attrs)

    first_solve = Store(store_path).stage_record(RUN, "solve")["fingerprint"]
    monkeypatch.setattr(store_module.Store, "_write_run_attrs", die_on_stage_record)
    with pytest.raises(KeyboardInterrupt):
        _run(tmp_path, store_path, ["solve.modes=6"])
    monkeypatch.setattr(store_module.Store, "_write_run_attrs", original)
    assert Store(store_path).group_status(RUN, "spectrum") == "incomplete"
    outcome = _run(tmp_path, store_path, ["solve.modes=6"])
    assert outcome.stages_run == ["solve", "analyze", "evolve", "verify", "report"]


def test_forced_rerun_with_only(tmp_path, quiet):
    store_path = tmp_path / "s.zarr"
    _run(tmp_path, store_path)
    assert _run(tmp_path, store_path, only="verify").stages_run == ["verify"]
    assert _run(tmp_path, store_path, start="solve").stages_run == [
        "solve", "analyze", "evolve", "verify", "report"]


def test_stored_matrix_solve_reruns_without_the_model(tmp_path, quiet, monkeypatch):
    store_path = tmp_path / "s.zarr"
    extra = "\n[store]\nmatrix = true\n"
    _run(tmp_path, store_path, extra=extra)
    store = Store(store_path)
    matrix = store.group(RUN, "matrix")
    W = reference_generator((SIZE,), ("periodic",), (1.3,), (0.4,))
    import scipy.sparse as sp

    stored = sp.csr_matrix((matrix["data"][:], matrix["indices"][:], matrix["indptr"][:]),
                           shape=(SIZE, SIZE)).toarray()
    np.testing.assert_array_equal(stored, W)  # the hand-built generator, entry by entry
    assert matrix.attrs["fingerprint"] == store.stage_record(RUN, "assemble")["fingerprint"]

    def no_rows(self, start, stop):
        raise AssertionError("the model's row blocks were used")

    monkeypatch.setattr(pipeline.models.lattice.LatticeWalk, "row_block", no_rows)
    outcome = _run(tmp_path, store_path, ["solve.modes=8"], extra=extra)
    assert outcome.stages_run == ["solve", "analyze", "evolve", "verify", "report"]
    assert outcome.verified is True
    reference = slowest_first(np.linalg.eigvals(W), tolerance_for(W))[:8]
    values = Store(store_path).group(RUN, "spectrum")["eigenvalues"][:]
    np.testing.assert_allclose(np.sort_complex(values), np.sort_complex(reference),
                               atol=1e-9 * norm1(W))


def test_stored_matrix_rows_match_the_model_in_any_block(tmp_path, quiet):
    from pipeline.models import build_model
    from pipeline.models.stored import StoredGenerator

    from .conftest import dense_generator

    store_path = tmp_path / "s.zarr"
    _run(tmp_path, store_path, extra="\n[store]\nmatrix = true\n")
    config = load_config(ring_config(tmp_path, RUN, SIZE, 5))
    model = build_model(config.model)
    group = Store(store_path).group(RUN, "matrix")
    stored = StoredGenerator(group["indptr"], group["indices"], group["data"], model, "x")
    np.testing.assert_array_equal(dense_generator(stored, cuts=[7, 8, 19]),
                                  dense_generator(model))


def test_turning_matrix_on_reruns_assemble(tmp_path, quiet):
    store_path = tmp_path / "s.zarr"
    _run(tmp_path, store_path)
    outcome = _run(tmp_path, store_path, ["store.matrix=true"])
    assert outcome.stages_run[0] == "assemble"
    assert Store(store_path).group(RUN, "matrix", required=False) is not None
