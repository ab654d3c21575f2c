"""Helpers for the model-library tests: backends to run on, solving a model, dense W, and
the one-line error check of ``gapline check`` run in process."""

from __future__ import annotations

import importlib

import numpy as np
import pytest

from pipeline.backends import BACKENDS
from pipeline.cli import main

from .conftest import dense_generator


def available_backends() -> list:
    """Names of the registered backends usable here (``unavailable_reason()`` is None), as
    pytest params; unusable ones are skipped with their reason."""
    params = []
    for name, (module_name, class_name) in BACKENDS.items():
        try:
            backend_class = getattr(importlib.import_module(module_name), class_name)
            reason = backend_class.unavailable_reason()
        except ImportError as exc:
            reason = str(exc)
        marks = [pytest.mark.skip(reason=reason)] if reason else []
        params.append(pytest.param(name, marks=marks, id=name))
    return params


def backend_named(name: str):
    module_name, class_name = BACKENDS[name]
    return getattr(importlib.import_module(module_name), class_name)()


def solve(backend_name: str, model, count: int, method: str = "auto", vectors: bool = False,
          stationary: bool = True, dense_limit: int = 1024):
    """(modes, stationary or None, operator) of ``model`` on a backend."""
    backend = backend_named(backend_name)
    operator = backend.assemble(model)
    modes = backend.slowest_modes(operator, count, method=method, vectors=vectors,
                                  dense_limit=dense_limit)
    result = None
    if stationary and operator.check.conserving:
        result = backend.stationary(operator, dense_limit=dense_limit)
    return modes, result, operator


def dense_W(model, cuts=None) -> np.ndarray:
    return dense_generator(model, cuts)


def rightmost(W: np.ndarray, count: int) -> np.ndarray:
    """``count`` eigenvalues of largest real part by numpy.linalg.eigvals (dense LAPACK)."""
    values = np.linalg.eigvals(W)
    return values[np.argsort(-values.real, kind="stable")][:count]


def check_error(capsys, path, *fragments: str) -> str:
    """``gapline check PATH`` exits 2 with one stderr line holding every fragment."""
    code = main(["check", str(path)])
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert code == 2, captured.err
    assert len(lines) == 1 and lines[0].startswith("gapline: error: "), captured.err
    for fragment in fragments:
        assert fragment in lines[0], lines[0]
    return lines[0]
