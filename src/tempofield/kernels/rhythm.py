"""From a region's traces to its rhythm reference: Gram, window, persistence, phase.

The region's (binned) traces X (T, P) give the frame Gram matrix G = X X^T;
the sliding window is chosen from the region's period; the windows' pairwise
distances come from G by diagonal sums (:mod:`tempofield.kernels.embedding`); ripser's
persistence and the circular coordinate of the most persistent loop
(:mod:`tempofield.kernels.topology`) give the phase theta(t) that follows a drifting
rate, from which :mod:`tempofield.kernels.reference` reads beats and rate. Long
recordings are decimated in time before the Gram step and the phase is put
back on every frame afterwards.

A reference checks itself (:func:`self_check`): its mean rate against the
region's spectral rate, its beats against the number of cycles, whether its
phase ever runs backwards, and how coherently the region's own traces lock in
to it. A pulse with a strong second harmonic (a dicrotic wave, a shoulder,
alternans) can make the most persistent loop of the raw cloud wind twice per
beat or run backwards; when the topological phase fails, the phase of the
band-limited fundamental (the analytic signal of the leading component of
the traces band-limited around the region's rate) is used instead. The reference records
which method made it and what the check measured. Pure numpy/scipy.
"""

from __future__ import annotations

import math

import numpy as np

from tempofield.errors import InputError
from tempofield.kernels import embedding
from tempofield.kernels.reference import RhythmReference, reference_from_distances, reference_from_theta

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


#: Self-check limits of a rhythm reference (see :func:`self_check`).
CHECK_RATE_TOLERANCE = 0.10       # |reference mean rate / spectral rate - 1|
CHECK_BEAT_SLACK = 0.05           # beats may differ from the cycles by 1 + this share of them
CHECK_MAX_BACKWARD = 0.02         # share of eighth-period steps over which the phase may run backwards
CHECK_MIN_COHERENCE = 0.5         # power-weighted mean coherence of the region's traces
CHECK_MAX_TRACES = 256            # strongest traces used for the coherence check

#: Band kept around the fundamental f for the band-limited routes: [LOW f, HIGH f]
#: (the zero-phase filter passes an alternation of beats at f / 2 at about 0.6 and the second
#: harmonic at 2 f at about 0.03).
BAND_LOW, BAND_HIGH = 0.4, 1.6

METHODS = ("topology", "band-limited fundamental")


