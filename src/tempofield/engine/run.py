"""Passes over the data: tiling, the memory bound, progress and cancellation.

The only module that knows about dask. A pass builds one task graph in which
every tile is a (T, ty, tx) block holding the whole time axis (plus a halo of
``pooling_radius_px`` pixels for the spatial pooling), runs a pure-numpy kernel
on each tile and returns small per-tile results (maps, binned traces). One
graph per pass means every chunk of the input is read and decompressed once
per pass; the tile size comes from a memory budget, not a constant. The same
graph runs on dask's thread pool or, when a ``distributed.Client`` is active,
on its workers.

Pass 1 ("maps"): pooling, detrending, spectral maps, the binned traces of
the beating pixels that make the frame Gram matrix of the rhythm reference,
and (when the phase will be needed) the band of every pixel's spectrum that
the lock-in uses, kept in a temporary file (:class:`KeptSpectra`).
The phase stage: lock-in of every pixel against its region's reference, from
the kept spectra; or, when they cannot serve, pass 2, a second read of the
stack (:func:`phase_tile_kernel`).
"""

from __future__ import annotations

import contextlib
import importlib
import math
import os
import sys
import threading
import time
import warnings
import weakref
from dataclasses import dataclass
from typing import Any, Callable, Iterator

import dask
import dask.array as da
import numpy as np

from . import _loops
from . import phase as phase_mod
from . import presets, preprocess, propagation, regions as regions_mod, rhythm, spectral
from ._version import __version__
from .errors import CancelledError, InputError, RhythmapError
from .options import DEFAULT_RATE_RANGE_BPM, validate_options, validate_rate_range
from .reference import reference_from_theta
from .result import RhythmResult
from .stack import Stack, open_stack

#: Bytes of working memory per pixel per frame while a tile is analysed: the
#: input (2 for uint16), its float32 copy, the pooling accumulator and the
#: pooled traces (4 each); the spectral kernel then works on blocks of about a
#: thousand traces, which adds little.
WORK_BYTES_PER_SAMPLE = 14

TILE_TASK_PREFIX = "rhythmap-tile"

ProgressFn = Callable[[int, int, str], Any]


@dataclass(frozen=True)
class Progress:
    """One progress tick: ``done`` of ``total`` units of the whole analysis, in ``stage``."""

    done: int
    total: int
    stage: str


@dataclass(frozen=True)
class TilePlan:
    """How a (T, Y, X) stack is cut into full-time tiles."""

    tile_shape: tuple[int, int]
    chunks: tuple[tuple[int, ...], tuple[int, ...]]
    halo: int
    n_tiles: int
    aligned: bool  # tiles are unions of whole input chunks spanning all of T


