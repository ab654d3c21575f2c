"""User-facing error types.

Every error a user can cause by what they write or point at derives from
:class:`GaplineError`; the command line prints ``gapline: error: <message>`` on one line
and exits with status 2.  Anything else is a bug and keeps its traceback.
"""


class GaplineError(Exception):
    """Base class of errors that are the user's to fix; the message is one line."""


class ConfigError(GaplineError):
    """A config field is missing, unknown or out of range; the message names the field."""


class ModelError(GaplineError):
    """A model cannot be built from its (valid-looking) parameters."""


class BackendError(GaplineError):
    """A backend is unavailable or cannot run in this environment."""


class StoreError(GaplineError):
    """The store is missing, not a gapline store, or lacks a needed stage."""


class SolverError(GaplineError):
    """A solver failed in a way the user can act on (memory, convergence)."""
