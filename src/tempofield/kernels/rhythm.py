"""From a region's traces to its rhythm reference: Gram, window, persistence, phase.

The region's (binned) traces X (T, P) give the frame Gram matrix G = X X^T;
the sliding window is chosen from the region's period; the windows' pairwise
distances come from G by diagonal sums (:mod:`tempofield.kernels.embedding`); ripser's
persistence and the circular coordinate of the most persistent loop
(:mod:`tempofield.kernels.topology`) give the phase theta(t) that follows a drifting
rate, from which :mod:`tempofield.kernels.reference` reads beats and rate. Long
recordings are decimated in time before the Gram step and the phase is put
back on every frame afterwards. Pure numpy.
"""

from __future__ import annotations

import math

import numpy as np

from tempofield.kernels import embedding
from tempofield.kernels.reference import RhythmReference, reference_from_distances

#: The decimated period must keep at least this many frames per cycle.
MIN_FRAMES_PER_PERIOD = 8


def decimation_for(n_frames: int, period_frames: float, max_frames: int) -> int:
    """Integer step s so that T / s <= max_frames while a period keeps >= 8 frames (if it can)."""
    want = math.ceil(n_frames / max_frames)
    allow = max(1, int(period_frames // MIN_FRAMES_PER_PERIOD))
    return max(1, min(want, allow))


def frame_gram(traces) -> np.ndarray:
    """G = X X^T in float64 for (T, P) traces (each column one pixel or bin)."""
    x = np.asarray(traces, np.float64)
    return x @ x.T


def region_reference(traces, frame_interval_s: float, rate_bpm: float, *, n_landmarks: int = 200,
                     max_frames: int = 1500, coeff: int = 47) -> RhythmReference:
    """The rhythm reference of one region from its traces.

    Parameters
    ----------
    traces : (T, P) ndarray
        Detrended traces of the region's pixels or bins.
    frame_interval_s : float
        Seconds between frames.
    rate_bpm : float
        The region's typical rate (median of its rate map), which sets the window.
    n_landmarks, coeff : int
        For persistence and circular coordinates.
    max_frames : int
        Longest time series given to the Gram/persistence step; longer
        recordings are decimated by an integer step.

    Returns
    -------
    RhythmReference
        Sampled at the window centres (of the decimated series).

    Notes
    -----
    Window: M tau = period M / (M + 1) (Perea & Harer 2015), with the
    windows pointwise centred and normalised to unit length, so the loop
    score is max persistence / sqrt(3).

    Examples
    --------
    >>> t = np.arange(300) * 0.05
    >>> x = np.cos(2 * np.pi * 1.2 * t[:, None] - np.linspace(0, 1, 5)[None])
    >>> ref = region_reference(x, 0.05, 72.0, n_landmarks=100)
    >>> round(ref.rate_mean_bpm, 1), bool(ref.score > 0.9)
    (72.0, True)
    """
    time_s, dist, choice = window_distances(traces, frame_interval_s, rate_bpm, max_frames=max_frames)
    return reference_from_distances(time_s, dist, dim=choice.dim, tau=choice.tau,
                                    n_landmarks=n_landmarks, coeff=coeff)


def window_distances(traces, frame_interval_s: float, rate_bpm: float, *, max_frames: int = 1500):
    """Distances between the centred, unit-normalised sliding windows of some traces.

    Returns ``(time_s, dist, choice)``: the (decimated) frame times, the (N, N)
    window distances and the :class:`tempofield.kernels.embedding.WindowChoice` used.
    The shared first half of :func:`region_reference` and
    :func:`loop_score_of_traces`.
    """
    t_n = np.shape(traces)[0]
    period_frames = 60.0 / rate_bpm / frame_interval_s
    step = decimation_for(t_n, period_frames, max_frames)
    xs = np.asarray(np.asarray(traces)[::step], np.float64)  # decimate before the float64 copy
    choice = embedding.window_for_period(period_frames / step)
    d2 = embedding.sliding_window_sqdist(frame_gram(xs), dim=choice.dim, tau=choice.tau, center=True, normalize=True)
    return np.arange(xs.shape[0]) * frame_interval_s * step, np.sqrt(d2), choice


def loop_score_of_traces(traces, frame_interval_s: float, rate_bpm: float, *, n_landmarks: int = 100,
                         max_frames: int = 1500) -> float:
    """Loop score (max H1 persistence / sqrt 3) of the sliding-window cloud of a few traces.

    The building block of the tile-level loop-score map: the same window
    choice and distances as :func:`region_reference`, persistence only.
    """
    from tempofield.kernels.topology import h1_persistence, loop_score

    _, dist, _ = window_distances(traces, frame_interval_s, rate_bpm, max_frames=max_frames)
    return float(loop_score(h1_persistence(dist, n_landmarks=n_landmarks).diagram))
