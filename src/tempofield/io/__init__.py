"""Files in and out: stack readers (TIFF, Zarr, video) that return plain arrays and
metadata, the OME-Zarr writer/reader, and folders written beside their
destination then renamed into place. Nothing here imports dask: the engine
wraps what these readers return into lazy arrays."""

from __future__ import annotations

import lazy_loader

__getattr__, __dir__, __all__ = lazy_loader.attach(
    __name__, submodules=[
    "atomic", "omezarr", "video",
    ])
