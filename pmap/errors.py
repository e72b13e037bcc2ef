"""Exceptions and warnings raised by pmap.

Every error pmap raises on purpose derives from :class:`PmapError` and from the
built-in exception it resembles, so callers may catch either.  Messages name the
file, row, column or key at fault and say what to do about it.
"""

from __future__ import annotations

__all__ = [
    "PmapError",
    "InputError",
    "ConfigError",
    "InsufficientDataError",
    "ModelFitError",
    "OutputExistsError",
    "OutputError",
    "PmapWarning",
    "exit_code_of",
]


class PmapError(Exception):
    """Root of every error pmap raises on purpose."""


class InputError(PmapError, ValueError):
    """A samples or boundary file is missing, unreadable or holds bad values."""


class ConfigError(PmapError, ValueError):
    """A configuration file or option is invalid."""


class InsufficientDataError(InputError):
    """Too few usable samples for an honest estimate."""


class ModelFitError(PmapError, RuntimeError):
    """A variogram or kriging system could not be fitted or solved."""


class OutputError(PmapError, OSError):
    """The outputs cannot be written where they were asked for (e.g. no space left)."""


class OutputExistsError(OutputError, FileExistsError):
    """The output directory may not be written: it exists and may not be replaced, or
    another run holds it."""


class PmapWarning(UserWarning):
    """Something pmap did on the user's behalf that they should know about."""


def exit_code_of(exc: BaseException) -> int:
    """The CLI's exit code for an error: 2 config, 3 input data, 4 output, 5 model fit, 1 other."""
    for cls, code in ((ConfigError, 2), (InputError, 3), (OutputError, 4), (ModelFitError, 5)):
        if isinstance(exc, cls):
            return code
    return 1
