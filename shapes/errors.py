"""One family of exceptions for user mistakes: a bad file, a bad option, too few points.

Every message says what was expected and what was found, so the command line can print it as a
single ``error: ...`` line. Internal invariants use ``assert``; only user-facing problems raise these.
"""

__all__ = ["ShapesError", "InputError", "MeshError", "ConfigError", "DataError", "TrainingError", "Interrupted"]


class ShapesError(Exception):
    """Base of every error caused by the user's input rather than by a bug."""


class InputError(ShapesError, ValueError):
    """An argument has the wrong shape, type or value (e.g. points of shape (N, 2))."""


class MeshError(ShapesError):
    """A mesh or scan file cannot be used: missing, empty, truncated, NaN vertices, zero area."""


class ConfigError(ShapesError, ValueError):
    """A configuration value or option is unknown or out of range."""


class DataError(ShapesError):
    """A dataset, catalog or checkpoint folder is missing, inconsistent or too small."""


class TrainingError(ShapesError):
    """Training cannot go on: the loss or the weights became non-finite (too high a learning rate)."""


class Interrupted(KeyboardInterrupt):
    """A job stopped by Ctrl-C or SIGTERM; the message says what was kept. Not a ShapesError: the
    user asked for it, and the command line exits with the signal's status, not 2."""

    def __init__(self, message: str = "interrupted", status: int = 130):
        super().__init__(message)
        self.status = status
