"""What an analysis hands back: the result object, its folder (maps as OME-Zarr,
tables as CSV, run.json) and its report figure."""

from __future__ import annotations

import lazy_loader

__getattr__, __dir__, __all__ = lazy_loader.attach(
    __name__, submodules=[
    "result", "report", "texts",
    ])
