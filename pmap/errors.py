"""Exceptions and warnings raised by pmap.

Every user-facing failure is a subclass of :class:`PmapError`, so the CLI can
print one clear line and exit non-zero without a traceback.
"""

from __future__ import annotations

__all__ = [
    "PmapError",
    "CubeValidationError",
    "FormatError",
    "InputFileError",
    "StepError",
    "OutputExistsError",
    "PmapWarning",
    "PmapNotice",
]


class PmapError(Exception):
    """Base class of every error pmap raises on bad input."""


class CubeValidationError(PmapError, ValueError):
    """The object cannot be turned into a valid cube; the message names the problem."""


class FormatError(PmapError, ValueError):
    """Unknown, unsupported or malformed file format."""


class InputFileError(PmapError, OSError):
    """An input file is missing, unreadable or truncated."""


class StepError(PmapError, ValueError):
    """A processing step got parameters or data it cannot work with."""


class OutputExistsError(PmapError, FileExistsError):
    """The output path exists and overwriting was not asked for."""


class PmapWarning(UserWarning):
    """Something questionable happened that the user should know about."""


class PmapNotice(UserWarning):
    """Informational notice (e.g. a default was assumed). Not an error."""
