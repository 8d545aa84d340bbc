"""Readers: a tempofield result folder back as map layers, and stacks with their frame interval.

A result folder (``run.json`` + ``maps.ome.zarr``, see :mod:`tempofield.outputs.result`)
is loaded with :func:`tempofield.load_result` and shown as the same layers the
analysis panel makes. A stack file is opened lazily by
:func:`tempofield.open_stack`; its frame interval and pixel size become the
layer's scale and metadata. Each ``get_*_reader`` returns None for paths it
does not handle, so napari can ask other readers.
"""

from __future__ import annotations

from pathlib import Path

from tempofield import load_result, open_stack
from tempofield.engine.stack import TIFF_SUFFIXES, VIDEO_SUFFIXES
from tempofield.errors import InputError, MissingMetadataError, StackNotFoundError
from tempofield.outputs.result import MAPS_FILE, RUN_FILE, is_complete

from ._layers import result_layer_data


def _single(path):
    if isinstance(path, (list, tuple)):
        return path[0] if len(path) == 1 else None
    return path


def is_result_folder(path) -> bool:
    """True for a complete tempofield result folder."""
    p = Path(path)
    return p.is_dir() and (p / RUN_FILE).is_file() and (p / MAPS_FILE).exists() and is_complete(p)


def get_result_reader(path):
    """Return :func:`read_result` if ``path`` is a tempofield result folder, else None."""
    path = _single(path)
    if path is None or not is_result_folder(path):
        return None
    return read_result


def read_result(path) -> list[tuple]:
    """The maps of a result folder as layer data (units in the metadata and names)."""
    path = Path(_single(path))
    result = load_result(path)
    ps = result.pixel_size_um
    kwargs = {"scale": (ps, ps), "units": ("micrometer", "micrometer")} if ps else {}
    layers = result_layer_data(result, path.name, **kwargs)
    for _, attrs, _ in layers:
        attrs["metadata"]["tempofield"]["folder"] = str(path.resolve())
    return layers


def _is_stack_path(path) -> bool:
    name = Path(path).name.lower()
    return name.endswith(TIFF_SUFFIXES + VIDEO_SUFFIXES) or name.endswith(".zarr")


def get_stack_reader(path):
    """Return :func:`read_stack` for a TIFF, Zarr/OME-Zarr or video path, else None."""
    path = _single(path)
    if path is None or not _is_stack_path(path) or is_result_folder(path):
        return None
    return read_stack


def read_stack(path) -> list[tuple]:
    """A (T, Y, X) stack as one lazy image layer, with its frame interval kept.

    A file without a frame interval is still opened, with time in frames
    (scale 1) and ``frame_interval_s`` None in the metadata, so the analysis
    panel asks for it instead of assuming one.
    """
    path = Path(_single(path))
    try:
        stack = open_stack(path)
        fi = stack.frame_interval_s
    except MissingMetadataError:
        stack = open_stack(path, frame_interval_s=1.0)
        fi = None
    except StackNotFoundError:
        raise
    except InputError:
        return []  # e.g. a channel choice is needed: leave the file to other readers
    ps = stack.pixel_size_um
    meta = {"frame_interval_s": fi, "pixel_size_um": ps, "source": stack.source,
            "stack_meta": dict(stack.meta)}
    attrs = {"name": path.name, "metadata": meta, "scale": (fi or 1.0, ps or 1.0, ps or 1.0),
             "units": ("second" if fi else "pixel", "micrometer" if ps else "pixel",
                       "micrometer" if ps else "pixel"),
             "axis_labels": ("t", "y", "x")}
    return [(stack.data, attrs, "image")]
