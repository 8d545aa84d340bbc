"""The batch runner: one analysis per stack of an experiment on a dask.distributed
cluster (local workers, a running scheduler, or SLURM/PBS through
dask-jobqueue), resumable, with an experiment summary. A face: it uses the
engine and the outputs, and nothing below it imports it."""

from __future__ import annotations

import lazy_loader

__getattr__, __dir__, __all__ = lazy_loader.attach(
    __name__, submodules=[
    "config", "resume", "cluster", "tasks", "summary", "runner",
    ])