def plan_tiles(shape, input_chunks, *, memory_budget_mb: float, halo: int,
               n_parallel: int | None = None, min_tiles: int = 1) -> TilePlan:
    """Choose a tile shape (ty, tx) from a memory budget and the input's chunks.

    The budget is shared by the tiles analysed at once (one per worker
    thread); a tile gets ``budget / n_parallel`` bytes, i.e. about
    ``budget / (n_parallel * T * WORK_BYTES_PER_SAMPLE)`` pixels. When the input
    chunks already span the whole time axis, tiles are made of whole chunks
    (or split them evenly) so no chunk is read twice.
    """
    t, y, x = (int(s) for s in shape)
    n_parallel = n_parallel or max(1, os.cpu_count() or 1)
    budget = memory_budget_mb * 2**20 / n_parallel
    max_px = max(64, int(budget / (t * WORK_BYTES_PER_SAMPLE)))
    side = max(8, int(math.sqrt(max_px)))
    cy, cx = (int(c[0]) for c in input_chunks[1:])
    full_t = len(input_chunks[0]) == 1

    def pick(c, n):
        if not full_t:
            return min(n, side)
        if c <= side:
            return min(n, c * max(1, side // c))
        # the largest divisor of the chunk that fits, so tiles never straddle chunks
        return max(d for d in range(1, side + 1) if c % d == 0)

    ty, tx = pick(cy, y), pick(cx, x)
    # Keep the area within budget when one axis is short.
    if ty * tx > max_px * 2:
        if ty >= tx:
            ty = max(1, max_px // tx)
        else:
            tx = max(1, max_px // ty)
    # Enough tiles to keep every worker busy (a cluster has more threads than the budget assumes).
    while math.ceil(y / ty) * math.ceil(x / tx) < min_tiles and max(ty, tx) > 2 * (halo + 8):
        if ty >= tx:
            ty = math.ceil(ty / 2)
        else:
            tx = math.ceil(tx / 2)
    ty, tx = max(ty, halo + 1, 1), max(tx, halo + 1, 1)
    chunks = (_split(y, ty, halo + 1), _split(x, tx, halo + 1))
    aligned = full_t and all(len(set(c)) <= 2 for c in input_chunks[1:]) and (ty % cy == 0 or cy % ty == 0) \
        and (tx % cx == 0 or cx % tx == 0)
    return TilePlan((ty, tx), chunks, halo, len(chunks[0]) * len(chunks[1]), aligned)


def _active_client():
    """The active dask.distributed client, or None. A client exists only once distributed has
    been imported, so a plain run does not pay the import (about 0.4 s) to find there is none."""
    if "distributed" not in sys.modules:
        return None
    try:
        from distributed import default_client

        return default_client()
    except (ImportError, ValueError):
        return None


def _parallelism() -> tuple[int, int]:
    """(tiles analysed at once in one process, threads in all): from the active
    dask.distributed client when there is one, else this machine's cores."""
    client = _active_client()
    if client is not None:
        threads = client.nthreads()
        if threads:
            return max(threads.values()), sum(threads.values())
    n = max(1, os.cpu_count() or 1)
    return n, n


def _split(n, size, min_last=1):
    """Cut n into pieces of ``size``; a last piece shorter than ``min_last`` joins the one before
    (a tile's neighbours give it strips ``halo`` deep, so no tile may be shallower)."""
    full, rest = divmod(n, size)
    parts = [size] * full + ([rest] if rest else [])
    if len(parts) > 1 and parts[-1] < min_last:
        last = parts.pop()  # (not `parts[-2] += parts.pop()`: the index is taken before the pop)
        parts[-1] += last
    return tuple(parts)


def _pass_tasks(data: da.Array, tiles: TilePlan, fn, tile_kwargs=None, **kwargs) -> list:
    """One delayed ``fn(pieces, y0, x0, **kwargs)`` per tile of a pass, built as one plain graph.

    ``pieces`` is a 3 x 3 grid (rows top, middle, bottom): the tile itself in
    the middle and, around it, the ``halo``-wide strips and corners of its
    neighbours, with the image's edge rows and columns repeated where there
    is no neighbour. The kernels read the pieces where they lie
    (:class:`PaddedTile`) instead of a halo-padded copy of every tile, which
    cost a copy of the whole stack per pass. ``tile_kwargs(y0, x0, ty, tx)``
    adds keyword arguments of one tile. Tile keys start with
    ``TILE_TASK_PREFIX`` so progress can count them. The graph is written
    directly (not through ``dask.delayed`` calls, which cost ~5 ms a tile).
    """
    import functools

    from dask.delayed import Delayed

    t = data.shape[0]
    x = data.rechunk((t,) + tiles.chunks)
    graph = dict(x.__dask_graph__())
    blocks = x.__dask_keys__()[0]
    h = tiles.halo
    n_y, n_x = len(tiles.chunks[0]), len(tiles.chunks[1])
    y_offsets = np.concatenate([[0], np.cumsum(tiles.chunks[0])[:-1]])
    x_offsets = np.concatenate([[0], np.cumsum(tiles.chunks[1])[:-1]])
    token = dask.base.tokenize(x.name, fn.__name__, kwargs)

    def edge(n_blocks, i, d):
        """Which block and which of its rows (or columns) form the piece in direction d (-1, 0, 1)."""
        if d == 0:
            return i, slice(None)
        j = i + d
        if 0 <= j < n_blocks:
            return j, (slice(-h, None) if d < 0 else slice(0, h))
        return i, ([0] * h if d < 0 else [-1] * h)  # no neighbour: repeat the edge

    tasks = []
    for iy, y0 in enumerate(y_offsets):
        for ix, x0 in enumerate(x_offsets):
            y0, x0, ty, tx = int(y0), int(x0), tiles.chunks[0][iy], tiles.chunks[1][ix]
            if h == 0:
                pieces = blocks[iy][ix]
            else:
                pieces = []
                for dy in (-1, 0, 1):
                    row = []
                    by, rows = edge(n_y, iy, dy)
                    for dx in (-1, 0, 1):
                        bx, cols = edge(n_x, ix, dx)
                        if dy or dx:
                            strip = (f"rhythmap-strip-{token}", iy, ix, dy + 1, dx + 1)
                            graph[strip] = (_strip, blocks[by][bx], rows, cols)
                            row.append(strip)
                        else:
                            row.append(blocks[by][bx])
                    pieces.append(row)
            extra = tile_kwargs(y0, x0, ty, tx) if tile_kwargs else {}
            key = f"{TILE_TASK_PREFIX}-{fn.__name__}-{token}-{iy}-{ix}"
            graph[key] = (functools.partial(fn, **kwargs, **extra), pieces, y0, x0)
            tasks.append(key)
    return [Delayed(key, graph) for key in tasks]


def _strip(block, rows, cols):
    """A copy (not a view) of a block's edge strip: a view would keep the whole
    neighbouring block in memory until this tile is done."""
    return np.array(np.asarray(block)[:, rows][:, :, cols])


class PaddedTile:
    """A tile with its halo, held as the 3 x 3 pieces of :func:`_pass_tasks` (or one padded array).

    :meth:`band_pieces` gives the three column pieces (left strip, tile,
    right strip) that a band of output rows is pooled from: inside the tile
    the middle row of pieces where it lies; for the bands that reach the top
    or bottom strip, those rows copied into three small buffers. Pooling
    them gives exactly the numbers of pooling one padded array.
    """

    def __init__(self, pieces, halo: int):
        self.halo = halo
        if halo == 0 and not isinstance(pieces, (tuple, list)):  # no halo: the tile alone, strips of width 0
            tile = np.ascontiguousarray(pieces)
            t, ty, tx = tile.shape
            edge = np.empty((t, 0, 0), tile.dtype)
            side = np.empty((t, ty, 0), tile.dtype)
            pieces = ((edge, np.empty((t, 0, tx), tile.dtype), edge), (side, tile, side),
                      (edge, np.empty((t, 0, tx), tile.dtype), edge))
        if isinstance(pieces, (tuple, list)):
            center = np.asarray(pieces[1][1])
            # one array type for the compiled loops: C order, the tile's dtype (strips are small)
            self.grid = tuple(tuple(np.ascontiguousarray(p, dtype=center.dtype) for p in row) for row in pieces)
            t, ty, tx = center.shape
            self.shape = (t, ty + 2 * halo, tx + 2 * halo)
            self.dtype = center.dtype
            self.padded = None
        else:
            self.grid = None
            self.padded = np.asarray(pieces)
            self.shape = self.padded.shape
            self.dtype = self.padded.dtype
        self._bufs = None

    def arrays(self):
        """Every array holding the tile's values (for checks over all of them)."""
        if self.grid is None:
            return [self.padded]
        return [p for row in self.grid for p in row]

    def band_pieces(self, r0: int, r1: int):
        """(left, middle, right, y_start): C-order column pieces whose rows y_start + i .. y_start + i + 2 halo
        are padded rows r0 + i .. r0 + i + 2 halo, for the output rows r0 .. r1 - 1 (i < r1 - r0)."""
        h = self.halo
        t, hy, width = self.shape
        ty = hy - 2 * h
        if self.grid is not None and r0 >= h and r1 + h <= ty:  # inside the tile: the pieces where they lie
            left, middle, right = self.grid[1]
            return left, middle, right, r0 - h
        n = r1 - r0 + 2 * h
        if self._bufs is None or self._bufs[1].shape[1] != n:
            self._bufs = tuple(np.empty((t, n, w), self.dtype) for w in (h, width - 2 * h, h))
        parts = self._bufs
        if self.grid is None:
            for part, (c0, c1) in zip(parts, ((0, h), (h, width - h), (width - h, width))):
                part[...] = self.padded[:, r0:r0 + n, c0:c1]
            return parts + (0,)
        # padded row p comes from the top strip (p < h), the tile (h <= p < h + ty) or the bottom strip
        for band, lo, hi in ((0, 0, h), (1, h, h + ty), (2, h + ty, hy)):
            a, b = max(r0, lo), min(r0 + n, hi)
            if a < b:
                for part, piece in zip(parts, self.grid[band]):
                    part[:, a - r0:b - r0] = piece[:, a - lo:b - lo]
        return parts + (0,)


# ------------------------------------------------------------------ kept spectra
def _band_rows(tx: int, columns: int) -> int:
    """Rows of a tile tx pixels wide that the maps kernel pools and transforms together (about ``columns`` traces)."""
    return max(1, columns // tx)


@dataclass(frozen=True)
class KeptSpectra:
    """A temporary file holding, for every pixel, bins ``band`` of its detrended spectrum.

    The maps pass transforms a tile one band of rows at a time and writes
    each band's block as soon as it is made; the phase stage reads the bins
    it needs back instead of reading (and pooling, and detrending) the stack
    again. A band of q pixels is stored as (2, n_bins, q) 16-bit integers
    (real parts, then imaginary parts), each pixel under its own scale (block
    floating point: its largest value becomes 32767), followed by the q
    step sizes (largest / 32767) as float32
    (:func:`rhythmap._loops.pack_fixed`): half the bytes of float32 (writing
    them into the page cache was most of the cost of keeping them), every
    value within 1.5e-5 of its pixel's largest. Tiles
    are laid out row of tiles by row of tiles, so a tile at (y0, x0) of
    height ty starts at pixel y0 * width + x0 * ty; its bands
    (:meth:`band_rows` rows each, the last one shorter) follow one another.
    Plain positioned reads and writes: any thread or process on this machine
    may use it, and it is held by the page cache, not by the process.
    """

    path: str
    band: tuple[int, int]
    width: int
    band_columns: int = spectral.FFT_BLOCK_COLUMNS

    @property
    def n_bins(self) -> int:
        return self.band[1] - self.band[0]

    @property
    def bytes_per_pixel(self) -> int:
        return self.pixel_bytes(self.n_bins)

    @staticmethod
    def pixel_bytes(n_bins: int) -> int:
        """Bytes a pixel takes: its real and imaginary parts at 16 bits, and its float32 step size."""
        return 2 * n_bins * 2 + 4

    def _band_parts(self, raw: np.ndarray, q: int) -> tuple[np.ndarray, np.ndarray]:
        """Views of one band's bytes: its (2, n_bins, q) 16-bit parts and its q step sizes."""
        split = 2 * 2 * self.n_bins * q
        return raw[:split].view(np.int16).reshape(2, self.n_bins, q), raw[split:split + 4 * q].view(np.float32)

    def band_rows(self, tx: int) -> int:
        """Rows of a tile tx pixels wide transformed (and kept) together."""
        return _band_rows(tx, self.band_columns)

    def offset(self, y0: int, x0: int, ty: int) -> int:
        """Byte offset of the tile at (y0, x0) of height ty."""
        return self.bytes_per_pixel * (y0 * self.width + x0 * ty)

    def write(self, offset: int, block: np.ndarray, fd: int | None = None) -> None:
        """Store a band's (2, n_bins, q) float32 block at ``offset``, in one positioned write
        (through ``fd``, the file opened for writing, when given: a tile opens it once)."""
        q = block.shape[2]
        raw = np.empty(self.bytes_per_pixel * q, np.uint8)
        _loops.pack_fixed(np.ascontiguousarray(block, np.float32), *self._band_parts(raw, q))
        own = fd is None
        if own:
            fd = os.open(self.path, os.O_WRONLY)
        try:
            view = memoryview(raw)
            done = 0
            while done < len(view):
                done += os.pwrite(fd, view[done:], offset + done)
        finally:
            if own:
                os.close(fd)

    def read(self, offset: int, ty: int, tx: int, bins=None) -> np.ndarray:
        """A tile's kept bins, (2, n, ty * tx) float32: all of them, or only ``bins`` (i0, i1).

        The tile's whole block is read at once (one system call, not three a
        band) and unpacked band by band in a compiled loop.
        """
        i0, i1 = bins if bins is not None else (0, self.n_bins)
        n_px, step = ty * tx, self.band_rows(tx) * tx
        raw = np.empty(self.bytes_per_pixel * n_px, np.uint8)
        view = memoryview(raw)
        with open(self.path, "rb", buffering=0) as f:
            f.seek(offset)
            done = 0
            while done < len(view):
                got = f.readinto(view[done:])
                if not got:
                    raise KernelError(f"the kept spectra file {self.path} is shorter than expected")
                done += got
        out = np.empty((2, i1 - i0, n_px), np.float32)
        for p0 in range(0, n_px, step):
            q = min(step, n_px - p0)
            packed, steps = self._band_parts(raw[self.bytes_per_pixel * p0:], q)
            _loops.unpack_fixed(packed, i0, steps, out, p0)
        return out


def _keep_spectra(shape, band, cleanup, client) -> tuple[KeptSpectra | None, str]:
    """A :class:`KeptSpectra` for a (T, Y, X) stack, or None and why the phase stage must re-read the stack."""
    import shutil
    import socket
    import tempfile

    _, y, x = shape
    need = KeptSpectra.pixel_bytes(band[1] - band[0]) * y * x
    if not hasattr(os, "pwrite"):
        return None, "this system has no positioned file writes"
    if client is not None:
        # Tiles run on the cluster's workers: they must all share this machine's disk.
        from distributed.comm import get_address_host

        local = {"127.0.0.1", "localhost", "::1", socket.gethostname()}
        try:
            local.add(socket.gethostbyname(socket.gethostname()))
        except OSError:
            pass
        hosts = {get_address_host(addr) for addr in client.nthreads()}  # every worker, however many
        if not hosts or not hosts <= local:
            return None, "the cluster's workers are not all on this machine"
    base = dask.config.get("temporary-directory", None) or tempfile.gettempdir()
    try:
        free = shutil.disk_usage(base).free
    except OSError as exc:
        return None, f"no usable temporary directory ({exc})"
    if free < need * 1.1 + 256 * 2**20:
        return None, (f"{need / 2**30:.2f} GiB of kept spectra would not fit in {base} "
                      f"({free / 2**30:.2f} GiB free)")
    folder = tempfile.mkdtemp(prefix="rhythmap-spectra-", dir=base)
    cleanup.callback(shutil.rmtree, folder, ignore_errors=True)
    # also at exit if the run is abandoned without being closed
    weakref.finalize(cleanup, shutil.rmtree, folder, ignore_errors=True)
    path = os.path.join(folder, "kept.f32")
    try:
        with open(path, "wb") as f:
            if hasattr(os, "posix_fallocate"):  # reserve the space now: no disk-full error mid-pass
                os.posix_fallocate(f.fileno(), 0, need)
            else:
                f.truncate(need)
    except OSError as exc:
        shutil.rmtree(folder, ignore_errors=True)
        return None, f"the kept spectra file could not be made in {base} ({exc})"
    return KeptSpectra(path, tuple(int(v) for v in band), int(x), spectral.FFT_BLOCK_COLUMNS), ""


def _kept_tasks(keep: KeptSpectra, tiles: TilePlan, fn, tile_kwargs, **kwargs) -> list:
    """One delayed ``fn(y0, x0, ty, tx, keep=, keep_offset=, ...)`` per tile, reading the kept spectra only."""
    import functools

    from dask.delayed import Delayed

    token = dask.base.tokenize(keep.path, fn.__name__, kwargs)
    graph, keys = {}, []
    y_offsets = np.concatenate([[0], np.cumsum(tiles.chunks[0])[:-1]])
    x_offsets = np.concatenate([[0], np.cumsum(tiles.chunks[1])[:-1]])
    for iy, y0 in enumerate(y_offsets):
        for ix, x0 in enumerate(x_offsets):
            y0, x0, ty, tx = int(y0), int(x0), tiles.chunks[0][iy], tiles.chunks[1][ix]
            key = f"{TILE_TASK_PREFIX}-{fn.__name__}-{token}-{iy}-{ix}"
            graph[key] = (functools.partial(fn, keep=keep, keep_offset=keep.offset(y0, x0, ty), **kwargs,
                                            **tile_kwargs(y0, x0, ty, tx)), y0, x0, ty, tx)
            keys.append(key)
    return [Delayed(key, graph) for key in keys]


# ------------------------------------------------------------------ kernels
class KernelError(RuntimeError):
    """An unexpected failure inside one of rhythmap's own tile kernels (a bug, not bad input)."""


def _kernel(fn):
    """Mark a tile kernel: its own unexpected errors become KernelError, so a failure of the
    *reading* tasks (a truncated or corrupt file) can be told apart and reported as bad input."""
    import functools

    @functools.wraps(fn)
    def run(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except (RhythmapError, KernelError):
            raise
        except Exception as exc:
            raise KernelError(f"{fn.__name__} failed: {exc!r}") from exc

    return run


@_kernel
def maps_tile_kernel(block, y0, x0, *, halo, plan, basis, gram_bin, keep=None, keep_offset=0):
    """Pass 1 on one tile: spectral maps and the binned traces of detected pixels.

    ``block`` is the tile's 3 x 3 pieces from :func:`_pass_tasks` or one
    array padded by ``halo`` on each side. The tile is pooled and transformed
    one band of rows at a time (about
    ``spectral.FFT_BLOCK_COLUMNS`` pixels), so a band's traces stay in cache
    from pooling to peak search. Traces are not detrended in time: the
    spectral kernel removes the trend in the frequency domain, the Gram bins
    are detrended once on the driver, and pass 2 folds the detrending into its
    lock-in basis (all cheaper than detrending every pixel).

    Returns a dict with ``maps`` (n_maps, ty, tx) float32 in the order of
    ``PASS1_KEYS``, and, unless ``gram_bin`` is None, ``bins`` (global bin
    ids), ``bin_sums`` (T, n_bins) float32 and ``bin_counts`` for the Gram
    matrix.

    With ``keep`` (a :class:`KeptSpectra`), the band of each pixel's
    detrended spectrum that the lock-in needs is also written, band of rows
    by band of rows, to the kept spectra's file from ``keep_offset`` on (so
    the phase stage need not read the stack again).
    """
    tile = PaddedTile(block, halo)
    if np.issubdtype(tile.dtype, np.floating) and not all(np.isfinite(a).all() for a in tile.arrays()):
        bad = np.unique(np.concatenate([np.nonzero(~np.isfinite(a).all(axis=(1, 2)))[0] for a in tile.arrays()]))
        raise InputError(
            f"the stack holds NaN or infinite values (frames {bad[:5].tolist()}{' ...' if bad.size > 5 else ''} "
            f"near pixel y={y0}, x={x0}); rhythmap needs finite intensities. Replace or drop those frames "
            "(e.g. interpolate them from their neighbours) and run again.")
    t, hy, hx = tile.shape
    ty, tx = hy - 2 * halo, hx - 2 * halo
    maps = np.empty((len(PASS1_KEYS), ty, tx), np.float32)
    bins = None if gram_bin is None else _TileBins(t, ty, tx, y0, x0, gram_bin)
    kernel = spectral.SpectralKernel(plan, basis, keep_band=None if keep is None else keep.band)
    # the kept spectra's file was laid out with the band width of its own making
    band_rows = min(ty, _band_rows(tx, spectral.FFT_BLOCK_COLUMNS) if keep is None else keep.band_rows(tx))
    pooled = np.empty(t * band_rows * tx, np.float32)  # one buffer for every band
    kept_buf = None if keep is None else np.empty(2 * keep.n_bins * band_rows * tx, np.float32)
    with contextlib.ExitStack() as stack:
        if keep is not None:
            fd = os.open(keep.path, os.O_WRONLY)
            stack.callback(os.close, fd)
        for r0 in range(0, ty, band_rows):
            r1 = min(ty, r0 + band_rows)
            left, middle, right, y = tile.band_pieces(r0, r1)
            band = pooled[:t * (r1 - r0) * tx].reshape(t, r1 - r0, tx)
            kept = None if keep is None else kept_buf[:2 * keep.n_bins * (r1 - r0) * tx].reshape(2, keep.n_bins, -1)
            out = kernel.pooled_maps(left, middle, right, halo, y, y + r1 - r0, band, kept)
            traces = band.reshape(t, -1)
            if kept is not None:  # written now, while the band's block is still in cache
                keep.write(keep_offset + keep.bytes_per_pixel * r0 * tx, kept, fd)
            maps[:, r0:r1] = out.reshape(len(PASS1_KEYS), r1 - r0, tx)
            if bins is not None:
                bins.add(traces, out[PASS1_KEYS.index("detected")] > 0, r0, r1)
    result = {"y0": y0, "x0": x0, "maps": maps}
    if bins is not None:
        result.update(bins.finish())
    return result


class _TileBins:
    """Sums of the detected traces over the global b x b bins that a tile touches.

    Bins are laid on the whole image (bin (i, j) covers rows i*b.. and columns
    j*b..), so a bin cut by a tile edge is completed by the neighbouring tile
    when the driver adds the tiles' sums.
    """

    def __init__(self, t, ty, tx, y0, x0, b):
        self.y0, self.x0, self.b = y0, x0, b
        oy, ox = y0 % b, x0 % b
        self.ny, self.nx = -(-(oy + ty) // b), -(-(ox + tx) // b)
        self.row_bin = (np.arange(ty) + oy) // b
        self.col_bin = (np.arange(tx) + ox) // b
        self.tx = tx
        self.sums = np.zeros((t, self.ny * self.nx), np.float32)
        self.counts = np.zeros(self.ny * self.nx, np.int64)

    def add(self, traces, detected, r0, r1):
        """Add the band of rows r0:r1 ((T, (r1 - r0) * tx) traces, their detection flags)."""
        rows = r1 - r0
        _loops.add_band_to_bins(traces.reshape(-1, rows, self.tx), detected.astype(np.float32).reshape(rows, self.tx),
                                self.row_bin[r0:r1], self.col_bin, self.nx, self.sums)
        local = (self.row_bin[r0:r1, None] * self.nx + self.col_bin[None, :]).ravel()
        self.counts += np.bincount(local[detected], minlength=self.counts.size)

    def finish(self):
        """``bins`` (global ids), ``bin_sums`` (T, n) and ``bin_counts`` of the bins holding a detected pixel."""
        by, bx = np.divmod(np.arange(self.ny * self.nx), self.nx)
        ids = ((by + self.y0 // self.b).astype(np.int64) << 32) + (bx + self.x0 // self.b)
        keep = self.counts > 0
        return {"bins": ids[keep], "bin_sums": np.ascontiguousarray(self.sums[:, keep]),
                "bin_counts": self.counts[keep]}


PASS1_KEYS = spectral.MAP_KEYS


#: Pixels converted to float32 and projected at once in pass 2: the converted
#: block stays in cache for the matrix product, and no tile-sized copy is made.
PROJECT_STEP_PX = 2048


def _project(stacked, block) -> np.ndarray:
    """``stacked @ block`` over time for a (T, a, b) block of any number type: (R, a, b) float32.

    Converted to float32 ``PROJECT_STEP_PX`` pixels at a time in one reused
    buffer, so no float copy of the whole block is made.
    """
    t, a, b = block.shape
    raw = np.ascontiguousarray(block).reshape(t, a * b)
    proj = np.empty((stacked.shape[0], a * b), np.float32)
    buf = np.empty((t, min(PROJECT_STEP_PX, a * b)), np.float32)
    for p0 in range(0, a * b, PROJECT_STEP_PX):
        p1 = min(a * b, p0 + PROJECT_STEP_PX)
        part = buf[:, :p1 - p0]
        np.copyto(part, raw[:, p0:p1], casting="unsafe")
        np.matmul(stacked, part, out=proj[:, p0:p1])
    return proj.reshape(-1, a, b)


@_kernel
def phase_tile_kernel(block, y0, x0, *, halo, labels, lockin_bases, dominant):
    """Pass 2 on one tile: lock-in phase and coherence of every pixel against its region's reference.

    Pixels outside every region get a coherence against the dominant
    (largest) region's reference, and no phase. The lock-in bases have the
    trend components projected out, so B x equals B times the detrended x.
    """
    tile = PaddedTile(block, halo)
    t, hy, hx = tile.shape
    ty, tx = hy - 2 * halo, hx - 2 * halo
    lab = labels.ravel()
    present = np.unique(lab).tolist()
    refs = sorted({label if label in lockin_bases else dominant for label in present})
    # Lock-in is linear in the trace: project every pixel (halo included) on
    # every basis needed here, then pool the few projected rows instead of every frame.
    stacked = np.concatenate([lockin_bases[r] for r in refs])
    if tile.grid is None:
        proj = _project(stacked, tile.padded)
    else:
        proj = np.empty((stacked.shape[0], hy, hx), np.float32)
        spans = ((0, halo), (halo, halo + ty), (halo + ty, hy)), ((0, halo), (halo, halo + tx), (halo + tx, hx))
        for (r0, r1), row in zip(spans[0], tile.grid):
            for (c0, c1), piece in zip(spans[1], row):
                proj[:, r0:r1, c0:c1] = _project(stacked, piece)
    pooled_by_ref: dict = {}
    start = 0
    for ref_label in refs:
        n_rows = lockin_bases[ref_label].shape[0]
        pooled_by_ref[ref_label] = preprocess.box_pool(proj[start:start + n_rows], halo).reshape(n_rows, ty * tx)
        start += n_rows
    return _lockin_tile(y0, x0, ty, tx, lab, present, pooled_by_ref, lockin_bases, dominant)


@_kernel
def kept_phase_tile_kernel(y0, x0, ty, tx, *, keep, keep_offset, labels, lockin_bases, band_weights, dominant,
                           bins=None):
    """The phase stage on one tile from the spectra the maps pass kept: no read of the stack.

    Each lock-in sum is one matrix product of the tile's kept bins with the
    reference's band weights (:func:`rhythmap.phase.band_lockin_weights`);
    the kept spectra are of the pooled, detrended traces, so nothing else is
    needed. Same results as :func:`phase_tile_kernel` up to the band leak
    checked by the engine. ``bins`` (i0, i1): read only kept bins i0..i1-1
    (the weights are for those).
    """
    spectra = keep.read(keep_offset, ty, tx, bins)
    spectra = spectra.reshape(2 * spectra.shape[1], ty * tx)
    lab = labels.ravel()
    present = np.unique(lab).tolist()
    refs = sorted({label if label in lockin_bases else dominant for label in present})
    projected = {r: band_weights[r] @ spectra for r in refs}
    return _lockin_tile(y0, x0, ty, tx, lab, present, projected, lockin_bases, dominant)


def _lockin_tile(y0, x0, ty, tx, lab, present, pooled_by_ref, lockin_bases, dominant):
    """Phase and coherence of a tile's pixels from their lock-in sums against each reference needed.

    A pixel is locked in against its region's reference, or the dominant one
    outside any region with a reference (coherence only: no phase there).
    Pixels are grouped by reference; a tile that needs one reference (the
    usual case) is done in one piece, with no copies of its columns.
    """
    phase = np.full(ty * tx, np.nan, np.float32)
    coh = np.full(ty * tx, np.nan, np.float32)
    by_ref: dict[int, list[int]] = {}
    for label in present:
        by_ref.setdefault(label if label in lockin_bases else dominant, []).append(label)
    for ref_label, labels in by_ref.items():
        sel = slice(None) if len(by_ref) == 1 else np.isin(lab, labels)
        ph, c, _ = phase_mod.lockin_from_projection(pooled_by_ref[ref_label][:, sel], lockin_bases[ref_label])
        coh[sel] = c
        phase[sel] = ph
    without = [label for label in present if label not in lockin_bases]
    if without:  # no reference of their own: no phase
        phase[np.isin(lab, without)] = np.nan
    return {"y0": y0, "x0": x0, "phase": phase.reshape(ty, tx), "coherence": coh.reshape(ty, tx)}


# ------------------------------------------------------------------ running graphs
def _run_tiles(tasks, on_tile: Callable[[], None], cancel: Callable[[], bool] | None):
    """Compute per-tile delayed results in one graph, ticking ``on_tile`` per finished tile."""
    client = _active_client()
    if client is not None:
        from distributed import as_completed

        futures = client.compute(tasks)
        index = {f.key: i for i, f in enumerate(futures)}
        results = [None] * len(futures)
        try:
            for fut in as_completed(futures):
                results[index[fut.key]] = fut.result()
                on_tile()
                if cancel is not None and cancel():
                    raise CancelledError("the analysis was cancelled")
        finally:
            client.cancel([f for f in futures if not f.done()])
        return results

    from dask.callbacks import Callback

    class _Ticks(Callback):
        def _posttask(self, key, result, dsk, state, worker_id):
            name = key[0] if isinstance(key, tuple) else key
            if str(name).startswith(TILE_TASK_PREFIX):
                on_tile()
                if cancel is not None and cancel():
                    raise CancelledError("the analysis was cancelled")

    # Passed to this call only, so concurrent analyses do not see each other's ticks.
    # One BLAS thread per tile thread: the kernels' small matrix products gain
    # nothing from more, and two pools of BLAS threads fighting over the same
    # cores nearly halved the speed of a pass (measured).
    from threadpoolctl import threadpool_limits

    # One tile thread per core, set explicitly: from any thread but the main one
    # dask makes a pool of Python's default size, cores + 4 (6 on 2 cores),
    # and the pass always runs in a thread of its own (_drain). Six tiles at
    # once on two cores cost a quarter more time than two (measured).
    with threadpool_limits(limits=1, user_api="blas"):
        return list(dask.compute(*tasks, scheduler="threads", num_workers=_parallelism()[0],
                                 callbacks=[_Ticks()._callback]))


# ------------------------------------------------------------------ public entry points
def iter_analyze(stack, rate_range_bpm, *, cancel: Callable[[], bool] | None = None,
                 **options) -> Iterator[Progress]:
    """Run the analysis step by step, yielding :class:`Progress` ticks.

    A generator for interactive front ends: every tick is a point where the
    caller may stop (``close()`` the generator, or let ``cancel()`` return
    True, which raises :class:`~rhythmap.errors.CancelledError`). The
    :class:`RhythmResult` is the generator's return value
    (``StopIteration.value``); :func:`analyze` is the plain-call version.

    Parameters and raised errors are those of :func:`analyze`.
    """
    with contextlib.ExitStack() as cleanup:  # temporary files go however the run ends
        return (yield from _iter_analyze(stack, rate_range_bpm, cancel, cleanup, options))


def _iter_analyze(stack, rate_range_bpm, cancel, cleanup, options):
    if not isinstance(stack, Stack):
        stack = open_stack(stack)
    opts = validate_options(options)
    specimen = presets.get_specimen(opts["specimen"]) if opts["specimen"] else None
    if rate_range_bpm is None:
        rate_range_bpm = specimen.rate_range_bpm if specimen else DEFAULT_RATE_RANGE_BPM
    lo_hi = validate_rate_range(rate_range_bpm)
    t_start = time.perf_counter()
    timings: dict[str, float] = {}
    t, y, x = stack.shape
    plan = spectral.plan_spectrum(t, stack.frame_interval_s, lo_hi, false_alarm=opts["false_alarm"],
                                  min_cycles=opts["min_cycles"],
                                  trend_cutoff_fraction=opts["trend_cutoff_fraction"])
    cutoff_hz = opts["trend_cutoff_fraction"] * lo_hi[0] / 60.0
    basis = preprocess.trend_basis(t, stack.frame_interval_s, cutoff_hz)
    halo = opts["pooling_radius_px"]
    if halo and (y <= 2 * halo or x <= 2 * halo):
        raise InputError(f"pooling_radius_px={halo} is too large for frames of {y} x {x} pixels; "
                         f"use at most {max(0, (min(y, x) - 1) // 2)}.")
    n_parallel, total_threads = _parallelism()
    tiles_plan = plan_tiles(stack.data.shape, stack.data.chunks, memory_budget_mb=opts["memory_budget_mb"],
                            halo=halo, n_parallel=n_parallel, min_tiles=2 * total_threads)
    if not tiles_plan.aligned and stack.data.nbytes > opts["memory_budget_mb"] * 2**20:
        warnings.warn(
            f"{stack.source}: the input's chunks do not hold the whole time axis {stack.data.chunks[0][:3]}..., "
            "so the stack is regrouped in memory while it is read. For large stacks convert it once "
            "with `rhythmap convert STACK OUT.ome.zarr` and analyse the converted copy.", stacklevel=2)
    gram_bin = max(1, math.ceil(math.sqrt(y * x / opts["gram_max_pixels"])))
    total = tiles_plan.n_tiles
    if not opts["maps_only"]:
        _preload_later_stages()
    yield Progress(0, total, "maps")
    # a maps-only run needs no Gram bins
    tile_bin = None if opts["maps_only"] else gram_bin
    keep, phase_source = None, "no phase stage (maps only)"
    if not opts["maps_only"]:
        if opts["phase_from_kept_spectra"]:
            band = phase_mod.kept_band_bins((lo_hi[0] / 60.0, lo_hi[1] / 60.0), plan.bin_hz, plan.n_bins)
            keep, phase_source = _keep_spectra(stack.data.shape, band, cleanup, _active_client())
        else:
            phase_source = "phase_from_kept_spectra is off"
    tasks = _pass_tasks(stack.data, tiles_plan, maps_tile_kernel,
                        None if keep is None else (lambda y0, x0, ty, tx: {"keep_offset": keep.offset(y0, x0, ty)}),
                        halo=halo, plan=plan, basis=basis, gram_bin=tile_bin, keep=keep)
    results = yield from _drain(tasks, "maps", cancel, stack.source)
    timings["maps_pass_s"] = time.perf_counter() - t_start

    maps = np.full((len(PASS1_KEYS), y, x), np.nan, np.float32)
    for r in results:
        ty, tx = r["maps"].shape[1:]
        maps[:, r["y0"]:r["y0"] + ty, r["x0"]:r["x0"] + tx] = r["maps"]
    m = dict(zip(PASS1_KEYS, maps))
    if np.all(m.pop("constant") > 0):
        raise InputError(
            f"{stack.source}: no pixel changes over time (the stack is constant), so there is no rhythm to "
            "measure. Check that the right file, channel or plane was opened.")
    detected = m["detected"] > 0
    warn: list[str] = []
    labels = regions_mod.segment(m["rate_bpm"], detected, bin_bpm=60.0 * plan.bin_hz,
                                 min_area_px=opts["min_area_px"])
    if halo:
        labels = regions_mod.relabel(regions_mod.trim_pooling_rim(labels, m["amplitude"], halo),
                                     opts["min_area_px"])
    coherence = np.full((y, x), np.nan, np.float32)
    phase_rad = np.full((y, x), np.nan, np.float32)
    delay_s = np.full((y, x), np.nan, np.float32)
    references: dict[int, Any] = {}
    if not opts["maps_only"] and labels.max() > 0:
        # ---------------------------------------------------------- references
        t_ref = time.perf_counter()
        region_ids = [int(v) for v in range(1, labels.max() + 1)]
        yield Progress(0, len(region_ids), "references")
        traces, bin_region = _gather_bins(results, labels, gram_bin)
        for r in results:  # the gathered copy is all that is needed from here on
            r.pop("bin_sums", None)
        traces = preprocess.detrend(traces, basis)
        jobs = {}
        for label in region_ids:
            cols = bin_region == label
            if cols.sum() < 1:
                warn.append(f"region {label}: too few pixels for a rhythm reference")
                continue
            rate = float(np.nanmedian(m["rate_bpm"][labels == label]))
            step = rhythm.decimation_for(t, 60.0 / rate / stack.frame_interval_s, opts["max_frames_topology"])
            if t // step > 2 * opts["max_frames_topology"]:
                warn.append(f"region {label}: the period ({60.0 / rate / stack.frame_interval_s:.1f} frames) is too "
                            f"short to decimate {t} frames for persistence; the step used {t // step} windows, "
                            "and its memory grows with their square. Analyse shorter segments if it runs out.")
            jobs[label] = (rhythm.region_reference, (traces[:, cols], stack.frame_interval_s, rate),
                           {"n_landmarks": opts["n_landmarks"], "max_frames": opts["max_frames_topology"]})
        n_done = 0
        for label, outcome in _run_in_processes(jobs, opts["worker_processes"]):
            n_done += 1
            if isinstance(outcome, InputError):
                warn.append(f"region {label}: no rhythm reference ({outcome})")
            elif isinstance(outcome, BaseException):
                raise outcome
            else:
                references[label] = outcome
            yield Progress(n_done, len(jobs), "references")
            if cancel is not None and cancel():
                raise CancelledError("the analysis was cancelled")
        if opts["tile_loop_map"]:
            yield Progress(0, 1, "loop map")
            extra_loop, failed = _tile_loop_map(traces, bin_region, results, labels, m["rate_bpm"], gram_bin,
                                                stack.frame_interval_s, opts)
            if failed:
                (ty0, tx0), why = failed[0]
                warn.append(f"loop-score map: {len(failed)} tile(s) of {TILE_LOOP_PX} px have no score "
                            f"(e.g. the tile at y={ty0 * TILE_LOOP_PX}, x={tx0 * TILE_LOOP_PX}: {why})")
            yield Progress(1, 1, "loop map")
        timings["references_s"] = time.perf_counter() - t_ref

    if not references and not opts["maps_only"]:
        phase_source = "no phase stage (no region with a rhythm reference)"
    if references:
        # ---------------------------------------------------------- phase stage: lock-in
        t_phase = time.perf_counter()
        frame_times = np.arange(t) * stack.frame_interval_s
        thetas = {label: phase_mod.smooth_over_period(
            phase_mod.theta_on_frames(ref.time_s, ref.theta_rad, frame_times),
            60.0 / ref.rate_mean_bpm / stack.frame_interval_s) for label, ref in references.items()}
        rows = {label: phase_mod.lockin_basis(th) for label, th in thetas.items()}
        # b . detrend(x) = detrend(b) . x: the second read locks raw traces in against detrended rows
        bases = {label: preprocess.detrend(r.T, basis).T for label, r in rows.items()}
        dominant = max(references, key=lambda lab: int((labels == lab).sum()))
        yield Progress(0, total, "phase")

        def tile_labels(y0, x0, ty, tx):
            return {"labels": labels[y0:y0 + ty, x0:x0 + tx]}

        if keep is not None:
            # the kept spectra are of detrended traces, so the plain rows (compact spectra) apply
            leak = max(phase_mod.band_lockin_weights(r, keep.band)[1] for r in rows.values())
            if leak <= phase_mod.MAX_BAND_LEAK:
                # read and multiply only the bins these references need
                use = phase_mod.narrowest_band(list(rows.values()), keep.band, NARROW_LEAK)
                weights = {label: phase_mod.band_lockin_weights(r, use) for label, r in rows.items()}
                leak = max(w[1] for w in weights.values())
            if leak > phase_mod.MAX_BAND_LEAK:
                phase_source = (f"the references' lock-in rows leave the kept band of the spectrum "
                                f"({leak:.1e} of their energy outside it)")
                with contextlib.suppress(OSError):
                    os.remove(keep.path)  # free the disk before reading the stack again
                keep = None
        if keep is not None:
            phase_source = (f"kept spectra (bins {use[0]}-{use[1] - 1} of {keep.band[0]}-{keep.band[1] - 1}, "
                            f"largest band leak {leak:.1e})")
            tasks2 = _kept_tasks(keep, tiles_plan, kept_phase_tile_kernel, tile_labels, lockin_bases=bases,
                                 band_weights={label: w[0] for label, w in weights.items()}, dominant=dominant,
                                 bins=(use[0] - keep.band[0], use[1] - keep.band[0]))
        else:
            phase_source = f"second read ({phase_source})"
            tasks2 = _pass_tasks(stack.data, tiles_plan, phase_tile_kernel, tile_labels,
                                 halo=halo, lockin_bases=bases, dominant=dominant)
        results2 = yield from _drain(tasks2, "phase", cancel, stack.source)
        for r in results2:
            ty, tx = r["phase"].shape
            sl = (slice(r["y0"], r["y0"] + ty), slice(r["x0"], r["x0"] + tx))
            phase_rad[sl] = r["phase"]
            coherence[sl] = r["coherence"]
        for label, ref in list(references.items()):
            inside = labels == label
            steady = inside & (coherence >= COHERENT)
            # the first coherent pixel after the empty part of the circle: no coherent pixel wraps
            phase0 = phase_mod.earliest_phase(phase_rad[steady if steady.any() else inside], quantile=0.0)
            # Count phase from the region's earliest pixels: its lag becomes 0, and a
            # beat is the moment the rhythm's fundamental peaks there.
            phase_rad[inside] = np.mod(phase_rad[inside] - phase0, 2 * np.pi)
            theta = thetas[label] - phase0
            references[label] = ref = reference_from_theta(
                frame_times, np.mod(theta, 2 * np.pi), diagram=ref.diagram, score=ref.score,
                second_loop_ratio=ref.second_loop_ratio, quasi_periodic=ref.quasi_periodic,
                window_frames=ref.window_frames, dim=ref.dim, tau=ref.tau)
            delay_s[inside] = phase_mod.activation_delay(phase_rad[inside], ref.mean_period_s, 0.0)
        timings["phase_pass_s"] = time.perf_counter() - t_phase

    extra = {"peak_score": m["peak_score"], "mean_intensity": m["mean"]}
    if opts["tile_loop_map"] and not opts["maps_only"] and labels.max() > 0:
        extra["loop_score_tiles"] = extra_loop
    prop: dict = {}
    if references:
        periods = {label: ref.mean_period_s for label, ref in references.items()}
        yield Progress(0, 1, "propagation")
        if cancel is not None and cancel():
            raise CancelledError("the analysis was cancelled")
        prop, vfield = propagation.region_propagation(delay_s, labels, periods, stack.pixel_size_um,
                                                      stack.frame_interval_s)
        yield Progress(1, 1, "propagation")
        extra["velocity_y_um_s"] = vfield[..., 0].astype(np.float32)
        extra["velocity_x_um_s"] = vfield[..., 1].astype(np.float32)
    table = regions_mod.region_table(labels, {"rate_bpm": m["rate_bpm"], "coherence": coherence,
                                              "amplitude": m["amplitude"]}, references,
                                     pixel_size_um=stack.pixel_size_um, propagation=prop)
    if specimen is not None:
        warn += presets.plausibility_warnings(specimen, table, stack.frame_interval_s)
    for ref_label, ref in references.items():
        if ref.quasi_periodic:
            warn.append(f"region {ref_label}: two strong loops (second-loop ratio {ref.second_loop_ratio:.2f}): "
                        "the motion looks quasi-periodic (two rhythms), not one beat")
    result = RhythmResult(
        rate_bpm=m["rate_bpm"], period_s=m["period_s"], amplitude=m["amplitude"],
        periodicity=m["periodicity"], coherence=coherence, phase_rad=phase_rad,
        delay_s=delay_s, regions=labels, region_table=table, references=references,
        frame_interval_s=stack.frame_interval_s, pixel_size_um=stack.pixel_size_um,
        parameters={"rate_range_bpm": list(lo_hi), **opts, "warnings": warn,
                    "gram_bin_px": gram_bin, "tile_shape_px": list(tiles_plan.tile_shape),
                    "phase_source": phase_source,
                    "velocity_unit": "um/s" if stack.pixel_size_um else "px/s"},
        input={"identity": stack.identity(), "meta": stack.meta, "shape": list(stack.shape)},
        timings={**timings, "total_s": time.perf_counter() - t_start},
        extra_maps=extra,
        version=__version__,
    )
    yield Progress(total, total, "done")
    return result


def _preload_later_stages() -> None:
    """Import the libraries of the stages after the maps pass in a background thread.

    ripser (which imports scikit-learn and scipy.stats) takes about a second to
    import, and the references stage used to wait for it after the pass. The
    tile threads release the GIL for most of their work, so the import runs
    beside them; on two busy cores it mostly moves into the pass (measured
    about even, DEVELOPERS.md). A failed import is left for the stage itself
    to report.
    """
    def load():
        for name in ("ripser", "skimage.restoration"):
            try:
                importlib.import_module(name)
            except Exception:  # noqa: BLE001 - reported where it is used
                pass

    if "ripser" not in sys.modules:
        threading.Thread(target=load, name="rhythmap-preload", daemon=True).start()


#: Energy share of the lock-in rows the phase stage may leave out when it reads fewer
#: of the kept bins (a tenth of phase.MAX_BAND_LEAK: the sums then stay within about
#: 0.3 % of their norms, and coherence within a few thousandths of the second read).
NARROW_LEAK = 1e-5

#: Pixels at least this coherent with their reference define the earliest phase of a region.
COHERENT = 0.5


_POOL = None


def _process_pool(n_workers: int):
    """A reusable pool of worker processes for ripser, which holds the GIL (DESIGN.md).

    Spawned, not forked (the caller may be a Qt application with threads), and
    created once per process on first use. None where a process may not have
    children (a daemonic worker), in which case work runs in this thread.
    """
    global _POOL
    import multiprocessing

    if n_workers < 1 or multiprocessing.current_process().daemon:
        return None
    if _POOL is None or _POOL[1] != n_workers:
        import atexit
        from concurrent.futures import ProcessPoolExecutor

        if _POOL is not None:
            _POOL[0].shutdown(wait=False, cancel_futures=True)
        pool = ProcessPoolExecutor(max_workers=n_workers, mp_context=multiprocessing.get_context("spawn"))
        atexit.register(pool.shutdown, wait=False, cancel_futures=True)
        _POOL = (pool, n_workers)
    return _POOL[0]


def _run_in_processes(jobs: dict, n_processes: int):
    """Run ``{key: (fn, args, kwargs)}``; yield (key, result or exception) as they end.

    On a dask.distributed cluster the jobs go to its workers; otherwise to a
    local pool of ``n_processes`` spawned processes, or to this thread when
    ``n_processes`` is 0 or processes cannot be started (a daemonic process, a
    script without a ``__main__`` guard: the remaining jobs then run here).
    """
    if not jobs:
        return
    client = _active_client()
    if client is not None:
        from distributed import as_completed

        futures = {client.submit(fn, *args, pure=False, **kwargs): key for key, (fn, args, kwargs) in jobs.items()}
        for fut in as_completed(list(futures)):
            try:
                yield futures[fut], fut.result()
            except Exception as exc:  # returned to the caller, which decides
                yield futures[fut], exc
        return
    pool = _process_pool(n_processes)
    pending = dict(jobs)
    if pool is not None:
        from concurrent.futures import as_completed as cf_completed
        from concurrent.futures.process import BrokenProcessPool

        futures = {pool.submit(fn, *args, **kwargs): key for key, (fn, args, kwargs) in jobs.items()}
        try:
            for fut in cf_completed(futures):
                try:
                    result = fut.result()
                except BrokenProcessPool:
                    _reset_pool()
                    warnings.warn("worker processes could not start (is the script missing an "
                                  "`if __name__ == \"__main__\":` guard?); running in this thread instead.",
                                  RuntimeWarning, stacklevel=2)
                    break
                except Exception as exc:
                    result = exc
                yield futures[fut], result
                pending.pop(futures[fut])
            else:
                return
        finally:
            for fut in futures:
                fut.cancel()
    for key, (fn, args, kwargs) in pending.items():
        try:
            yield key, fn(*args, **kwargs)
        except Exception as exc:
            yield key, exc


def _reset_pool():
    global _POOL
    if _POOL is not None:
        _POOL[0].shutdown(wait=False, cancel_futures=True)
    _POOL = None


def _tile_loop_map(traces, bin_region, results, labels, rate_map, gram_bin, frame_interval_s, opts):
    """Loop score of every TILE_LOOP_PX square tile, from the Gram bins inside it, in worker processes.

    Returns the (Y, X) map (NaN where a tile has no score) and the tiles whose
    score could not be computed, as ((tile row, tile column), reason) pairs;
    an error that is not a :class:`~rhythmap.errors.InputError` is raised.
    """
    ids = np.array(sorted({b for r in results for b in r["bins"].tolist()}), np.int64)
    by, bx = (ids >> 32) * gram_bin, (ids & 0xFFFFFFFF) * gram_bin
    tile_id = (by // TILE_LOOP_PX) * 1_000_000 + (bx // TILE_LOOP_PX)
    jobs = {}
    for tid in np.unique(tile_id).tolist():
        cols = (tile_id == tid) & (bin_region > 0)
        if cols.sum() < 2:
            continue
        ty, tx = divmod(tid, 1_000_000)
        block = rate_map[ty * TILE_LOOP_PX:(ty + 1) * TILE_LOOP_PX, tx * TILE_LOOP_PX:(tx + 1) * TILE_LOOP_PX]
        rate = float(np.nanmedian(block))
        if not np.isfinite(rate):
            continue
        jobs[(ty, tx)] = (rhythm.loop_score_of_traces, (traces[:, cols], frame_interval_s, rate),
                          {"n_landmarks": min(100, opts["n_landmarks"]),
                           "max_frames": opts["max_frames_topology"]})
    out = np.full(labels.shape, np.nan, np.float32)
    failed = []
    for (ty, tx), score in _run_in_processes(jobs, max(1, opts["worker_processes"])):
        if isinstance(score, InputError):
            failed.append(((ty, tx), str(score)))
        elif isinstance(score, BaseException):
            raise score
        else:
            out[ty * TILE_LOOP_PX:(ty + 1) * TILE_LOOP_PX, tx * TILE_LOOP_PX:(tx + 1) * TILE_LOOP_PX] = score
    return out, sorted(failed)


#: Edge of the tiles of the optional loop-score map, pixels.
TILE_LOOP_PX = 16


def _gather_bins(results, labels, gram_bin):
    """Mean trace of every Gram bin over all tiles, and the region each bin belongs to.

    Bins come out in the order of their global ids, whatever the tiling; a
    bin cut by a tile edge adds its parts in tile order. A tile's bins are
    runs of consecutive output columns (one run per row of bins), so they
    are copied as slices, not gathered column by column (which, with a
    reduction over mostly single parts, cost most of this step).
    """
    all_ids = np.concatenate([r["bins"] for r in results]) if results else np.zeros(0, np.int64)
    if all_ids.size == 0:
        return np.zeros((0, 0), np.float32), np.zeros(0, np.int32)
    ids = np.unique(all_ids)
    sums = np.empty((results[0]["bin_sums"].shape[0], ids.size), np.float32)
    counts = np.zeros(ids.size, np.int64)
    filled = np.zeros(ids.size, bool)
    for r in results:
        pos = np.searchsorted(ids, r["bins"])
        counts[pos] += r["bin_counts"]
        cuts = np.flatnonzero(np.diff(pos) != 1) + 1
        for a, b in zip(np.r_[0, cuts].tolist(), np.r_[cuts, pos.size].tolist()):
            out, part = sums[:, pos[a]:pos[a] + b - a], r["bin_sums"][:, a:b]
            new = ~filled[pos[a]:pos[a] + b - a]
            if new.all():
                out[...] = part
            elif not new.any():
                out += part
            else:
                out[:, new] = part[:, new]
                out[:, ~new] += part[:, ~new]
            filled[pos[a]:pos[a] + b - a] = True
    sums /= counts.astype(np.float32)
    return sums, regions_mod.bin_labels(labels, ids, gram_bin)


def _drain(tasks, stage, cancel, source="the stack"):
    """Run tasks in a worker thread while yielding one ``Progress(done, len(tasks), stage)`` per finished tile.

    The generator stays responsive: the graph runs in a background thread and
    the caller sees one :class:`Progress` per finished tile.
    """
    import queue
    import threading

    q: "queue.Queue[tuple[str, Any]]" = queue.Queue()
    stop = threading.Event()

    done = [0]

    def tick():
        done[0] += 1
        q.put(("tick", Progress(done[0], len(tasks), stage)))

    def is_cancelled():
        return stop.is_set() or (cancel is not None and cancel())

    def work():  # errors are handed to the caller's thread
        try:
            q.put(("done", _run_tiles(tasks, tick, is_cancelled)))
        except (RhythmapError, KernelError) as exc:
            q.put(("error", exc))
        except Exception as exc:  # raised while reading the data, not by our kernels
            err = InputError(f"reading {source} failed: {type(exc).__name__}: {exc}. The file may be "
                             "truncated or corrupt; check it (or export it again) and retry.")
            err.__cause__ = exc
            q.put(("error", err))
        except BaseException as exc:
            q.put(("error", exc))

    th = threading.Thread(target=work, name="rhythmap-pass", daemon=True)
    th.start()
    try:
        while True:
            kind, payload = q.get()
            if kind == "tick":
                yield payload
            elif kind == "done":
                return payload
            else:
                raise payload
    finally:
        stop.set()
        th.join()


def analyze(stack, rate_range_bpm=None, progress: ProgressFn | None = None, *,
            cancel: Callable[[], bool] | None = None, **options) -> RhythmResult:
    """Map where a stack beats, how fast and how regularly.

    Parameters
    ----------
    stack : Stack, path or (T, Y, X) array
        From :func:`rhythmap.open_stack`; a path or array is opened with it
        (an array then needs ``frame_interval_s`` via ``open_stack`` first).
    rate_range_bpm : (float, float), optional
        Band of rates to look for, in beats per minute. Default: the
        ``specimen`` preset's band, or ``options.DEFAULT_RATE_RANGE_BPM``.
    progress : callable, optional
        Called as ``progress(done, total, stage)`` after each tile.
    cancel : callable, optional, keyword-only
        Polled after each tile; returning True stops the run with
        :class:`~rhythmap.errors.CancelledError`.
    **options
        Keyword-only analysis options, see :data:`rhythmap.options.OPTIONS`.

    Returns
    -------
    RhythmResult
        Maps at the input's (Y, X), tables, references and provenance.

    Raises
    ------
    InputError
        For a rate band above the Nyquist frequency, a recording shorter than
        a few cycles, or an invalid option.
    CancelledError
        If ``cancel`` returned True.

    Examples
    --------
    >>> import numpy as np, rhythmap
    >>> t = np.arange(200)[:, None, None] * 0.05
    >>> frames = 100 + 10 * np.sin(2 * np.pi * 1.5 * t) * np.ones((1, 6, 6))
    >>> res = rhythmap.analyze(rhythmap.open_stack(frames, frame_interval_s=0.05), (40, 200))
    >>> round(float(np.nanmedian(res.rate_bpm)), 1)
    90.0
    """
    gen = iter_analyze(stack, rate_range_bpm, cancel=cancel, **options)
    while True:
        try:
            tick = next(gen)
        except StopIteration as stop:
            return stop.value
        if progress is not None:
            progress(tick.done, tick.total, tick.stage)
