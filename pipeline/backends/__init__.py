"""Backend registry: name (the ``solve.backend`` config field) → implementation.

Built-ins are imported lazily, so a backend whose dependency is missing is reported with a
clear note instead of breaking the import of the package. ``auto`` picks the first usable
entry of :data:`AUTO_ORDER`.
"""

from __future__ import annotations

from importlib import import_module

from pipeline.backends.base import Backend, Modes, Operator, Stationary
from pipeline.errors import BackendError

__all__ = ["AUTO_ORDER", "BACKENDS", "Backend", "Modes", "Operator", "Stationary",
           "select_backend"]

#: name -> (module, class)
BACKENDS: dict[str, tuple[str, str]] = {
    "scipy": ("pipeline.backends.scipy_", "ScipyBackend"),
    "slepc": ("pipeline.backends.slepc_", "SlepcBackend"),
}
#: names reserved for backends not built in this version
PLANNED: dict[str, str] = {}
#: 'auto': scipy on one process; under mpiexec/srun scipy refuses and slepc is taken
AUTO_ORDER = ("scipy", "slepc")


def select_backend(name: str) -> Backend:
    """Instantiate backend ``name`` (or the first usable one for ``auto``)."""
    if name == "auto":
        reasons = []
        for candidate in AUTO_ORDER:
            backend_class = _load(candidate)
            reason = backend_class.unavailable_reason()
            if reason is None:
                return backend_class()
            reasons.append(reason)
        raise BackendError("solve.backend: no usable backend for 'auto': " + "; ".join(reasons))
    if name in PLANNED:
        raise BackendError(f"solve.backend: {name!r} is not available: {PLANNED[name]}; "
                           "use 'scipy' or 'auto'")
    if name not in BACKENDS:
        raise BackendError(f"solve.backend: unknown backend {name!r}; expected one of "
                           + ", ".join(repr(b) for b in (*BACKENDS, "auto")))
    backend_class = _load(name)
    reason = backend_class.unavailable_reason()
    if reason:
        raise BackendError(reason)
    return backend_class()


def _load(name: str) -> type[Backend]:
    module_name, class_name = BACKENDS[name]
    try:
        module = import_module(module_name)
    except ImportError as exc:
        raise BackendError(f"solve.backend: {name!r} needs a package that is missing ({exc}); "
                           "run 'make venv'") from None
    return getattr(module, class_name)