def region_reference(traces, frame_interval_s: float, rate_bpm: float, *, n_landmarks: int = 200,
                     max_frames: int = 1500, coeff: int = 47,
                     methods: tuple[str, ...] = METHODS) -> RhythmReference:
    """The rhythm reference of one region from its traces, checked against the region itself.

    Parameters
    ----------
    traces : (T, P) ndarray
        Detrended traces of the region's pixels or bins.
    frame_interval_s : float
        Seconds between frames.
    rate_bpm : float
        The region's typical rate (median of its rate map), which sets the
        window and the band of the fundamental.
    n_landmarks, coeff : int
        For persistence and circular coordinates.
    max_frames : int
        Longest time series given to the Gram/persistence step; longer
        recordings are decimated by an integer step.
    methods : tuple of str
        The routes to try, in order, from :data:`METHODS`; the first whose
        reference passes :func:`self_check` is kept (tests use this to make
        a route fail).

    Returns
    -------
    RhythmReference
        With ``method`` (the route that made it) and ``check`` (the measured
        values, and ``failures`` of every route tried). When no route passes,
        the one with the fewest failed checks (then the most coherent) is
        returned, its failures listed; the engine warns.

    Notes
    -----
    Window: M tau = period M / (M + 1) (Perea & Harer 2015), with the
    windows pointwise centred and normalised to unit length, so the loop
    score is max persistence / sqrt(3). The diagram, loop score and
    quasi-periodicity always come from the sliding-window cloud (the rhythm's
    geometry); only the phase may come from the fallback. Band-limiting acts on
    the frame Gram matrix: a zero-phase band-pass H along time gives
    (H X)(H X)^T = H G H^T, two filter passes over a T x T matrix.

    Examples
    --------
    >>> t = np.arange(300) * 0.05
    >>> x = np.cos(2 * np.pi * 1.2 * t[:, None] - np.linspace(0, 1, 5)[None])
    >>> ref = region_reference(x, 0.05, 72.0, n_landmarks=100)
    >>> round(ref.rate_mean_bpm, 1), bool(ref.score > 0.9), ref.method
    (72.0, True, 'topology')
    """
    unknown = [m for m in methods if m not in METHODS]
    if unknown or not methods:
        raise InputError(f"methods={methods!r}: use a non-empty tuple of {METHODS}.")
    x = np.asarray(traces)
    t_n = x.shape[0]
    frame_times = np.arange(t_n) * frame_interval_s
    time_s, dist, choice, gram, step = _window_distances(x, frame_interval_s, rate_bpm, max_frames=max_frames)
    raw = None
    try:
        raw = reference_from_distances(time_s, dist, dim=choice.dim, tau=choice.tau,
                                       n_landmarks=n_landmarks, coeff=coeff)
    except InputError as exc:
        raw_error = str(exc)
    shape = {} if raw is None else {
        "diagram": raw.diagram, "score": raw.score, "second_loop_ratio": raw.second_loop_ratio,
        "quasi_periodic": raw.quasi_periodic}
    tried: list[tuple[RhythmReference | None, dict]] = []
    band_gram = None
    for method in methods:
        try:
            if method == "topology":
                if raw is None:
                    raise InputError(raw_error)
                ref = raw
            else:
                if band_gram is None:
                    band_gram = band_limited_gram(gram, frame_interval_s * step, rate_bpm / 60.0)
                ref = reference_from_theta(time_s, fundamental_phase(band_gram), diagram=None,
                                           score=float("nan"))
        except InputError as exc:
            tried.append((None, {"method": method, "failures": [f"no reference ({exc})"]}))
            continue
        check = self_check(ref, x, frame_times, rate_bpm)
        check["method"] = method
        tried.append((ref, check))
        if not check["failures"]:
            break
    usable = [(ref, check) for ref, check in tried if ref is not None]
    if not usable:
        raise InputError("; ".join(f"{c['method']}: {c['failures'][0]}" for _, c in tried))
    ref, check = next(((r, c) for r, c in usable if not c["failures"]),
                      min(usable, key=lambda rc: (len(rc[1]["failures"]), -np.nan_to_num(rc[1]["coherence"], nan=-1.0))))
    check = {**check, "tried": {c["method"]: list(c["failures"]) for _, c in tried}}
    kept = {**shape} if shape else {"diagram": ref.diagram, "score": ref.score,
                                    "second_loop_ratio": ref.second_loop_ratio,
                                    "quasi_periodic": ref.quasi_periodic}
    return reference_from_theta(ref.time_s, ref.theta_rad, smooth_s=None, window_frames=choice.window_frames,
                                dim=choice.dim, tau=choice.tau, method=check["method"], check=check, **kept)


