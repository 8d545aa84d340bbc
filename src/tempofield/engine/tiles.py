"""Tiles and passes: how a stack is cut into full-time tiles and how one pass runs.

A pass builds one task graph in which every tile is a (T, ty, tx) block
holding the whole time axis (plus a halo of ``pooling_radius_px`` pixels for
the spatial pooling), runs a pure-numpy kernel on each tile and returns small
per-tile results. One graph per pass means every chunk of the input is read
and decompressed once per pass; the tile size comes from a memory budget, not
a constant. The same graph runs on dask's thread pool or, when a
``distributed.Client`` is active, on its workers. :func:`drain` runs a pass
in a background thread and yields one :class:`Progress` per finished tile.
"""

from __future__ import annotations

import math
import os
import sys
from dataclasses import dataclass
from typing import Any, Callable

import dask
import dask.array as da
import numpy as np

from tempofield.errors import CancelledError, InputError, TempofieldError

#: Bytes of working memory per pixel per frame while a tile is analysed: the
#: input (2 for uint16), its float32 copy, the pooling accumulator and the
#: pooled traces (4 each); the spectral kernel then works on blocks of about a
#: thousand traces, which adds little.
WORK_BYTES_PER_SAMPLE = 14


TILE_TASK_PREFIX = "tempofield-tile"


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


def active_client():
    """The active dask.distributed client, or None. A client exists only once distributed has
    been imported, so a plain run does not pay the import (about 0.4 s) to find there is none."""
    if "distributed" not in sys.modules:
        return None
    try:
        from distributed import default_client

        return default_client()
    except (ImportError, ValueError):
        return None


def parallelism() -> tuple[int, int]:
    """(tiles analysed at once in one process, threads in all): from the active
    dask.distributed client when there is one, else this machine's cores."""
    client = active_client()
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


def pass_tasks(data: da.Array, tiles: TilePlan, fn, tile_kwargs=None, **kwargs) -> list:
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
                            strip = (f"tempofield-strip-{token}", iy, ix, dy + 1, dx + 1)
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
    """A tile with its halo, held as the 3 x 3 pieces of :func:`pass_tasks` (or one padded array).

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


class KernelError(RuntimeError):
    """An unexpected failure inside one of tempofield's own tile kernels (a bug, not bad input)."""


def tile_kernel(fn):
    """Mark a tile kernel: its own unexpected errors become KernelError, so a failure of the
    *reading* tasks (a truncated or corrupt file) can be told apart and reported as bad input."""
    import functools

    @functools.wraps(fn)
    def run(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except (TempofieldError, KernelError):
            raise
        except Exception as exc:
            raise KernelError(f"{fn.__name__} failed: {exc!r}") from exc

    return run


def run_tiles(tasks, on_tile: Callable[[], None], cancel: Callable[[], bool] | None):
    """Compute per-tile delayed results in one graph, ticking ``on_tile`` per finished tile."""
    client = active_client()
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
    # and the pass always runs in a thread of its own (drain). Six tiles at
    # once on two cores cost a quarter more time than two (measured).
    with threadpool_limits(limits=1, user_api="blas"):
        return list(dask.compute(*tasks, scheduler="threads", num_workers=parallelism()[0],
                                 callbacks=[_Ticks()._callback]))


def drain(tasks, stage, cancel, source="the stack"):
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
            q.put(("done", run_tiles(tasks, tick, is_cancelled)))
        except (TempofieldError, KernelError) as exc:
            q.put(("error", exc))
        except Exception as exc:  # raised while reading the data, not by our kernels
            err = InputError(f"reading {source} failed: {type(exc).__name__}: {exc}. The file may be "
                             "truncated or corrupt; check it (or export it again) and retry.")
            err.__cause__ = exc
            q.put(("error", err))
        except BaseException as exc:
            q.put(("error", exc))

    th = threading.Thread(target=work, name="tempofield-pass", daemon=True)
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
