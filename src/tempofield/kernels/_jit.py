"""How the kernels' compiled (numba) loops are compiled: the shared settings.

Every loop is ``nopython`` (no interpreter objects), ``nogil`` (the engine's
tile threads run them in parallel) and ``cache=True`` (machine code is cached
beside its module: the first call in a fresh install compiles, later runs
load it in milliseconds). Each kernel module keeps its loops in a private
module beside it (``_spectral_loops`` beside ``spectral``, and so on).

A few loops that read and write a dozen rows at once (the FFT butterflies,
the windowed power) vectorise only when every array argument is declared not
to overlap any other (LLVM ``noalias``): LLVM would otherwise need more
run-time overlap checks than it allows, and the loop stays scalar. numba has
no public switch for that; a compiler class that sets its ``noalias`` flag,
passed as ``jit(pipeline_class=...)``, is the hook it documents, but the base
class lives in ``numba.core.compiler``, which numba does not promise to keep
stable. So: the class is used only with the numba releases it is tested with
(:data:`NOALIAS_TESTED_NUMBA`, the range ``pyproject.toml`` pins), and
:data:`JIT_NOALIAS` falls back to the plain settings (same numbers, about
twice as slow an FFT) when the class is unavailable, numba is outside that
range, or ``TEMPOFIELD_PLAIN_JIT=1`` is set (the test of the fallback).
:data:`NOALIAS_STATUS` says which applies.
"""

from __future__ import annotations

import os

import numba

#: Settings of every compiled loop.
JIT = {"nopython": True, "nogil": True, "cache": True}

#: Settings of small helpers that are inlined into the loops calling them.
JIT_INLINE = {**JIT, "inline": "always"}

#: numba releases (first, last) with which the noalias compiler class is tested.
NOALIAS_TESTED_NUMBA = ((0, 60), (0, 68))


def _numba_version() -> tuple[int, int]:
    parts = numba.__version__.split(".")
    try:
        return int(parts[0]), int(parts[1])
    except (IndexError, ValueError):
        return (0, 0)


def _noalias_compiler():
    """(numba's compiler class with ``noalias`` set, or None, and why)."""
    if os.environ.get("TEMPOFIELD_PLAIN_JIT", "").strip() not in ("", "0"):
        return None, "plain jit: TEMPOFIELD_PLAIN_JIT is set"
    first, last = NOALIAS_TESTED_NUMBA
    if not first <= _numba_version() <= last:
        return None, (f"plain jit: numba {numba.__version__} is outside the tested range "
                      f"{first[0]}.{first[1]}-{last[0]}.{last[1]}")
    try:
        from numba.core.compiler import Compiler, Flags

        if not hasattr(Flags(), "noalias"):
            return None, "plain jit: numba's compiler flags have no 'noalias'"
    except (ImportError, AttributeError, TypeError) as exc:
        return None, f"plain jit: numba's compiler class is unavailable ({exc})"

    class NoAliasCompiler(Compiler):
        """numba's compiler, with every array argument declared not to overlap any other.

        Only for functions whose written arrays never share memory with any
        other argument (numba's own parallel kernels are compiled the same way).
        """

        def __init__(self, typingctx, targetctx, library, args, return_type, flags, locals):
            flags = flags.copy()
            flags.noalias = True
            super().__init__(typingctx, targetctx, library, args, return_type, flags, locals)

    return NoAliasCompiler, "noalias"


NOALIAS_COMPILER, NOALIAS_STATUS = _noalias_compiler()

#: Settings of the loops that need ``noalias`` to vectorise (plain :data:`JIT` in the fallback).
JIT_NOALIAS = {**JIT, "pipeline_class": NOALIAS_COMPILER} if NOALIAS_COMPILER is not None else dict(JIT)
