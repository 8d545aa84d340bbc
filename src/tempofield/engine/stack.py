"""Stacks: a lazy (T, Y, X) dask array with its frame interval and pixel size.

:func:`open_stack` is the single door for data: TIFF (plain multi-page, ImageJ
hyperstacks, OME-TIFF), a folder (or a glob pattern) of single-frame TIFF
files, Zarr v2/v3 arrays, OME-Zarr images, video files, and numpy or dask
arrays. Nothing is read beyond metadata until a pass of the engine asks for
pixels. Metadata found in the file is used; explicit arguments override it; a
missing frame interval is an error that says how to give one.

Messages name the Python arguments (``frame_interval_s=0.02``); the command
line shows its own flags instead (``--frame-interval 0.02``, see
:func:`tempofield.cli.in_command_line_words`).
"""

from __future__ import annotations

import glob
import hashlib
import os
import re
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import dask.array as da
import numpy as np

from tempofield.errors import InputError, MissingMetadataError, StackNotFoundError

TIFF_SUFFIXES = (".tif", ".tiff", ".btf", ".tf8")
VIDEO_SUFFIXES = (".avi", ".mp4", ".mov", ".mkv", ".m4v", ".webm")

# Length units to micrometres and time units to seconds, for OME, ImageJ and
# OME-Zarr metadata (UDUNITS names and the symbols microscopes write).
_LENGTH_TO_UM = {
    "micrometer": 1.0, "micron": 1.0, "um": 1.0, "µm": 1.0, "μm": 1.0, "\\u00B5m": 1.0,
    "nanometer": 1e-3, "nm": 1e-3, "millimeter": 1e3, "mm": 1e3,
    "centimeter": 1e4, "cm": 1e4, "meter": 1e6, "m": 1e6,
}
# Time: ImageJ's ``tunit`` (its default is "sec"; the micro sign is written
# as µ or escaped as \u00B5), OME's TimeIncrementUnit (unit symbols, default
# "s") and OME-Zarr's UDUNITS names. Looked up by :func:`seconds_per_time_unit`.
_TIME_TO_S = {
    "second": 1.0, "seconds": 1.0, "s": 1.0, "sec": 1.0, "secs": 1.0,
    "millisecond": 1e-3, "milliseconds": 1e-3, "ms": 1e-3, "msec": 1e-3,
    "microsecond": 1e-6, "microseconds": 1e-6, "µs": 1e-6, "us": 1e-6, "usec": 1e-6, "µsec": 1e-6,
    "nanosecond": 1e-9, "nanoseconds": 1e-9, "ns": 1e-9, "nsec": 1e-9,
    "minute": 60.0, "minutes": 60.0, "min": 60.0, "mins": 60.0,
    "hour": 3600.0, "hours": 3600.0, "h": 3600.0, "hr": 3600.0, "hrs": 3600.0,
}

#: A frame interval that means more frames per second than this is taken for a
#: mistake (a number in the wrong unit, or broken metadata): the fastest cameras
#: used on beating tissue, cilia included, record a few thousand frames per second.
MAX_FRAMES_PER_S = 1e5

#: What the messages about a frame interval give as typical values.
TYPICAL_FRAME_INTERVALS = ("typical values are 0.001 to 0.1 s (1000 to 10 frames per second) for heart-muscle "
                           "cells, zebrafish hearts and cilia; a value in milliseconds must be divided by 1000 "
                           "(40 ms is 0.04)")


def seconds_per_time_unit(unit) -> float | None:
    """Seconds in one ``unit`` of time as microscopes and their software write it, or None if unknown.

    Examples
    --------
    >>> seconds_per_time_unit("ms"), seconds_per_time_unit("sec"), seconds_per_time_unit("\\u00B5s")
    (0.001, 1.0, 1e-06)
    >>> seconds_per_time_unit("frame") is None
    True
    """
    if unit is None:
        return None
    name = str(unit).strip().replace("\\u00B5", "µ").replace("\\u00b5", "µ").replace("\u03bc", "µ")
    return _TIME_TO_S.get(name, _TIME_TO_S.get(name.lower()))