def self_check(ref: RhythmReference, traces, frame_times_s, rate_bpm: float) -> dict:
    """How well a reference agrees with its region: the measured values and the failed checks.

    Parameters
    ----------
    ref : RhythmReference
        The candidate.
    traces : (T, P) ndarray
        The region's detrended traces at every frame.
    frame_times_s : (T,) ndarray
        Their times.
    rate_bpm : float
        The region's spectral rate.

    Returns
    -------
    dict
        ``rate_ratio`` (reference mean rate / spectral rate), ``beats`` and
        ``expected_beats`` (cycles of the spectral rate over the reference's
        span), ``backward_fraction`` (share of eighth-period steps over which
        the unwrapped phase decreases), ``min_inst_rate_bpm``, ``coherence``
        (mean lock-in coherence of the strongest ``CHECK_MAX_TRACES`` traces,
        weighted by their power in the band) and ``failures``: one sentence per
        limit exceeded (:data:`CHECK_RATE_TOLERANCE`, :data:`CHECK_BEAT_SLACK`,
        :data:`CHECK_MAX_BACKWARD`, a negative instantaneous rate,
        :data:`CHECK_MIN_COHERENCE`).
    """
    from tempofield.kernels import phase as phase_mod

    t = np.asarray(ref.time_s, float)
    u = np.unwrap(np.asarray(ref.theta_rad, float))
    rate_ratio = float(ref.rate_mean_bpm / rate_bpm)
    expected = float((t[-1] - t[0]) * rate_bpm / 60.0)
    beats = int(len(ref.beat_times_s))
    period_samples = 60.0 / rate_bpm / max(float(np.median(np.diff(t))), 1e-12)
    lag = max(1, int(round(period_samples / 8)))
    steps = u[lag:] - u[:-lag]
    backward = float(np.mean(steps < 0)) if steps.size else 1.0
    min_rate = float(np.min(ref.inst_rate_bpm)) if len(ref.inst_rate_bpm) else float("nan")
    coherence = float("nan")
    x = np.asarray(traces, np.float32)
    if u[-1] > u[0]:
        period_frames = 60.0 / max(ref.rate_mean_bpm, 1e-9) / max(float(frame_times_s[1] - frame_times_s[0]), 1e-12)
        theta = phase_mod.smooth_over_period(phase_mod.theta_on_frames(t, ref.theta_rad, frame_times_s),
                                             period_frames)
        power = np.einsum("tp,tp->p", x, x)
        strongest = np.argsort(power)[::-1][:CHECK_MAX_TRACES]
        _, coh, amp = phase_mod.lockin(x[:, strongest], phase_mod.lockin_basis(theta))
        weight = amp.astype(np.float64) ** 2
        if weight.sum() > 0:
            coherence = float(np.sum(weight * coh) / weight.sum())
    failures = []
    if not abs(rate_ratio - 1.0) <= CHECK_RATE_TOLERANCE:
        failures.append(f"its mean rate is {rate_ratio:.2f} x the spectral rate {rate_bpm:.1f} bpm")
    if not abs(beats - expected) <= 1 + CHECK_BEAT_SLACK * expected:
        failures.append(f"{beats} beats where the spectral rate gives {expected:.1f} cycles")
    if not backward <= CHECK_MAX_BACKWARD:
        failures.append(f"its phase runs backwards over {100 * backward:.0f} % of the record")
    if not min_rate > 0:
        failures.append(f"its instantaneous rate falls to {min_rate:.1f} bpm")
    if not coherence >= CHECK_MIN_COHERENCE:
        failures.append(f"the region's traces lock in to it with coherence {coherence:.2f}")
    return {"rate_ratio": rate_ratio, "beats": beats, "expected_beats": expected, "backward_fraction": backward,
            "min_inst_rate_bpm": min_rate, "coherence": coherence, "failures": failures}


