"""Stacks: a lazy (T, Y, X) dask array with its frame interval and pixel size.

:func:`open_stack` is the single door for data: TIFF (plain multi-page, ImageJ
hyperstacks, OME-TIFF), Zarr v2/v3 arrays, OME-Zarr images, video files, and
numpy or dask arrays. Nothing is read beyond metadata until a pass of the
engine asks for pixels. Metadata found in the file is used; explicit arguments
override it; a missing frame interval is an error that says how to give one.
"""

from __future__ import annotations

import hashlib
import os
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
_TIME_TO_S = {
    "second": 1.0, "s": 1.0, "sec": 1.0, "millisecond": 1e-3, "ms": 1e-3,
    "microsecond": 1e-6, "us": 1e-6, "µs": 1e-6, "minute": 60.0, "min": 60.0,
    "hour": 3600.0, "h": 3600.0,
}


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
        Where the data came from (a path, or ``"array"``).
    meta : dict
        Where each value came from, the file's axes, the chosen channel/plane.
    """

    data: da.Array
    frame_interval_s: float
    pixel_size_um: float | None = None
    source: str = "array"
    meta: dict = field(default_factory=dict)

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
        if self.source != "array" and path.exists():
            files = [path] if path.is_file() else [p for p in path.rglob("*") if p.is_file()]
            ident["bytes"] = int(sum(p.stat().st_size for p in files))
            ident["mtime"] = max((p.stat().st_mtime for p in files), default=0.0)
        else:
            probe = np.asarray(self.data[:: max(1, self.n_frames // 4)][:4, :64, :64])
            ident["probe_sha1"] = hashlib.sha1(np.ascontiguousarray(probe).tobytes()).hexdigest()
        return ident


def open_stack(source, frame_interval_s: float | None = None, pixel_size_um: float | None = None,
               *, channel: int | None = None, plane: int | None = None,
               axes: str | None = None) -> Stack:
    """Open a time-lapse stack lazily.

    Parameters
    ----------
    source : str, os.PathLike, ndarray or dask.array.Array
        A path to a TIFF / ImageJ / OME-TIFF file, a Zarr array or OME-Zarr
        image folder, or a video file (AVI, MP4, MOV); or an array. Arrays are
        taken as (T, Y, X) unless ``axes`` says otherwise.
    frame_interval_s : float, optional
        Seconds between frames. Overrides the file's metadata. Required when
        the file has none (and for arrays).
    pixel_size_um : float, optional
        Pixel edge in micrometres. Overrides the file's metadata.
    channel, plane : int, optional
        Which channel (C) or focal plane (Z) to analyse when the data has them.
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

    path = Path(os.fspath(source))
    if not path.exists():
        raise StackNotFoundError(
            f"no such stack: {str(path)!r}. Check the path (it is taken relative to "
            f"{os.getcwd()!r}).")
    name = path.name.lower()
    if path.is_dir() or name.endswith(".zarr"):
        data, file_meta, meta = _open_zarr(path, channel, plane)
    elif name.endswith(TIFF_SUFFIXES):
        data, file_meta, meta = _open_tiff(path, channel, plane)
    elif name.endswith(VIDEO_SUFFIXES):
        data, file_meta, meta = _open_video(path)
    else:
        raise InputError(
            f"cannot read {str(path)!r}: unknown file type {path.suffix!r}. tempofield reads "
            f"TIFF ({', '.join(TIFF_SUFFIXES)}), Zarr/OME-Zarr folders and video "
            f"({', '.join(VIDEO_SUFFIXES)}); convert other formats to TIFF first.")
    return _finish(data, file_meta, frame_interval_s, pixel_size_um, str(path.resolve()), meta)


def _finish(data, file_meta, frame_interval_s, pixel_size_um, source, meta) -> Stack:
    if data.ndim != 3:
        raise InputError(f"expected (T, Y, X) frames from {source!r}, found shape {tuple(data.shape)}.")
    if frame_interval_s is not None:
        meta["frame_interval_from"] = "argument"
        fi = frame_interval_s
    else:
        fi = file_meta.get("frame_interval_s")
        meta["frame_interval_from"] = file_meta.get("frame_interval_from", "file")
    if fi is None:
        raise MissingMetadataError(
            f"no frame interval for {source!r}: the file does not record the time between frames. "
            "Give it explicitly: frame_interval_s=0.02 in Python, or --frame-interval 0.02 on the "
            "command line (seconds between frames; 50 frames per second is 0.02).")
    try:
        fi = float(fi)
    except (TypeError, ValueError):
        raise InputError(f"frame_interval_s={fi!r} is not a number of seconds.") from None
    if not (np.isfinite(fi) and fi > 0):
        raise InputError(f"frame_interval_s={fi!r} must be a positive number of seconds, e.g. 0.02.")
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
    return Stack(data=data, frame_interval_s=fi, pixel_size_um=ps, source=source, meta=meta)


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
                f"{opt}=N in Python or --{opt} N on the command line (0 to {n - 1}).")
        if not (0 <= int(choice) < n):
            raise InputError(f"{opt}={choice} is out of range: {where} has {n} {opt}s (0 to {n - 1}).")
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
                             "as separate files, combine them into one stack first.")
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
                        file_meta["frame_interval_s"] = float(ij["finterval"])
                        file_meta["frame_interval_from"] = "ImageJ finterval"
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
        unit = pixels.get("TimeIncrementUnit", "s")
        out["frame_interval_s"] = float(ti) * _TIME_TO_S.get(unit, 1.0)
        out["frame_interval_from"] = "OME TimeIncrement"
    else:
        deltas = []
        for el in pixels:
            if el.tag.endswith("Plane") and el.get("DeltaT") is not None and el.get("TheC", "0") == "0" \
                    and el.get("TheZ", "0") == "0":
                deltas.append((int(el.get("TheT", "0")),
                               float(el.get("DeltaT")) * _TIME_TO_S.get(el.get("DeltaTUnit", "s"), 1.0)))
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
                factor = _TIME_TO_S.get(unit or "", None)
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