@dataclass
class Stack:
    """A time-lapse stack ready for analysis.

    Attributes
    ----------
    data : (T, Y, X) dask.array.Array
        Lazy pixel data in the file's dtype.
    frame_interval_s : float
        Time between frames, in seconds.
    pixel_size_um : float or None
        Edge length of a pixel, in micrometres; None when unknown (maps are then
        in pixels and conduction velocity in pixels per second).
    source : str
        Where the data came from (a path, a glob pattern of frame files, or ``"array"``).
    meta : dict
        Where each value came from, the file's axes, the chosen channel/plane.
    files : tuple of str
        For a sequence of frame files, the files in frame order (empty otherwise).
    """

    data: da.Array
    frame_interval_s: float
    pixel_size_um: float | None = None
    source: str = "array"
    meta: dict = field(default_factory=dict)
    files: tuple = field(default=(), repr=False)

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(int(s) for s in self.data.shape)

    @property
    def n_frames(self) -> int:
        return self.shape[0]

    @property
    def duration_s(self) -> float:
        return self.n_frames * self.frame_interval_s

    def identity(self) -> dict[str, Any]:
        """A small fingerprint of the input, for provenance and for skipping finished work.

        For files: absolute path, size and modification time (not a content hash,
        which would mean reading the whole stack); for arrays: shape, dtype and a
        hash of a few frames.
        """
        ident: dict[str, Any] = {"source": self.source, "shape": list(self.shape),
                                 "dtype": str(self.data.dtype),
                                 "frame_interval_s": self.frame_interval_s,
                                 "pixel_size_um": self.pixel_size_um}
        for key in ("channel", "plane"):
            if self.meta.get(key) is not None:
                ident[key] = self.meta[key]
        path = Path(self.source)
        if self.files or (self.source != "array" and path.exists()):
            if self.files:
                files = [Path(p) for p in self.files]
            else:
                files = [path] if path.is_file() else [p for p in path.rglob("*") if p.is_file()]
            ident["bytes"] = int(sum(p.stat().st_size for p in files))
            ident["mtime"] = max((p.stat().st_mtime for p in files), default=0.0)
        else:
            probe = np.asarray(self.data[:: max(1, self.n_frames // 4)][:4, :64, :64])
            ident["probe_sha1"] = hashlib.sha1(np.ascontiguousarray(probe).tobytes()).hexdigest()
        return ident

    def input_paths(self) -> list[str]:
        """The files and folders the data is read from, which no output may replace or lie in."""
        if self.source == "array":
            return []
        if self.files:
            return sorted({self.source, *{os.path.dirname(f) for f in self.files}} - {""})
        return [self.source]


def open_stack(source, frame_interval_s: float | None = None, pixel_size_um: float | None = None,
               *, channel: int | None = None, plane: int | None = None,
               axes: str | None = None) -> Stack:
    """Open a time-lapse stack lazily.

    Parameters
    ----------
    source : str, os.PathLike, ndarray or dask.array.Array
        A path to a TIFF / ImageJ / OME-TIFF file, a Zarr array or OME-Zarr
        image folder, a folder of single-frame TIFF files (one file per frame,
        in natural name order: frame2 before frame10), a glob pattern of such
        files (``"frames/*.tif"``), or a video file (AVI, MP4, MOV); or an
        array. Arrays are taken as (T, Y, X) unless ``axes`` says otherwise.
    frame_interval_s : float, optional
        Seconds between frames. Overrides the file's metadata. Required when
        the file has none (and for arrays and frame-file sequences).
    pixel_size_um : float, optional
        Pixel edge in micrometres. Overrides the file's metadata.
    channel, plane : int, optional
        Which channel (C) or focal plane (Z) to analyse when the data has them,
        counted from 0 (the first channel is 0).
    axes : str, optional
        Axis letters of an array source, e.g. ``"TCYX"`` (T, C, Z, Y, X, and S
        for RGB samples).

    Returns
    -------
    Stack
        Lazy (T, Y, X) data with its frame interval and pixel size.

    Raises
    ------
    StackNotFoundError
        If the path does not exist.
    MissingMetadataError
        If no frame interval is in the file and none was given.
    InputError
        If the data is not a time series of 2-D frames, or a channel/plane
        choice is needed or out of range.

    Examples
    --------
    >>> import numpy as np
    >>> s = open_stack(np.zeros((40, 8, 9), np.uint16), frame_interval_s=0.05)
    >>> s.shape, s.frame_interval_s
    ((40, 8, 9), 0.05)
    """
    if isinstance(source, (np.ndarray, da.Array)):
        data = source if isinstance(source, da.Array) else da.from_array(
            source, chunks=_default_chunks(source.shape, source.dtype))
        if data.ndim < 3:
            raise InputError(
                f"the array has shape {tuple(data.shape)}: a single image, not a time series. tempofield needs "
                "frames over time, (T, Y, X).")
        arr_axes = (axes or ("TYX" if data.ndim == 3 else "")).upper()
        if len(arr_axes) != data.ndim:
            raise InputError(
                f"the array has {data.ndim} dimensions (shape {tuple(data.shape)}) but axes={axes!r}; "
                "pass axes=... with one letter per dimension, e.g. axes='TCYX'.")
        data, chosen = _reduce_axes(data, arr_axes, channel, plane, "the array")
        meta = {"axes": arr_axes, **chosen}
        return _finish(data, {}, frame_interval_s, pixel_size_um, "array", meta)

    text = os.fspath(source)
    path = Path(text)
    if not path.exists() and _GLOB_CHARS.search(str(text)):
        files = _glob_frame_files(str(text))
        data, file_meta, meta = _open_sequence(files, channel, plane)
        return _finish(data, file_meta, frame_interval_s, pixel_size_um, os.path.abspath(text), meta,
                       files=tuple(str(f) for f in files))
    if not path.exists():
        raise StackNotFoundError(
            f"no such stack: {str(path)!r}. Check the path (it is taken relative to "
            f"{os.getcwd()!r}).")
    name = path.name.lower()
    if path.is_dir() and not _is_zarr_store(path):
        files = _folder_frame_files(path)
        data, file_meta, meta = _open_sequence(files, channel, plane)
        return _finish(data, file_meta, frame_interval_s, pixel_size_um, str(path.resolve()), meta,
                       files=tuple(str(f) for f in files))
    if path.is_dir() or name.endswith(".zarr"):
        data, file_meta, meta = _open_zarr(path, channel, plane)
    elif name.endswith(TIFF_SUFFIXES):
        data, file_meta, meta = _open_tiff(path, channel, plane)
    elif name.endswith(VIDEO_SUFFIXES):
        data, file_meta, meta = _open_video(path)
    else:
        raise InputError(
            f"cannot read {str(path)!r}: unknown file type {path.suffix!r}. tempofield reads "
            f"TIFF ({', '.join(TIFF_SUFFIXES)}), folders of TIFF frames, Zarr/OME-Zarr folders and video "
            f"({', '.join(VIDEO_SUFFIXES)}); convert other formats to TIFF first.")
    return _finish(data, file_meta, frame_interval_s, pixel_size_um, str(path.resolve()), meta)


def _finish(data, file_meta, frame_interval_s, pixel_size_um, source, meta, files=()) -> Stack:
    if data.ndim != 3:
        raise InputError(f"expected (T, Y, X) frames from {source!r}, found shape {tuple(data.shape)}.")
    if frame_interval_s is not None:
        meta["frame_interval_from"] = "argument"
        fi = frame_interval_s
    else:
        fi = file_meta.get("frame_interval_s")
        meta["frame_interval_from"] = file_meta.get("frame_interval_from", "file")
    if fi is None:
        why = file_meta.get("frame_interval_problem", "the file does not record the time between frames")
        raise MissingMetadataError(
            f"no frame interval for {source!r}: {why}. Give it explicitly: frame_interval_s=0.02 "
            "(seconds between frames; 50 frames per second is 0.02).")
    try:
        fi = float(fi)
    except (TypeError, ValueError):
        raise InputError(f"frame_interval_s={fi!r} is not a number of seconds.") from None
    if not (np.isfinite(fi) and fi > 0):
        raise InputError(f"frame_interval_s={fi!r} must be a positive number of seconds, e.g. 0.02.")
    if 1.0 / fi > MAX_FRAMES_PER_S:
        if meta["frame_interval_from"] == "argument":
            said = f"frame_interval_s={fi:g} looks wrong"
        else:
            said = (f"the frame interval recorded in {source!r} ({meta['frame_interval_from']}) is {fi:g} s, "
                    "which looks wrong")
        raise InputError(
            f"{said}: it means {1.0 / fi:.3g} frames per second, far more than cameras record of beating "
            f"tissue (at most a few thousand). Give the time between frames in seconds, e.g. "
            f"frame_interval_s=0.02 for 50 frames per second; {TYPICAL_FRAME_INTERVALS}.")
    if pixel_size_um is not None:
        meta["pixel_size_from"] = "argument"
        ps = pixel_size_um
    else:
        ps = file_meta.get("pixel_size_um")
        meta["pixel_size_from"] = "file" if ps is not None else "unknown"
    if ps is not None:
        try:
            ps = float(ps)
        except (TypeError, ValueError):
            raise InputError(f"pixel_size_um={ps!r} is not a number of micrometres.") from None
        if not (np.isfinite(ps) and ps > 0):
            raise InputError(f"pixel_size_um={ps!r} must be a positive number of micrometres, e.g. 0.65.")
    t, y, x = data.shape
    if t < 8 or y < 1 or x < 1:
        raise InputError(f"{source!r} has {t} frame{'s' if t != 1 else ''} of {y} x {x} pixels: a time series "
                         "needs at least 8 frames (and in practice several cycles of the slowest rhythm).")
    if not (np.issubdtype(data.dtype, np.number) or data.dtype == bool):
        raise InputError(f"{source!r} holds {data.dtype} values; tempofield needs numeric pixels.")
    return Stack(data=data, frame_interval_s=fi, pixel_size_um=ps, source=source, meta=meta, files=tuple(files))


def _reduce_axes(data, axes: str, channel, plane, where: str):
    """Bring data with axes such as TZCYXS down to TYX, by choice or by luminance."""
    axes = axes.upper().replace("I", "T").replace("Q", "T")
    chosen: dict[str, Any] = {}
    if "S" in axes:  # RGB(A) samples: ITU-R BT.601 luminance
        s_ax = axes.index("S")
        n = data.shape[s_ax]
        if n in (3, 4):
            w = np.array([0.299, 0.587, 0.114] + [0.0] * (n - 3), dtype=np.float32)
            data = da.tensordot(data.astype(np.float32), w, axes=([s_ax], [0]))
            chosen["rgb"] = "luminance"
        elif n == 1:
            data = da.take(data, 0, axis=s_ax)
        else:
            raise InputError(f"{where} has {n} samples per pixel; expected 1, 3 (RGB) or 4 (RGBA).")
        axes = axes.replace("S", "")
    for letter, choice, opt in (("C", channel, "channel"), ("Z", plane, "plane")):
        if letter not in axes:
            if choice not in (None, 0):
                raise InputError(f"{opt}={choice} was given but {where} has no {opt} axis (axes {axes}).")
            continue
        ax = axes.index(letter)
        n = data.shape[ax]
        if n == 1:
            choice = 0
        elif choice is None:
            raise InputError(
                f"{where} has {n} {opt}s (axes {axes}, shape {tuple(data.shape)}); choose one with "
                f"{opt}=N, counted from 0: 0 to {n - 1} (the first {opt} is 0).")
        if not (0 <= int(choice) < n):
            raise InputError(f"{opt}={choice} is out of range: {where} has {n} {opt}s, counted from 0, so use "
                             f"0 to {n - 1} (the first {opt} is 0, the last {n - 1}).")
        data = da.take(data, int(choice), axis=ax)
        chosen[opt] = int(choice)
        axes = axes.replace(letter, "")
    if "T" not in axes:
        if len(axes) == 3:  # no explicit time axis, e.g. a plain page series: the first is time
            axes = "T" + axes[1:]
        else:
            what = "a single image" if axes in ("YX", "YXS") else f"axes {axes}"
            raise InputError(f"{where} holds {what} with no time axis: there is no time series to analyse. "
                             "tempofield needs a (T, Y, X) stack of at least 8 frames; if the frames were saved "
                             "as separate files, give their folder (or a pattern such as 'frames/*.tif') "
                             "instead of one file.")
    extra = [a for a in axes if a not in "TYX"]
    if extra or len(axes) != 3:
        raise InputError(f"{where} has axes {axes} after choosing channel/plane; expected T, Y, X.")
    order = [axes.index(a) for a in "TYX"]
    if order != [0, 1, 2]:
        data = data.transpose(order)
    return data, chosen


# --------------------------------------------------------------------------- TIFF
def _open_tiff(path: Path, channel, plane):
    import tifffile
    import zarr

    axes, file_meta, contiguous = _tiff_header(path)
    if contiguous:
        # An uncompressed, contiguous TIFF maps straight into memory: a tile read
        # touches only its own bytes, whatever the tile shape.
        arr = tifffile.memmap(path, mode="r")
        data = da.from_array(arr, chunks=_default_chunks(arr.shape, arr.dtype), name=f"tiff-{path}-{os.path.getmtime(path)}")
    else:
        store = tifffile.imread(path, aszarr=True)
        data = da.from_zarr(zarr.open(store, mode="r"))
    if data.ndim != len(axes):
        raise InputError(f"{str(path)!r}: series axes {axes!r} do not match data shape {data.shape}.")
    data, chosen = _reduce_axes(data, axes, channel, plane, repr(str(path)))
    return data, file_meta, {"axes": axes, "format": "tiff", **chosen}


def _tiff_header(path: Path) -> tuple[str, dict[str, Any], bool]:
    """(series axes, metadata, whether the pixels lie contiguous) of a TIFF, or an
    :class:`InputError` when the file is cut short or its pages cannot be read.

    A file is taken as incomplete when its contiguous pixels run past its end,
    when it holds fewer pages than its ImageJ header describes, or when
    tifffile found offsets beyond the end and fell back to a single image.
    """
    import tifffile

    fix = "Copy it again from the acquisition computer, or export it again."
    with _tifffile_complaints() as complaints:
        try:
            tif = tifffile.TiffFile(path)
        except Exception as exc:  # tifffile raises several types for broken files
            raise InputError(f"cannot read {str(path)!r} as TIFF: {exc}. Is the file complete?") from None
        try:
            with tif:
                if not tif.series:
                    raise InputError(f"{str(path)!r}: cannot read any image in it as TIFF. Is the file complete?")
                series = tif.series[0]
                axes = series.axes
                file_meta: dict[str, Any] = {}
                # images an ImageJ header says the file holds (ImageJ writes one file, unlike
                # OME-TIFF, whose planes may lie in several files of a multi-file dataset)
                expected = None
                if tif.is_ome and tif.ome_metadata:
                    file_meta.update(_ome_xml_meta(tif.ome_metadata))
                if tif.is_imagej and tif.imagej_metadata:
                    ij = tif.imagej_metadata
                    expected = int(ij.get("images", 0) or 0) or None
                    if ij.get("finterval") and "frame_interval_s" not in file_meta:
                        file_meta.update(_imagej_frame_interval(ij))
                    if "pixel_size_um" not in file_meta:
                        ps = _tiff_resolution_um(tif.pages[0], ij.get("unit"))
                        if ps is not None:
                            file_meta["pixel_size_um"] = ps
                elif "pixel_size_um" not in file_meta:
                    ps = _tiff_resolution_um(tif.pages[0], None)
                    if ps is not None:
                        file_meta["pixel_size_um"] = ps
                n_images = int(np.prod([n for n, a in zip(series.shape, axes) if a not in "YXS"], dtype=np.int64))
                contiguous = series.dataoffset is not None
                if not contiguous and expected:  # every page of the series must be there (reads the page chain)
                    n_images = min(n_images, len(tif.pages))
                short = contiguous and os.path.getsize(path) < series.dataoffset + series.nbytes
        except InputError:
            raise
        except Exception as exc:  # tifffile raises several types on a broken page chain
            raise InputError(f"{str(path)!r} is truncated or corrupt: reading its pages failed "
                             f"({type(exc).__name__}: {exc}). {fix}") from None
    broken = any("offset" in c for c in complaints)  # the file points past its own end
    if short or (expected and n_images < expected) or (broken and n_images <= 1):
        found = (f"its header describes {expected} images but only {n_images} can be read; "
                 if expected and n_images < expected else "")
        said = f" (tifffile: {complaints[0]})" if complaints else ""
        raise InputError(f"{str(path)!r} is truncated or corrupt: {found}the file ends before its image data "
                         f"does{said}. {fix}")
    return axes, file_meta, contiguous


class _tifffile_complaints:
    """Collect what tifffile logs while a file is opened, instead of printing it.

    tifffile logs broken page offsets and inconsistent headers as warnings,
    then falls back to whatever it can read; the messages become part of
    tempofield's own error when the file turns out to be incomplete.
    """

    def __enter__(self) -> list[str]:
        import logging

        self.messages: list[str] = []
        self.logger = logging.getLogger("tifffile")
        self.handler = logging.Handler(logging.WARNING)
        self.handler.emit = lambda record: self.messages.append(record.getMessage().strip())
        self.propagate = self.logger.propagate
        self.logger.addHandler(self.handler)
        self.logger.propagate = False
        return self.messages

    def __exit__(self, *exc) -> None:
        self.logger.removeHandler(self.handler)
        self.logger.propagate = self.propagate


def _default_chunks(shape, dtype):
    """Full time axis, 256-pixel tiles for (T, Y, X); dask's choice otherwise."""
    if len(shape) == 3:
        return (shape[0], min(shape[1], 256), min(shape[2], 256))
    return "auto"


def _tiff_resolution_um(page, unit) -> float | None:
    tag = page.tags.get("XResolution")
    if tag is None:
        return None
    num, den = tag.value if isinstance(tag.value, tuple) else (tag.value, 1)
    if not num or not den:
        return None
    px_per_unit = num / den
    if px_per_unit <= 0 or px_per_unit == 1.0 and unit is None:
        return None  # 1 pixel per unit is the writers' default, not a measurement
    unit_name = (unit or "").strip()
    if not unit_name:
        res_unit = page.tags.get("ResolutionUnit")
        code = int(res_unit.value) if res_unit is not None else 2
        if code == 3:
            unit_name = "cm"
        else:
            return None  # inches (the TIFF default) say nothing about microscopy
    scale = _LENGTH_TO_UM.get(unit_name.replace("\\u00B5", "µ"))
    if scale is None:
        return None
    return float(scale / px_per_unit)


def _imagej_frame_interval(ij: dict) -> dict[str, Any]:
    """The frame interval of an ImageJ header: ``finterval`` in the unit ``tunit`` (ImageJ's default "sec")."""
    unit = ij.get("tunit") or "sec"
    scale = seconds_per_time_unit(unit)
    try:
        value = float(ij["finterval"])
    except (TypeError, ValueError):
        return {"frame_interval_problem": f"its ImageJ frame interval {ij['finterval']!r} is not a number"}
    if scale is None:
        return {"frame_interval_problem": f"its ImageJ frame interval is {value:g} in the unit {unit!r}, which is "
                                          "not a unit of time tempofield knows (s, ms, µs, min, h)"}
    shown = str(unit).replace("\\u00B5", "µ").replace("\\u00b5", "µ")
    said = "ImageJ finterval" if "tunit" not in ij else f"ImageJ finterval {value:g} {shown}"
    return {"frame_interval_s": value * scale, "frame_interval_from": said}


def _ome_xml_meta(xml: str) -> dict[str, Any]:
    out: dict[str, Any] = {}
    try:
        root = ET.fromstring(xml)
    except ET.ParseError:
        return out
    pixels = next((el for el in root.iter() if el.tag.endswith("Pixels")), None)
    if pixels is None:
        return out
    ti = pixels.get("TimeIncrement")
    if ti:
        unit = pixels.get("TimeIncrementUnit", "s")  # the OME schema's default
        scale = seconds_per_time_unit(unit)
        if scale is None:
            out["frame_interval_problem"] = (f"its OME TimeIncrement is {ti} in the unit {unit!r}, which is not a "
                                             "unit of time tempofield knows (s, ms, µs, min, h)")
        else:
            out["frame_interval_s"] = float(ti) * scale
            out["frame_interval_from"] = "OME TimeIncrement" + ("" if unit == "s" else f" {ti} {unit}")
    else:
        deltas = []
        for el in pixels:
            if el.tag.endswith("Plane") and el.get("DeltaT") is not None and el.get("TheC", "0") == "0" \
                    and el.get("TheZ", "0") == "0":
                scale = seconds_per_time_unit(el.get("DeltaTUnit", "s"))
                if scale is not None:
                    deltas.append((int(el.get("TheT", "0")), float(el.get("DeltaT")) * scale))
        if len(deltas) >= 2:
            deltas.sort()
            steps = np.diff([d for _, d in deltas]) / np.maximum(np.diff([t for t, _ in deltas]), 1)
            out["frame_interval_s"] = float(np.median(steps))
            out["frame_interval_from"] = "OME Plane DeltaT (median step)"
    px = pixels.get("PhysicalSizeX")
    if px:
        unit = pixels.get("PhysicalSizeXUnit", "µm")
        scale = _LENGTH_TO_UM.get(unit)
        if scale is not None:
            out["pixel_size_um"] = float(px) * scale
    return out


# --------------------------------------------------------------------------- TIFF frame files
_GLOB_CHARS = re.compile(r"[*?\[]")

# What marks a folder as a Zarr store: zarr v3's zarr.json, zarr v2's .zarray / .zgroup.
_ZARR_MARKERS = ("zarr.json", ".zarray", ".zgroup")


def _is_zarr_store(path: Path) -> bool:
    return any((path / marker).is_file() for marker in _ZARR_MARKERS)


def _natural_key(path) -> list:
    """Sort key that orders numbers by value: frame2 before frame10."""
    return [int(part) if part.isdigit() else part.lower() for part in re.split(r"(\d+)", os.fspath(path))]


def _is_frame_file(path: Path) -> bool:
    # not hidden files, such as the "._name.tif" copies macOS leaves on shared disks
    return path.is_file() and path.name.lower().endswith(TIFF_SUFFIXES) and not path.name.startswith(".")


def _folder_frame_files(folder: Path) -> list[Path]:
    """The TIFF files directly in ``folder``, in natural name order, or an error saying what the folder is not."""
    base = folder.resolve()
    files = sorted((base / p.name for p in folder.iterdir() if _is_frame_file(p)), key=lambda p: _natural_key(p.name))
    if files:
        return files
    names = sorted(p.name for p in folder.iterdir() if not p.name.startswith("."))
    holds = (f"it holds {len(names)} item{'s' if len(names) != 1 else ''}: {', '.join(names[:5])}"
             f"{', ...' if len(names) > 5 else ''}" if names else "it is empty")
    raise InputError(
        f"cannot read the folder {str(folder)!r}: tempofield reads a folder when it is a Zarr or OME-Zarr store "
        f"(with a zarr.json, .zarray or .zgroup file in it) or when it holds one TIFF file per frame "
        f"({', '.join(TIFF_SUFFIXES)}); {holds}. Give the path of the stack file itself, or of the folder that "
        "holds the frames.")


def _glob_frame_files(pattern: str) -> list[Path]:
    """The files matching a glob pattern such as ``frames/*.tif``, in natural name order."""
    files = sorted((Path(os.path.abspath(p)) for p in glob.glob(pattern) if os.path.isfile(p)), key=_natural_key)
    if not files:
        raise StackNotFoundError(
            f"no files match {pattern!r}. Check the pattern (it is taken relative to {os.getcwd()!r}); "
            "on the command line put it in quotes, e.g. 'frames/*.tif', so it reaches tempofield whole.")
    other = [f.name for f in files if not f.name.lower().endswith(TIFF_SUFFIXES)]
    if other:
        raise InputError(
            f"{pattern!r} matches {len(other)} file{'s' if len(other) != 1 else ''} that are not TIFF "
            f"({', '.join(other[:3])}{', ...' if len(other) > 3 else ''}); a pattern must name TIFF frame files "
            "only, e.g. 'frames/*.tif'.")
    return files


def _open_sequence(files: list[Path], channel, plane):
    """One frame per TIFF file, read lazily: a dask array with one chunk per file.

    Only the first file is opened here (for the frame's shape, number type and
    pixel size); every file is read when a pass of the engine needs its frame.
    The frame interval is not taken from the files (a single frame records
    none): it must be given.
    """
    import tifffile

    first = files[0]
    _, first_meta, _ = _tiff_header(first)
    with tifffile.TiffFile(first) as tif:
        series = tif.series[0]
        shape, axes, dtype = tuple(series.shape), series.axes, np.dtype(series.dtype)
    kept = [(n, a) for n, a in zip(shape, axes) if n != 1 or a in "YXS"]
    frame_shape = tuple(n for n, _ in kept)
    frame_axes = "".join(a for _, a in kept)
    where = f"the {len(files)} TIFF frames in {str(first.parent)!r}"
    if any(a in "TIQ" for a in frame_axes):
        n_images = int(np.prod([n for n, a in kept if a not in "YXS"], dtype=np.int64))
        raise InputError(
            f"{str(first)!r} holds {n_images} images (axes {axes}, shape {shape}), not one frame: tempofield "
            "reads a folder or pattern of TIFF files as one frame per file. Give a multi-frame file on its own "
            "instead (or many of them with tempofield batch).")
    token = hashlib.sha1("\n".join(f"{f}:{f.stat().st_mtime_ns}" for f in files).encode()).hexdigest()[:16]
    name = f"tiff-frames-{token}"
    graph = {(name, i) + (0,) * len(frame_shape): (_read_frame_file, str(f), frame_shape, dtype, str(first))
             for i, f in enumerate(files)}
    data = da.Array(graph, name, chunks=((1,) * len(files),) + tuple((n,) for n in frame_shape), dtype=dtype)
    data, chosen = _reduce_axes(data, "T" + frame_axes, channel, plane, where)
    file_meta = {"frame_interval_problem": "a sequence of single-frame TIFF files does not record the time "
                                           "between frames"}
    if first_meta.get("pixel_size_um") is not None:
        file_meta["pixel_size_um"] = first_meta["pixel_size_um"]
    meta = {"axes": "T" + frame_axes, "format": "tiff-sequence", "n_files": len(files), "first_file": str(first),
            "last_file": str(files[-1]), **chosen}
    return data, file_meta, meta


def _read_frame_file(path: str, frame_shape: tuple, dtype, first: str) -> np.ndarray:
    """One frame file as a (1, *frame_shape) block; a file whose frame differs from the first is an error."""
    import tifffile

    try:
        frame = tifffile.imread(path)
    except Exception as exc:  # tifffile raises several types for broken files
        raise InputError(f"cannot read the frame file {path!r} as TIFF ({type(exc).__name__}: {exc}). "
                         "Is the file complete?") from None
    if frame.size != int(np.prod(frame_shape, dtype=np.int64)) or frame.dtype != dtype:
        raise InputError(
            f"the frame file {path!r} holds a {frame.dtype} image of shape {frame.shape}, but the first file "
            f"{first!r} holds {dtype} frames of shape {frame_shape}: every frame of a sequence must have the "
            "same size and number type. Remove the odd file, or move the frames that belong together into "
            "a folder of their own.")
    return frame.reshape((1,) + frame_shape)


# --------------------------------------------------------------------------- Zarr
def _open_zarr(path: Path, channel, plane):
    import zarr

    try:
        node = zarr.open(str(path), mode="r")
    except Exception as exc:
        raise InputError(f"cannot open {str(path)!r} as Zarr: {exc}.") from None
    file_meta: dict[str, Any] = {}
    if isinstance(node, zarr.Group):
        attrs = dict(node.attrs)
        ome = attrs.get("ome", attrs)
        ms = ome.get("multiscales")
        if not ms:
            arrays = sorted(k for k, _ in node.arrays())
            raise InputError(
                f"{str(path)!r} is a Zarr group without OME-Zarr 'multiscales' metadata; open one of "
                f"its arrays instead (e.g. {str(path / arrays[0]) if arrays else str(path) + '/NAME'}).")
        ms0 = ms[0]
        ds0 = ms0["datasets"][0]
        arr = node[ds0["path"]]
        axes_md = ms0.get("axes") or [{"name": n} for n in "tczyx"[-arr.ndim:]]
        names = [(a["name"] if isinstance(a, dict) else str(a)).lower() for a in axes_md]
        scale = [1.0] * arr.ndim
        for tr in list(ms0.get("coordinateTransformations", [])) + list(ds0.get("coordinateTransformations", [])):
            if tr.get("type") == "scale":
                scale = [s * float(v) for s, v in zip(scale, tr["scale"])]
        for name, ax_md, sc in zip(names, axes_md, scale):
            unit = ax_md.get("unit") if isinstance(ax_md, dict) else None
            if name == "t":
                factor = seconds_per_time_unit(unit)
                if factor is not None:
                    file_meta["frame_interval_s"] = sc * factor
                    file_meta["frame_interval_from"] = "OME-Zarr scale"
            if name == "x" and unit and _LENGTH_TO_UM.get(unit) is not None:
                file_meta["pixel_size_um"] = sc * _LENGTH_TO_UM[unit]
        letters = "".join({"t": "T", "c": "C", "z": "Z", "y": "Y", "x": "X"}.get(n, "?") for n in names)
        if "?" in letters:
            raise InputError(f"{str(path)!r}: unsupported OME-Zarr axes {names}.")
    else:
        arr = node
        letters = "TYX" if arr.ndim == 3 else ""
        if not letters:
            raise InputError(
                f"{str(path)!r} is a {arr.ndim}-D Zarr array without axis metadata; tempofield needs "
                "(T, Y, X) there, or an OME-Zarr image whose axes say which is which.")
        fi = arr.attrs.get("frame_interval_s")
        if fi is not None:
            file_meta["frame_interval_s"] = float(fi)
            file_meta["frame_interval_from"] = "zarr attribute frame_interval_s"
        ps = arr.attrs.get("pixel_size_um")
        if ps is not None:
            file_meta["pixel_size_um"] = float(ps)
    data = da.from_zarr(arr)
    data, chosen = _reduce_axes(data, letters, channel, plane, repr(str(path)))
    return data, file_meta, {"axes": letters, "format": "zarr", **chosen}


# --------------------------------------------------------------------------- video
def _open_video(path: Path):
    """Decode a video into memory as 8-bit luminance frames.

    Videos are decoded once, whole: seeking in compressed video is not exact
    enough for a lazy per-tile read. A video whose frames would take more than
    ``video_memory_limit()`` bytes is refused with a pointer to
    ``tempofield convert``, which decodes it in one streaming pass to disk.
    """
    frames, rate = _decode_video(path)
    data = da.from_array(frames, chunks=(frames.shape[0], 256, 256))
    meta: dict[str, Any] = {}
    if rate:
        meta = {"frame_interval_s": 1.0 / rate, "frame_interval_from": "video frame rate"}
    return data, meta, {"axes": "TYX", "format": "video"}


def video_memory_limit() -> int:
    """Largest decoded video (bytes) :func:`open_stack` holds in memory: a quarter of the physical memory."""
    try:
        return int(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") // 4)
    except (AttributeError, OSError, ValueError):
        return 4 * 2**30


def iter_video_frames(path: Path):
    """Yield a video's frame rate (or None) and its frame count (0 if unknown), then its frames
    as 8-bit luminance (Y, X) arrays, one by one."""
    import av

    try:
        container = av.open(str(path))
    except Exception as exc:
        raise InputError(f"cannot decode video {str(path)!r}: {exc}.") from None
    with container:
        stream = container.streams.video[0]
        yield (float(stream.average_rate) if stream.average_rate else None), int(stream.frames or 0)
        shape = None
        for n, frame in enumerate(container.decode(stream)):
            gray = frame.to_ndarray(format="gray")
            if shape is None:
                shape = gray.shape
            elif gray.shape != shape:
                raise InputError(f"video {str(path)!r} changes frame size at frame {n} ({shape} to "
                                 f"{gray.shape}); tempofield needs one frame size throughout.")
            yield gray


def _too_big(path: Path, n_bytes: int, limit: int) -> InputError:
    return InputError(
        f"video {str(path)!r} decodes to at least {n_bytes / 2**30:.1f} GB of frames, more than the "
        f"{limit / 2**30:.1f} GB tempofield holds in memory. Convert it once to a chunked OME-Zarr "
        f"(decoded in one streaming pass to disk): `tempofield convert {path.name} {path.stem}.ome.zarr`, then analyse the converted copy.")


def _decode_video(path: Path, limit: int | None = None):
    """All frames (T, Y, X) uint8 and the frame rate; refuses more than ``limit`` bytes of frames."""
    limit = video_memory_limit() if limit is None else limit
    it = iter_video_frames(path)
    rate, count = next(it)
    out = None
    n = 0
    for frame in it:
        if out is None:
            if count * frame.nbytes > limit:
                raise _too_big(path, count * frame.nbytes, limit)
            out = np.empty((max(count, 16),) + frame.shape, np.uint8)
        if n == out.shape[0]:  # the container's count was missing or short: grow
            if 2 * out.nbytes > limit:
                raise _too_big(path, 2 * out.nbytes, limit)
            out = np.concatenate([out, np.empty_like(out)])
        out[n] = frame
        n += 1
    if n == 0:
        raise InputError(f"video {str(path)!r} has no frames.")
    return out[:n], rate


def decode_video_to_file(path: Path, dest: Path):
    """Decode a video frame by frame into a raw uint8 file: ((T, Y, X), frame rate or None).

    Memory stays at one frame; the file is the decoded size. For
    :func:`tempofield.engine.convert.convert_stack`.
    """
    it = iter_video_frames(path)
    rate, _ = next(it)
    n, shape = 0, None
    with open(dest, "wb") as f:
        for frame in it:  # one frame size throughout (checked by iter_video_frames)
            shape = frame.shape
            f.write(np.ascontiguousarray(frame, np.uint8).tobytes())
            n += 1
    if n == 0:
        raise InputError(f"video {str(path)!r} has no frames.")
    return (n,) + tuple(shape), rate

