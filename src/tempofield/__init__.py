"""tempofield: per-pixel maps and per-region tables of rhythmic motion in time-lapse stacks.

The public names below load lazily: ``import tempofield`` costs milliseconds,
and the numerical stack (dask, numba, scipy) is imported the first time one of
them is used.

Layers, from the bottom up (imports point down only; a test walks them):

- :mod:`tempofield.errors`, ``_dtypes``, ``_version``: shared by every layer;
- :mod:`tempofield.io`: files in and out (TIFF, Zarr and video readers,
  OME-Zarr, atomic folders), no dask;
- :mod:`tempofield.kernels`: pure numpy/numba computations on blocks of traces
  or on one region;
- :mod:`tempofield.engine`: options, lazy stacks, tiles and passes over the
  data with dask, the stage sequence of an analysis;
- :mod:`tempofield.outputs`: the result, its folder and its report;
- :mod:`tempofield.scenes`: synthetic scenes with ground truth;
- the faces: :mod:`tempofield.cli`, :mod:`tempofield.batch`, :mod:`tempofield.plugin`.
"""

from __future__ import annotations

import importlib

_PUBLIC = {
    "__version__": "tempofield._version",  # (its lookup reads the installed metadata: lazily too)
    "open_stack": "tempofield.engine.stack",
    "Stack": "tempofield.engine.stack",
    "analyze": "tempofield.engine.run",
    "iter_analyze": "tempofield.engine.run",
    "Progress": "tempofield.engine.run",
    "load_result": "tempofield.outputs.result",
    "RhythmResult": "tempofield.outputs.result",
    "TempofieldError": "tempofield.errors",
    "InputError": "tempofield.errors",
}

__all__ = list(_PUBLIC)


def __getattr__(name: str):
    if name in _PUBLIC:
        value = getattr(importlib.import_module(_PUBLIC[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'tempofield' has no attribute {name!r}")


def __dir__():
    return sorted(__all__)
