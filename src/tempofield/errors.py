"""The exception family of rhythmap.

Every error the package raises on purpose is a :class:`RhythmapError`. The
subclasses also derive from the builtin they mean, so callers may catch either
``rhythmap.errors.InputError`` or plain ``ValueError``. Messages say what is
wrong, where, and how to fix it, in words a user can act on.
"""

from __future__ import annotations


class RhythmapError(Exception):
    """Base class of all errors raised on purpose by rhythmap."""


class InputError(RhythmapError, ValueError):
    """A value given by the user (argument, option, file content) is not usable."""


class MissingMetadataError(InputError):
    """A needed piece of metadata (frame interval, pixel size) is absent."""


class StackNotFoundError(RhythmapError, FileNotFoundError):
    """The input path does not exist."""


class ResultExistsError(RhythmapError, FileExistsError):
    """An output folder already holds a result and overwriting was not asked for."""


class CancelledError(RhythmapError):
    """The analysis was cancelled by the caller before it finished."""
