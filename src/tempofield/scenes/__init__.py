"""Synthetic scenes with ground truth (beating sheets, waves, noise), and the
writer of the shipped sample stacks."""

from __future__ import annotations

import importlib

__all__ = ["synthetic", "samples"]


def __getattr__(name: str):
    if name in __all__:
        module = importlib.import_module(f"{__name__}.{name}")
        globals()[name] = module
        return module
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
