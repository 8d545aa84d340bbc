"""rhythmap: per-pixel maps and per-region tables of rhythmic motion in time-lapse stacks."""

from ._version import __version__
from .engine import analyze
from .errors import RhythmapError
from .result import RhythmResult, load_result
from .stack import Stack, open_stack

__all__ = ["__version__", "analyze", "open_stack", "load_result", "RhythmResult", "Stack", "RhythmapError"]
