"""Compiled loops of the pooling and binning kernels (:mod:`tempofield.kernels.preprocess`):
box pooling of a block of frames row by row, also from three column pieces (a
tile and the strips of its neighbours), and the sums of traces over square
bins. The arithmetic order of every output depends on the pixel alone, never
on where a band or tile starts (chunk invariance).
"""

from __future__ import annotations

import numba
import numpy as np

from tempofield.kernels._jit import JIT, JIT_INLINE


@numba.jit(**JIT_INLINE)
def _sum_across(colsum, side, scale, rowsum, out, t, row):
    """The second half of box pooling: ``side`` neighbouring column sums added left to right, scaled,
    written to ``out[t, row]``."""
    nx = rowsum.shape[0]
    for x in range(nx):
        rowsum[x] = colsum[x]
    for dx in range(1, side):
        for x in range(nx):
            rowsum[x] += colsum[x + dx]
    for x in range(nx):
        out[t, row, x] = rowsum[x] * scale


@numba.jit(**JIT)
def box_pool_rows(block, radius, y_start, y_stop, out):
    """Box mean of ``block`` (T, Y + 2r, X + 2r) for output rows ``y_start:y_stop``.

    Writes (T, y_stop - y_start, X) float32 into ``out``. Per pixel and frame:
    the 2r+1 rows of each padded column are summed first (top to bottom),
    then the 2r+1 column sums (left to right), then scaled by 1/(2r+1)^2.
    """
    side = 2 * radius + 1
    width = block.shape[2]
    nx = width - 2 * radius
    scale = np.float32(1.0 / (side * side))
    colsum = np.empty(width, np.float32)
    rowsum = np.empty(nx, np.float32)
    for t in range(block.shape[0]):
        for y in range(y_start, y_stop):
            # loops over whole rows innermost, so they compile to vector instructions
            for c in range(width):
                colsum[c] = np.float32(block[t, y, c])
            for dy in range(1, side):
                for c in range(width):
                    colsum[c] += np.float32(block[t, y + dy, c])
            _sum_across(colsum, side, scale, rowsum, out, t, y - y_start)


@numba.jit(**JIT_INLINE)
def _pool_row(left, middle, right, radius, y, colsum, rowsum, out, row):
    """Box-pooled row ``y`` of a block held as three column pieces, every frame: ``out[t, row, :]``.

    Pools rows y .. y + 2r of the pieces (left strip, centre, right strip),
    column sums first (top to bottom), then across (:func:`_sum_across`).
    ``colsum`` holds X + 2r floats, ``rowsum`` X.
    """
    side = 2 * radius + 1
    nx = middle.shape[2]
    scale = np.float32(1.0 / (side * side))
    col_left = colsum[:radius]
    col_mid = colsum[radius:radius + nx]
    col_right = colsum[radius + nx:]
    if radius == 1:  # the default: each sum in one loop, in the same order as the general loops below
        next1 = colsum[1:]
        next2 = colsum[2:]
        for t in range(middle.shape[0]):
            r0, r1, r2 = middle[t, y], middle[t, y + 1], middle[t, y + 2]
            col_left[0] = (np.float32(left[t, y, 0]) + np.float32(left[t, y + 1, 0])) + np.float32(left[t, y + 2, 0])
            for c in range(nx):
                col_mid[c] = (np.float32(r0[c]) + np.float32(r1[c])) + np.float32(r2[c])
            col_right[0] = ((np.float32(right[t, y, 0]) + np.float32(right[t, y + 1, 0]))
                            + np.float32(right[t, y + 2, 0]))
            dst = out[t, row]
            for x in range(nx):
                dst[x] = ((colsum[x] + next1[x]) + next2[x]) * scale
        return
    for t in range(middle.shape[0]):
        for c in range(radius):
            col_left[c] = np.float32(left[t, y, c])
        for c in range(nx):
            col_mid[c] = np.float32(middle[t, y, c])
        for c in range(radius):
            col_right[c] = np.float32(right[t, y, c])
        for dy in range(1, side):
            for c in range(radius):
                col_left[c] += np.float32(left[t, y + dy, c])
            for c in range(nx):
                col_mid[c] += np.float32(middle[t, y + dy, c])
            for c in range(radius):
                col_right[c] += np.float32(right[t, y + dy, c])
        _sum_across(colsum, side, scale, rowsum, out, t, row)


@numba.jit(**JIT)
def box_pool_rows_split(left, middle, right, radius, y_start, y_stop, out):
    """:func:`box_pool_rows` of a block held as three column pieces (left strip, centre, right strip).

    ``middle`` is (T, Y, X), the strips (T, Y, r); output rows y_start:y_stop
    pool rows y .. y + 2r of the pieces, (T, y_stop - y_start, X) float32, in
    the same arithmetic order as :func:`box_pool_rows` on the assembled block
    (one row at a time, :func:`_pool_row`).
    """
    nx = middle.shape[2]
    colsum = np.empty(nx + 2 * radius, np.float32)
    rowsum = np.empty(nx, np.float32)
    for y in range(y_start, y_stop):
        _pool_row(left, middle, right, radius, y, colsum, rowsum, out, y - y_start)


@numba.jit(**JIT)
def add_band_to_bins(traces, weight, row_bin, col_bin, n_bin_cols, sums):
    """Add a band of rows of traces to square bins: ``sums[:, row_bin[r] * n_bin_cols + col_bin[x]]``
    += weight * trace, for the band's pixels (r, x) (weight 1 for a detected pixel, 0 otherwise).

    ``traces`` is (T, rows, width), ``weight`` (rows, width) float32,
    ``row_bin`` (rows,) and ``col_bin`` (width,) non-decreasing. Rows of one
    bin row are summed first with the pixels innermost (vectorised), then
    each run of columns of one bin is summed and added to its bin once (not
    column by column into the same place, a chain of dependent writes).
    """
    n_t, n_rows, width = traces.shape
    acc = np.empty(width, np.float32)
    for t in range(n_t):
        r = 0
        while r < n_rows:
            br = row_bin[r]
            for x in range(width):
                acc[x] = 0.0
            while r < n_rows and row_bin[r] == br:
                for x in range(width):
                    acc[x] += traces[t, r, x] * weight[r, x]
                r += 1
            first = br * n_bin_cols
            x = 0
            while x < width:
                bc = col_bin[x]
                run = np.float32(0.0)
                while x < width and col_bin[x] == bc:
                    run += acc[x]
                    x += 1
                sums[t, first + bc] += run


def warm_up() -> None:
    """Compile (or load from the cache) this module's loops for uint16 and float32 stacks."""
    add_band_to_bins(np.zeros((2, 2, 3), np.float32), np.ones((2, 3), np.float32), np.array([0, 0]),
                     np.array([0, 0, 1]), 2, np.zeros((2, 2), np.float32))
    for dtype in (np.uint16, np.float32):
        box_pool_rows(np.zeros((2, 4, 4), dtype), 1, 0, 2, np.empty((2, 2, 2), np.float32))
        box_pool_rows_split(np.zeros((2, 4, 1), dtype), np.zeros((2, 4, 2), dtype), np.zeros((2, 4, 1), dtype), 1,
                            0, 2, np.empty((2, 2, 2), np.float32))
