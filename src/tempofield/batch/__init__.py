"""The batch runner: one analysis per stack of an experiment on a dask.distributed
cluster (local workers, a running scheduler, or SLURM/PBS through
dask-jobqueue), resumable, with an experiment summary. A face: it uses the
engine and the outputs, and nothing below it imports it."""

from __future__ import annotations

import importlib

__all__ = ["config", "resume", "cluster", "tasks", "summary", "runner"]


def __getattr__(name: str):
    if name in __all__:
        module = importlib.import_module(f"{__name__}.{name}")
        globals()[name] = module
        return module
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
