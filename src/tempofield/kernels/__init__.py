"""Pure computations on arrays: per-pixel spectra and pooling, the sliding-window
geometry of a region, persistent homology and circular coordinates, the rhythm
reference, lock-in phase, regions and propagation. Numpy arrays in, numpy
arrays out; each module's compiled (numba) loops live in a private module
beside it. Nothing here knows about chunks, tiles, dask or files."""

from __future__ import annotations

import importlib

import lazy_loader

__getattr__, __dir__, __all__ = lazy_loader.attach(
    __name__, submodules=[
    "preprocess", "spectral", "embedding", "topology", "reference", "rhythm", "phase", "regions",
    "propagation", "magnify",
    ])


#: The private modules of compiled loops, one beside each kernel that has any.
LOOP_MODULES = ("_preprocess_loops", "_spectral_loops", "_phase_loops", "_regions_loops", "_propagation_loops")


def warm_up() -> None:
    """Compile (or load from the cache) every compiled loop for the common input types.

    The first call of each loop in a fresh install compiles it, which takes
    seconds and holds the interpreter (about 40 s for all of them on two
    cores); the test suite and the benchmarks call this once at the start so
    that no analysis pays for it midway. Other input number types compile on
    first use.
    """
    for name in LOOP_MODULES:
        importlib.import_module(f"{__name__}.{name}").warm_up()
