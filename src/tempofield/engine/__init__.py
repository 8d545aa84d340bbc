"""Runs an analysis over a whole stack: the option table and specimen presets,
lazy stacks (dask), tiles sized from a memory budget, the passes over the data
and the named stages of an analysis. The only layer below the faces that
imports dask."""

from __future__ import annotations

import importlib

__all__ = ["options", "presets", "stack", "convert", "tiles", "kept", "processes", "tile_kernels", "stages", "run"]


def __getattr__(name: str):
    if name in __all__:
        module = importlib.import_module(f"{__name__}.{name}")
        globals()[name] = module
        return module
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
