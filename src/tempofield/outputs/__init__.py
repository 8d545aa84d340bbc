"""What an analysis hands back: the result object, its folder (maps as OME-Zarr,
tables as CSV, run.json) and its report figure."""

from __future__ import annotations

import importlib

__all__ = ["result", "report", "texts"]


def __getattr__(name: str):
    if name in __all__:
        module = importlib.import_module(f"{__name__}.{name}")
        globals()[name] = module
        return module
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
