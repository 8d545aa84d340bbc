"""Runs an analysis over a whole stack: the option table and specimen presets,
lazy stacks (dask), tiles sized from a memory budget, the passes over the data
and the named stages of an analysis. The only layer below the faces that
imports dask."""

from __future__ import annotations

import lazy_loader

__getattr__, __dir__, __all__ = lazy_loader.attach(
    __name__, submodules=[
    "options", "presets", "stack", "convert", "tiles", "kept", "processes", "tile_kernels",
    "stages", "run",
    ])
