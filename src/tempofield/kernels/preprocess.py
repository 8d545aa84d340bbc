"""Preprocessing kernels on (T, ...) blocks: pooling, binning, detrending.

Pooling is a square box mean over neighbouring pixels, computed in a fixed
order per pixel (a compiled loop) so a pixel's value does not depend on where
its tile starts (the engine promises the same numbers for any chunking).
Detrending projects each trace off a few slow cosines (a DCT-II basis below a
cutoff frequency): one matrix product removes bleaching and drift while the
beat, which lies above the cutoff, passes untouched.
"""

from __future__ import annotations

import numpy as np

from tempofield._dtypes import as_float
from tempofield.errors import InputError
from tempofield.kernels import _preprocess_loops

# Sums of traces over square bins, for the engine's Gram bins.
from tempofield.kernels._preprocess_loops import add_band_to_bins  # noqa: E402,F401


def box_pool(block, radius: int) -> np.ndarray:
    """Mean over a (2r+1) x (2r+1) square around each pixel of every frame.

    Parameters
    ----------
    block : (T, Y, X) ndarray
        Frames, already padded by ``radius`` pixels on each side in Y and X.
        Integers become float32.
    radius : int
        Half-width r of the square, in pixels; 0 returns the block unchanged.

    Returns
    -------
    (T, Y - 2r, X - 2r) ndarray, float32
        Pooled frames for the un-padded interior.

    Notes
    -----
    Separable: for each frame, the 2r+1 values down each padded column are
    summed, then 2r+1 of those column sums across, always in the same order,
    and divided by (2r+1)^2 (one compiled loop, :mod:`tempofield.kernels._spectral_loops`).

    Examples
    --------
    >>> import numpy as np
    >>> box_pool(np.ones((2, 5, 5)), 1).shape
    (2, 3, 3)
    """
    if radius == 0:
        return as_float(block)
    x = np.asarray(block)
    r = int(radius)
    if x.ndim != 3 or x.shape[1] <= 2 * r or x.shape[2] <= 2 * r:
        raise InputError(f"box_pool needs a (T, Y, X) block larger than 2*radius={2 * r}; got {x.shape}.")
    return box_pool_rows(x, r, 0, x.shape[1] - 2 * r)


def box_pool_rows(block, radius: int, y_start: int, y_stop: int, out=None) -> np.ndarray:
    """:func:`box_pool` for the output rows ``y_start:y_stop`` only.

    The engine pools a tile one band of rows at a time, so a band's pooled
    traces are still in cache when they are transformed. Each output value is
    computed exactly as :func:`box_pool` computes it. ``out``, if given, is a
    (T, y_stop - y_start, X - 2r) float32 array to fill.
    """
    x = np.asarray(block)
    r = int(radius)
    shape = (x.shape[0], y_stop - y_start, x.shape[2] - 2 * r)
    if out is None:
        out = np.empty(shape, np.float32)
    if x.dtype == np.bool_:
        x = x.view(np.uint8)
    _preprocess_loops.box_pool_rows(x, r, int(y_start), int(y_stop), out)
    return out


def bin_pixels(block, factor: int) -> np.ndarray:
    """Average non-overlapping ``factor`` x ``factor`` pixel squares of each frame.

    Parameters
    ----------
    block : (T, Y, X) ndarray
        Frames; Y and X are cut down to multiples of ``factor``.
    factor : int
        Bin edge in pixels (1 returns float32 frames unchanged).

    Returns
    -------
    (T, Y // factor, X // factor) ndarray, float32

    Examples
    --------
    >>> import numpy as np
    >>> bin_pixels(np.arange(16.).reshape(1, 4, 4), 2)[0]
    array([[ 2.5,  4.5],
           [10.5, 12.5]], dtype=float32)
    """
    x = as_float(block)
    f = int(factor)
    if f == 1:
        return x
    t, y, xx = x.shape
    ny, nx = y // f, xx // f
    x = x[:, : ny * f, : nx * f].reshape(t, ny, f, nx, f)
    return x.mean(axis=(2, 4), dtype=np.float32)


def trend_basis(n_frames: int, frame_interval_s: float, cutoff_hz: float) -> np.ndarray:
    """Orthonormal slow-trend basis: the DCT-II cosines below ``cutoff_hz``.

    Parameters
    ----------
    n_frames : int
        Number of frames T.
    frame_interval_s : float
        Seconds between frames.
    cutoff_hz : float
        Highest frequency a trend component may have. Cosine k has frequency
        k / (2 T dt), so components k < 2 T dt cutoff are kept, always
        including the constant.

    Returns
    -------
    (T, K) ndarray, float32
        Orthonormal columns (Q^T Q = I).

    Notes
    -----
    The DCT-II cosines plus a line and a parabola (for the end slopes, which
    the cosines' even extension cannot follow) absorb an exponential bleaching
    curve with a handful of components; the columns are orthonormalised.

    Examples
    --------
    >>> q = trend_basis(100, 0.1, 0.05)
    >>> q.shape
    (100, 4)
    """
    t = np.arange(n_frames)
    k_max = int(np.floor(2 * n_frames * frame_interval_s * cutoff_hz))
    k = np.arange(0, max(k_max, 0) + 1)
    cosines = np.cos(np.pi * np.outer(t + 0.5, k) / n_frames)
    # A line and a parabola take the slopes at both ends, which the cosines
    # (even extensions) cannot follow: an exponential then fits with a few terms.
    u = 2.0 * t / max(n_frames - 1, 1) - 1.0
    q, _ = np.linalg.qr(np.column_stack([cosines, u, 1.5 * u ** 2 - 0.5]))
    return q[:, : min(q.shape[1], n_frames)].astype(np.float32)


def detrend(traces, basis) -> np.ndarray:
    """Remove the trend components from each trace: ``X - Q (Q^T X)``.

    Parameters
    ----------
    traces : (T, n) ndarray
        One trace per column. Integers become float32.
    basis : (T, K) ndarray
        Orthonormal trend basis from :func:`trend_basis`.

    Returns
    -------
    (T, n) ndarray, float32

    Examples
    --------
    >>> import numpy as np
    >>> x = np.linspace(0, 1, 50)[:, None] * 5 + 3
    >>> float(np.abs(detrend(x, trend_basis(50, 1.0, 0.03))).max()) < 0.2
    True
    """
    x = as_float(traces)
    q = as_float(basis)
    return x - q @ (q.T @ x)


def frozen_fraction(frames) -> np.ndarray:
    """Share of frame-to-frame steps over which each pixel's value does not change at all.

    A camera pixel changes every frame (its noise alone sees to that); a
    pixel of a lossy inter-frame video often does not, where the codec
    repeats a block until its next refresh. The share of exact repeats tells
    the two apart.

    Parameters
    ----------
    frames : (T, Y, X) ndarray, T >= 2

    Returns
    -------
    (Y, X) float32 in [0, 1]

    Examples
    --------
    >>> f = np.zeros((5, 1, 2)); f[:, 0, 1] = [1, 2, 3, 3, 4]
    >>> frozen_fraction(f).tolist()
    [[1.0, 0.25]]
    """
    x = np.asarray(frames)
    if x.ndim != 3 or x.shape[0] < 2:
        raise InputError(f"frozen_fraction needs (T, Y, X) frames with T >= 2, got shape {x.shape}.")
    same = np.zeros(x.shape[1:], np.int64)
    for t in range(1, x.shape[0]):
        same += x[t] == x[t - 1]
    return (same / (x.shape[0] - 1)).astype(np.float32)

