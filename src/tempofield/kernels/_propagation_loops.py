"""Compiled loop of :mod:`tempofield.kernels.propagation`: local plane fits of a delay field."""

from __future__ import annotations

import numba
import numpy as np

from tempofield.kernels._jit import JIT


@numba.jit(**JIT)
def local_plane_gradient(field, ok, radius, min_points, gy, gx):
    """Least-squares plane fit of ``field`` over each pixel's (2r+1)^2 window: ``gy``, ``gx`` (Y, X) float64.

    Only pixels where ``ok`` take part (``field`` finite there). The nine
    window sums (count, first and second moments of the coordinates, and the
    field's sum and first moments) are box sums, taken along each row and
    then down the columns, with the window cut at the image's edge; the
    moments are then centred on the window's mean coordinates. A pixel not
    ``ok``, with fewer than ``min_points`` window pixels, or whose window's
    points lie on a line, gets NaN. See :func:`tempofield.kernels.propagation.local_gradient`.
    """
    h, w = field.shape
    n_q = 9
    rows = np.zeros((n_q, h, w))  # box sums along each row
    q = np.empty((n_q, w))
    for y in range(h):
        for x in range(w):
            wv = 1.0 if ok[y, x] else 0.0
            fv = field[y, x] if ok[y, x] else 0.0
            q[0, x] = wv
            q[1, x] = wv * y
            q[2, x] = wv * x
            q[3, x] = wv * y * y
            q[4, x] = wv * x * x
            q[5, x] = wv * x * y
            q[6, x] = fv
            q[7, x] = fv * y
            q[8, x] = fv * x
        for k in range(n_q):
            out = rows[k, y]
            for dx in range(-radius, radius + 1):
                lo = max(0, -dx)
                n_x = min(w, w - dx) - lo
                dst = out[lo:lo + n_x]
                shifted = q[k, lo + dx:lo + dx + n_x]  # views, so the loop index is plain (it vectorises)
                for x in range(n_x):
                    dst[x] += shifted[x]
    s = np.empty((n_q, w))
    for y in range(h):
        for k in range(n_q):
            for x in range(w):
                s[k, x] = 0.0
            for dy in range(-radius, radius + 1):
                if 0 <= y + dy < h:
                    src = rows[k, y + dy]
                    for x in range(w):
                        s[k, x] += src[x]
        for x in range(w):
            n = s[0, x]
            if not ok[y, x] or n < min_points:
                gy[y, x] = np.nan
                gx[y, x] = np.nan
                continue
            my = s[1, x] / n
            mx = s[2, x] / n
            syy = s[3, x] - n * my * my
            sxx = s[4, x] - n * mx * mx
            sxy = s[5, x] - n * mx * my
            sf = s[6, x]
            sfy = s[7, x] - my * sf
            sfx = s[8, x] - mx * sf
            det = syy * sxx - sxy * sxy
            if not abs(det) > 1e-9:
                gy[y, x] = np.nan
                gx[y, x] = np.nan
                continue
            gy[y, x] = (sxx * sfy - sxy * sfx) / det
            gx[y, x] = (syy * sfx - sxy * sfy) / det


def warm_up() -> None:
    """Compile (or load from the cache) this module's loop."""
    local_plane_gradient(np.ones((4, 4)), np.ones((4, 4), np.bool_), 1, 3, np.empty((4, 4)), np.empty((4, 4)))
