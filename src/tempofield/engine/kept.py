"""Kept spectra: the band of every pixel's spectrum that the phase stage needs,
written by the maps pass to a temporary file so that the lock-in needs no
second read of the stack (see DEVELOPERS.md, "The phase stage and kept spectra").
"""

from __future__ import annotations

import os
import weakref
from dataclasses import dataclass

import dask
import numpy as np

from tempofield.engine.tiles import TILE_TASK_PREFIX, KernelError, TilePlan
from tempofield.kernels import spectral


def rows_per_band(tx: int, columns: int) -> int:
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
    (:func:`tempofield.kernels.spectral.pack_fixed`): half the bytes of float32 (writing
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
        return rows_per_band(tx, self.band_columns)

    def offset(self, y0: int, x0: int, ty: int) -> int:
        """Byte offset of the tile at (y0, x0) of height ty."""
        return self.bytes_per_pixel * (y0 * self.width + x0 * ty)

    def write(self, offset: int, block: np.ndarray, fd: int | None = None) -> None:
        """Store a band's (2, n_bins, q) float32 block at ``offset``, in one positioned write
        (through ``fd``, the file opened for writing, when given: a tile opens it once)."""
        q = block.shape[2]
        raw = np.empty(self.bytes_per_pixel * q, np.uint8)
        spectral.pack_fixed(np.ascontiguousarray(block, np.float32), *self._band_parts(raw, q))
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
            spectral.unpack_fixed(packed, i0, steps, out, p0)
        return out


def keep_spectra(shape, band, cleanup, client) -> tuple[KeptSpectra | None, str]:
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
    folder = tempfile.mkdtemp(prefix="tempofield-spectra-", dir=base)
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


def kept_tasks(keep: KeptSpectra, tiles: TilePlan, fn, tile_kwargs, **kwargs) -> list:
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
