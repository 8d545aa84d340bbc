"""Convert any readable stack into an OME-Zarr image the engine streams best.

The output keeps the whole time axis in each (T, 128, 128) chunk, so a tile
of the engine reads whole chunks and never regroups frames in memory; it is
also what the batch runner sends to cluster workers (a TIFF-backed dask array
cannot travel to another process). Written beside the destination, renamed
when complete.
"""

from __future__ import annotations

import uuid
from pathlib import Path

import dask.array as da
import numpy as np

from tempofield.engine.stack import (
    VIDEO_SUFFIXES,
    Stack,
    decode_video_to_file,
    open_stack,
)
from tempofield.errors import ResultExistsError
from tempofield.io import omezarr
from tempofield.io.atomic import atomic_folder, check_replaceable

CHUNK_YX = 128

#: Frames decoded at once into the spill file (bytes), see :func:`convert_stack`.
SPILL_BLOCK_BYTES = 256 * 2**20


def convert_stack(source, out, *, frame_interval_s=None, pixel_size_um=None, channel=None, plane=None,
                  overwrite=False, progress=None) -> Path:
    """Write ``source`` as an OME-Zarr (t, y, x) image at ``out`` and return the path.

    Parameters
    ----------
    source : path, array or Stack
        Anything :func:`tempofield.open_stack` reads (or an opened Stack).
    out : path
        Folder to create (conventionally ending in ``.ome.zarr``).
    frame_interval_s, pixel_size_um, channel, plane
        As for :func:`tempofield.open_stack`.
    overwrite : bool
        Replace an existing ``out``.
    progress : callable, optional
        ``progress(done_rows, total_rows)``.

    Raises
    ------
    ResultExistsError
        If ``out`` exists and ``overwrite`` is False.

    Notes
    -----
    The stack is read one band of 128 image rows at a time (all frames of the
    band), so memory stays at T x 128 x X pixels and every output chunk is
    written once. A source stored frame by frame in pieces taller than a band
    (a compressed TIFF page in one strip, large TIFF tiles, Zarr chunks of
    whole frames) would be decoded again for every band; such a source is
    first decoded once, a block of frames at a time, into an uncompressed
    temporary file beside ``out`` (the stack's size on disk, removed at the
    end), and the bands are read from that. A video file is decoded that way
    too, frame by frame, so it is never held in memory whole.
    """
    dest = Path(out).resolve()
    if dest.exists() and not overwrite:
        raise ResultExistsError(f"{str(dest)!r} already exists; choose another name or add --overwrite.")
    spill = None
    video = not isinstance(source, Stack) and isinstance(source, (str, Path)) \
        and str(source).lower().endswith(VIDEO_SUFFIXES) and Path(source).is_file()
    if video:
        # decoded once, frame by frame, to a raw file beside ``out`` (never whole in memory)
        _check_destination(dest, [str(Path(source).resolve())])
        spill = dest.parent / f".{dest.name}-frames.partial-{uuid.uuid4().hex[:8]}"
        try:
            shape, rate = decode_video_to_file(Path(source), spill)
            if frame_interval_s is None and rate:
                frame_interval_s = 1.0 / rate
            frames = np.memmap(spill, dtype=np.uint8, mode="r", shape=shape)
            stack = open_stack(da.from_array(frames, chunks=(shape[0], CHUNK_YX, shape[2])), frame_interval_s,
                               pixel_size_um)
        except BaseException:
            spill.unlink(missing_ok=True)
            raise
    else:
        stack = source if isinstance(source, Stack) else open_stack(
            source, frame_interval_s, pixel_size_um, channel=channel, plane=plane)
        _check_destination(dest, [stack.source] if stack.source != "array" else [])
    t, y, x = stack.shape
    dtype = stack.data.dtype if stack.data.dtype != np.float64 else np.dtype(np.float32)
    try:
        with atomic_folder(dest, overwrite=overwrite, create=False) as tmp:
            arr = omezarr.create_stack(tmp, (t, y, x), dtype, frame_interval_s=stack.frame_interval_s,
                                       pixel_size_um=stack.pixel_size_um, chunk_yx=CHUNK_YX)
            source = stack.data
            if spill is None and _decoded_per_band(stack.data):
                spill = dest.parent / f".{dest.name}-frames.partial-{uuid.uuid4().hex[:8]}"
                source = _decode_once(stack.data, spill)
            for y0 in range(0, y, CHUNK_YX):
                band = source[:, y0:y0 + CHUNK_YX, :]
                band = np.asarray(band if isinstance(band, np.ndarray) else band.compute(scheduler="threads"))
                arr[:, y0:y0 + band.shape[1], :] = band.astype(dtype, copy=False)
                if progress is not None:
                    progress(min(y, y0 + CHUNK_YX), y)
            source = band = stack = frames = None  # let go of the spill file's memory map before it is removed
    finally:
        if spill is not None:
            spill.unlink(missing_ok=True)
    return dest


def _check_destination(dest: Path, protect: list) -> None:
    """An existing ``dest`` may only be replaced if it is a converted stack and not the input itself."""
    check_replaceable(dest, lambda p: (p / "zarr.json").exists() and (p / "0").exists(), "converted stack",
                      protect=protect)


def _decoded_per_band(data) -> bool:
    """Whether reading ``data`` band by band would decode its pieces more than once:
    its chunks split the time axis and are taller than a band."""
    return len(data.chunks[0]) > 1 and max(data.chunks[1]) > CHUNK_YX


def _decode_once(data, path: Path) -> np.ndarray:
    """Decode ``data`` (T, Y, X) into a raw memory-mapped file at ``path``, a block of frames at a time."""
    t, y, x = data.shape
    out = np.memmap(path, dtype=data.dtype, mode="w+", shape=(t, y, x))
    chunk = int(data.chunks[0][0])
    frames = max(1, SPILL_BLOCK_BYTES // max(1, y * x * data.dtype.itemsize))
    step = max(1, frames // chunk) * chunk  # whole source chunks, each decoded once
    for t0 in range(0, t, step):
        out[t0:t0 + step] = data[t0:t0 + step].compute(scheduler="threads")
    out.flush()
    return out
