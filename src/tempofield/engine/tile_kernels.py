"""The kernels that run on one tile of a pass, and the gathering of their results.

Pass 1 ("maps"): pooling, detrending, spectral maps, the binned traces of the
beating pixels that make the frame Gram matrix of the rhythm reference, and
(when the phase will be needed) the kept band of every pixel's spectrum
(:mod:`tempofield.engine.kept`). The phase stage: lock-in of every pixel
against its region's reference, from the kept spectra
(:func:`kept_phase_tile_kernel`) or from a second read of the stack
(:func:`phase_tile_kernel`). Each kernel takes a tile's arrays and returns a
small dict; the numerics live in :mod:`tempofield.kernels`.
"""

from __future__ import annotations

import contextlib
import os

import numpy as np

from tempofield.engine.kept import rows_per_band
from tempofield.engine.tiles import PaddedTile, tile_kernel
from tempofield.errors import InputError
from tempofield.kernels import phase as phase_mod
from tempofield.kernels import preprocess, spectral
from tempofield.kernels import regions as regions_mod


@tile_kernel
def maps_tile_kernel(block, y0, x0, *, halo, plan, basis, gram_bin, keep=None, keep_offset=0):
    """Pass 1 on one tile: spectral maps and the binned traces of detected pixels.

    ``block`` is the tile's 3 x 3 pieces from :func:`pass_tasks` or one
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
            f"near pixel y={y0}, x={x0}); tempofield needs finite intensities. Replace or drop those frames "
            "(e.g. interpolate them from their neighbours) and run again.")
    t, hy, hx = tile.shape
    ty, tx = hy - 2 * halo, hx - 2 * halo
    maps = np.empty((len(PASS1_KEYS), ty, tx), np.float32)
    bins = None if gram_bin is None else _TileBins(t, ty, tx, y0, x0, gram_bin)
    kernel = spectral.SpectralKernel(plan, basis, keep_band=None if keep is None else keep.band)
    # the kept spectra's file was laid out with the band width of its own making
    band_rows = min(ty, rows_per_band(tx, spectral.FFT_BLOCK_COLUMNS) if keep is None else keep.band_rows(tx))
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
        preprocess.add_band_to_bins(traces.reshape(-1, rows, self.tx), detected.astype(np.float32).reshape(rows, self.tx),
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


@tile_kernel
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


@tile_kernel
def kept_phase_tile_kernel(y0, x0, ty, tx, *, keep, keep_offset, labels, lockin_bases, band_weights, dominant,
                           bins=None):
    """The phase stage on one tile from the spectra the maps pass kept: no read of the stack.

    Each lock-in sum is one matrix product of the tile's kept bins with the
    reference's band weights (:func:`tempofield.kernels.phase.band_lockin_weights`);
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
    amp = np.full(ty * tx, np.nan, np.float32)
    by_ref: dict[int, list[int]] = {}
    for label in present:
        by_ref.setdefault(label if label in lockin_bases else dominant, []).append(label)
    for ref_label, labels in by_ref.items():
        sel = slice(None) if len(by_ref) == 1 else np.isin(lab, labels)
        ph, c, a = phase_mod.lockin_from_projection(pooled_by_ref[ref_label][:, sel], lockin_bases[ref_label])
        coh[sel] = c
        phase[sel] = ph
        amp[sel] = a
    without = [label for label in present if label not in lockin_bases]
    if without:  # no reference of their own: no phase
        phase[np.isin(lab, without)] = np.nan
    return {"y0": y0, "x0": x0, "phase": phase.reshape(ty, tx), "coherence": coh.reshape(ty, tx),
            "lock_amplitude": amp.reshape(ty, tx)}


def gather_bins(results, labels, gram_bin):
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
        if r["bins"].size == 0:  # a tile without rhythmic pixels adds nothing
            continue
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
