"""The one exception tree of geosr.

Every error that geosr raises on purpose derives from :class:`GeosrError`.
Messages read "X must be Y, got Z" so that the command line can print them
as a single line. ``exit_code`` is the process exit status the command line
uses: 2 for bad usage (a parameter or option), 1 for bad data or a failed run.
"""

__all__ = [
    "GeosrError",
    "ParameterError",
    "InputError",
    "ModelError",
    "NotFittedError",
    "DestinationError",
    "RunError",
    "GeoreferencingWarning",
]


class GeosrError(Exception):
    """Base class of every error geosr raises on purpose."""

    exit_code = 1


class ParameterError(GeosrError, ValueError):
    """A parameter or option has a value that is not allowed (usage error)."""

    exit_code = 2


class InputError(GeosrError, ValueError):
    """An input raster or image cannot be used (missing, unreadable, degenerate)."""


class ModelError(GeosrError, ValueError):
    """A model file is missing, damaged, tampered with, or does not fit the data."""


class NotFittedError(GeosrError, AttributeError):
    """A model was used before ``fit`` or ``load``."""


class DestinationError(GeosrError):
    """The output path cannot be written (exists, equals the source, no space)."""


class RunError(GeosrError, RuntimeError):
    """A run failed after it started (a task failed for good, an interruption)."""


class GeoreferencingWarning(UserWarning):
    """The source lacks part of its georeferencing (no CRS, RPCs not carried)."""
