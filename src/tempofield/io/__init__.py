"""Files in and out: stack readers (TIFF, Zarr, video) that return plain arrays and
metadata, the OME-Zarr writer/reader, and folders written beside their
destination then renamed into place. Nothing here imports dask: the engine
wraps what these readers return into lazy arrays."""

from __future__ import annotations

import importlib

__all__ = ["atomic", "omezarr", "video"]


def __getattr__(name: str):
    if name in __all__:
        module = importlib.import_module(f"{__name__}.{name}")
        globals()[name] = module
        return module
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
