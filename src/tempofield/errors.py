"""The exception family of tempofield.

Every error the package raises on purpose is a :class:`TempofieldError`. The
subclasses also derive from the builtin they mean, so callers may catch either
``tempofield.errors.InputError`` or plain ``ValueError``. Messages say what is
wrong, where, and how to fix it, in words a user can act on.
"""

from __future__ import annotations


class TempofieldError(Exception):
    """Base class of all errors raised on purpose by tempofield."""


class InputError(TempofieldError, ValueError):
    """A value given by the user (argument, option, file content) is not usable."""


class MissingMetadataError(InputError):
    """A needed piece of metadata (frame interval, pixel size) is absent."""


class StackNotFoundError(TempofieldError, FileNotFoundError):
    """The input path does not exist."""


class ResultExistsError(TempofieldError, FileExistsError):
    """An output folder already holds a result and overwriting was not asked for."""


class CancelledError(TempofieldError):
    """The analysis was cancelled by the caller before it finished."""