def band_limited_gram(gram, sample_interval_s: float, fundamental_hz: float) -> np.ndarray:
    """H G H^T for a zero-phase band-pass H around the fundamental (the Gram of the band-limited traces).

    A fifth-order Butterworth band-pass on [BAND_LOW f, BAND_HIGH f] (its top
    edge kept below Nyquist), run forward and backward (zero phase) along each
    axis of the symmetric (T, T) matrix in turn: filtering is linear, so
    filtering G's columns then its rows equals the Gram of the filtered traces.

    Examples
    --------
    >>> t = np.arange(400) * 0.04
    >>> x = np.stack([np.cos(2 * np.pi * t), 0.8 * np.cos(4 * np.pi * t + 1)], 1)
    >>> g = band_limited_gram(x @ x.T, 0.04, 1.0)
    >>> y = np.cos(2 * np.pi * t)[:, None]
    >>> bool(np.abs(g - y @ y.T)[100:300, 100:300].max() < 0.1)   # the fundamental's Gram, nearly
    True
    """
    import scipy.signal

    g = np.asarray(gram, np.float64)
    nyquist = 0.5 / sample_interval_s
    lo = BAND_LOW * fundamental_hz
    hi = min(BAND_HIGH * fundamental_hz, 0.9 * nyquist)
    if not (0 < lo < hi):
        raise InputError(f"no band around the fundamental {fundamental_hz:.3g} Hz below Nyquist {nyquist:.3g} Hz.")
    sos = scipy.signal.butter(5, [lo, hi], btype="bandpass", fs=1.0 / sample_interval_s, output="sos")
    pad = min(g.shape[0] - 1, int(3.0 / fundamental_hz / sample_interval_s) + 1)  # three periods
    half = scipy.signal.sosfiltfilt(sos, g, axis=0, padlen=pad)
    full = scipy.signal.sosfiltfilt(sos, half, axis=1, padlen=pad)
    return 0.5 * (full + full.T)


def fundamental_phase(band_gram) -> np.ndarray:
    """Phase of the band-limited fundamental from its Gram matrix: the analytic signal of the
    leading component (unwrapped, increasing).

    The leading eigenvector of the band-limited Gram is the time course that
    carries most of the region's band-limited signal; for one rhythm it is a
    sinusoid at the (drifting) fundamental, whatever the spatial phase of the
    pixels, so the angle of its analytic signal is the rhythm's phase.
    """
    import scipy.linalg
    import scipy.signal

    g = np.asarray(band_gram, np.float64)
    n = g.shape[0]
    _, vec = scipy.linalg.eigh(g, subset_by_index=[n - 1, n - 1])
    theta = np.unwrap(np.angle(scipy.signal.hilbert(vec[:, 0])))
    return theta if theta[-1] >= theta[0] else -theta


def window_distances(traces, frame_interval_s: float, rate_bpm: float, *, max_frames: int = 1500):
    """Distances between the centred, unit-normalised sliding windows of some traces.

    Returns ``(time_s, dist, choice)``: the (decimated) frame times, the (N, N)
    window distances and the :class:`tempofield.kernels.embedding.WindowChoice` used.
    The shared first half of :func:`region_reference` and
    :func:`loop_score_of_traces`.
    """
    time_s, dist, choice, _, _ = _window_distances(traces, frame_interval_s, rate_bpm, max_frames=max_frames)
    return time_s, dist, choice


def _window_distances(traces, frame_interval_s, rate_bpm, *, max_frames):
    """:func:`window_distances` and also the frame Gram matrix and the decimation step."""
    t_n = np.shape(traces)[0]
    period_frames = 60.0 / rate_bpm / frame_interval_s
    step = decimation_for(t_n, period_frames, max_frames)
    xs = np.asarray(np.asarray(traces)[::step], np.float64)  # decimate before the float64 copy
    choice = embedding.window_for_period(period_frames / step)
    gram = frame_gram(xs)
    d2 = embedding.sliding_window_sqdist(gram, dim=choice.dim, tau=choice.tau, center=True, normalize=True)
    return np.arange(xs.shape[0]) * frame_interval_s * step, np.sqrt(d2), choice, gram, step


def loop_score_of_traces(traces, frame_interval_s: float, rate_bpm: float, *, n_landmarks: int = 100,
                         max_frames: int = 1500) -> float:
    """Loop score (max H1 persistence / sqrt 3) of the sliding-window cloud of a few traces.

    The building block of the tile-level loop-score map: the same window
    choice and distances as :func:`region_reference`, persistence only.
    """
    from tempofield.kernels.topology import h1_persistence, loop_score

    _, dist, _ = window_distances(traces, frame_interval_s, rate_bpm, max_frames=max_frames)
    return float(loop_score(h1_persistence(dist, n_landmarks=n_landmarks).diagram))
