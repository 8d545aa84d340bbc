"""A region's rhythm over time: from a phase series theta(t) to beats, rate and variability.

:class:`RhythmReference` holds the phase of a region's rhythm sampled over
time (from the circular coordinates of its sliding-window cloud, see
:mod:`tempofield.kernels.topology`), the instantaneous rate, the beat times (where the
unwrapped phase crosses a multiple of 2 pi), the H1 diagram and loop score it
came from, and derived beat-to-beat statistics. It round-trips through plain
dicts for JSON. :func:`reference_from_theta` builds one from any phase series;
:func:`reference_from_distances` runs the whole topological route on a
sliding-window distance matrix. Pure numpy/scipy; no I/O.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields

import numpy as np

from tempofield._dtypes import as_float
from tempofield.errors import InputError
from tempofield.kernels.topology import (
    circular_coordinates,
    h1_persistence,
    is_quasiperiodic,
    loop_score,
    orient_with_time,
    second_loop_ratio,
)

__all__ = ["RhythmReference", "reference_from_theta", "reference_from_distances"]

_ARRAY_FIELDS = ("time_s", "theta_rad", "inst_rate_bpm", "beat_times_s", "diagram")


@dataclass
class RhythmReference:
    """The rhythm of one region over time.

    Attributes
    ----------
    time_s : (n,) ndarray of float64
        Sample times in seconds (window centres for a sliding-window reference;
        they span less than the recording by one window length).
    theta_rad : (n,) ndarray of float64
        Phase in ``[0, 2 pi)``, increasing with time; a beat is a crossing of 0.
    inst_rate_bpm : (n,) ndarray of float64
        Instantaneous rate in beats per minute.
    beat_times_s : (b,) ndarray of float64
        Times at which the unwrapped phase crosses a multiple of 2 pi, in seconds.
    diagram : (k, 2) ndarray of float64
        H1 persistence diagram the phase came from (empty if none).
    score : float
        Loop score in ``[0, 1]`` (:func:`tempofield.kernels.topology.loop_score`).
    second_loop_ratio : float
        Second over first H1 persistence.
    quasi_periodic : bool
        Two strong loops: the rhythm is quasi-periodic, not one loop.
    window_frames : int or None
        Sliding-window length ``(dim - 1) * tau`` in frames, if any.
    dim, tau : int or None
        Sliding-window coordinates and delay (frames), if any.
    smooth_s : float or None
        Smoothing window used for ``inst_rate_bpm``, in seconds.
    method : str
        What made the phase: ``"topology"`` (circular coordinates of the
        sliding-window cloud) or ``"band-limited fundamental"`` (the
        analytic-signal phase of the fundamental, the fallback); see
        :func:`tempofield.kernels.rhythm.region_reference`.
    check : dict
        The self-check's measured values and its failures (empty when none ran).
    """

    time_s: np.ndarray
    theta_rad: np.ndarray
    inst_rate_bpm: np.ndarray
    beat_times_s: np.ndarray
    diagram: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    score: float = float("nan")
    second_loop_ratio: float = 0.0
    quasi_periodic: bool = False
    window_frames: int | None = None
    dim: int | None = None
    tau: int | None = None
    smooth_s: float | None = None
    method: str = "topology"
    check: dict = field(default_factory=dict)

    @property
    def beat_intervals_s(self) -> np.ndarray:
        """(b - 1,) beat-to-beat intervals in seconds."""
        return np.diff(np.asarray(self.beat_times_s, dtype=np.float64))

    @property
    def mean_period_s(self) -> float:
        """Mean beat period: the mean beat interval, or 60 / mean rate with fewer than two intervals."""
        iv = self.beat_intervals_s
        return float(iv.mean()) if iv.size >= 2 else 60.0 / self.rate_mean_bpm

    @property
    def rate_mean_bpm(self) -> float:
        """Beats per minute over the record: unwrapped phase turns / duration * 60."""
        t = np.asarray(self.time_s, dtype=np.float64)
        if t.size < 2 or t[-1] == t[0]:
            return float("nan")
        unwrapped = np.unwrap(np.asarray(self.theta_rad, dtype=np.float64))
        return float((unwrapped[-1] - unwrapped[0]) / (2 * np.pi) / (t[-1] - t[0]) * 60.0)

    @property
    def interval_cv(self) -> float:
        """Coefficient of variation of the beat intervals (sample std / mean); NaN if < 2."""
        iv = self.beat_intervals_s
        return float(np.std(iv, ddof=1) / np.mean(iv)) if iv.size >= 2 else float("nan")

    @property
    def rmssd_s(self) -> float:
        """Root mean square of successive interval differences, seconds; NaN if < 2 intervals."""
        iv = self.beat_intervals_s
        return float(np.sqrt(np.mean(np.diff(iv) ** 2))) if iv.size >= 2 else float("nan")

    def to_dict(self) -> dict:
        """Plain-Python dict (arrays as lists) for JSON; inverse of :meth:`from_dict`."""
        out = {}
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name in _ARRAY_FIELDS:
                value = np.asarray(value, dtype=np.float64).tolist()
            elif isinstance(value, (np.generic,)):
                value = value.item()
            out[f.name] = value
        return out

    @classmethod
    def from_dict(cls, data: dict) -> RhythmReference:
        """Rebuild a reference from :meth:`to_dict` output (e.g. after ``json.loads``)."""
        names = {f.name for f in fields(cls)}
        unknown = set(data) - names
        if unknown:
            raise InputError(
                f"unknown RhythmReference field(s) {sorted(unknown)}; allowed are "
                f"{sorted(names)}. Pass the dict written by RhythmReference.to_dict()."
            )
        kwargs = dict(data)
        for name in _ARRAY_FIELDS:
            if name in kwargs:
                kwargs[name] = np.asarray(kwargs[name], dtype=np.float64)
        if "diagram" in kwargs:
            kwargs["diagram"] = kwargs["diagram"].reshape(-1, 2)
        return cls(**kwargs)


# --------------------------------------------------------------------------- kernels
def _beat_times(time_s, unwrapped):
    """First upward crossings of each multiple of 2 pi, linearly interpolated."""
    envelope = np.maximum.accumulate(unwrapped)
    first = np.floor(unwrapped[0] / (2 * np.pi)) + 1
    last = np.floor(envelope[-1] / (2 * np.pi))
    levels = 2 * np.pi * np.arange(first, last + 1)
    # First sample at or above each level; the running maximum makes it one crossing
    # per level even when a noisy phase steps back across it.
    hi = np.searchsorted(envelope, levels, side="left")
    lo = hi - 1
    frac = (levels - unwrapped[lo]) / (unwrapped[hi] - unwrapped[lo])
    return time_s[lo] + frac * (time_s[hi] - time_s[lo])


def _window_rate(time_s, unwrapped, length_s):
    """Mean phase speed (rad/s) over a window of ``length_s`` centred on each sample.

    ``(Theta(b) - Theta(a)) / (b - a)`` with ``Theta`` linearly interpolated: the exact
    mean of ``dTheta/dt`` over ``[a, b]``. Near the ends the window is shifted to stay
    inside the record (so the first and last half windows get the edge window's rate).
    """
    t0, t1 = time_s[0], time_s[-1]
    length = np.minimum(length_s, t1 - t0)
    a = np.clip(time_s - length / 2, t0, t1 - length)
    b = a + length
    return (np.interp(b, time_s, unwrapped) - np.interp(a, time_s, unwrapped)) / length


def _check_time(time_s, name="time_s"):
    t = as_float(time_s, np.float64)
    if t.ndim != 1 or t.size < 4 or not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
        raise InputError(
            f"{name} must be a finite, strictly increasing 1-D array of at least 4 times "
            f"in seconds, got shape {t.shape}. Use frame_index * frame_interval_s."
        )
    return t


def reference_from_theta(time_s, theta_rad, *, diagram, score, smooth_s=None,
                         second_loop_ratio=0.0, quasi_periodic=False, window_frames=None,
                         dim=None, tau=None, method="topology", check=None):
    """Beats, instantaneous rate and variability from a phase series theta(t).

    Parameters
    ----------
    time_s : (n,) array_like
        Strictly increasing sample times in seconds, ``n >= 4``.
    theta_rad : (n,) array_like
        Phase in radians (any branch; it is unwrapped), increasing with time.
    diagram : (k, 2) array_like or None
        H1 diagram to store (None: empty).
    score : float
        Loop score to store.
    smooth_s : float, optional
        Length in seconds of the window over which the rate is averaged; by
        default one local period (see Notes).
    second_loop_ratio, quasi_periodic, window_frames, dim, tau, method, check : optional
        Stored as given.

    Returns
    -------
    reference : RhythmReference

    Raises
    ------
    tempofield.errors.InputError
        If the times are not increasing, the shapes differ, theta is not finite,
        the phase does not advance, or ``smooth_s`` is not positive.

    Notes
    -----
    With ``Theta`` the unwrapped phase, the instantaneous rate at ``t`` is the
    mean phase speed over a window ``[a, b]`` of length ``L`` centred on ``t``:

    .. math:: r(t) = \frac{60}{2\pi} \frac{\Theta(b) - \Theta(a)}{b - a}
              = \frac{60}{2\pi} \frac{1}{L}\int_a^b \dot\Theta\,dt' \quad [bpm],

    with ``Theta`` linearly interpolated between samples (so uneven sampling is
    fine), and the window shifted inward at the ends of the record (the first
    and last half windows get the edge window's rate). By default ``L`` is one
    *local* period, found in two passes (first over the mean period, then over
    ``2 pi / r_1(t)``, clipped to 0.5-2 mean periods); ``smooth_s`` fixes ``L``.
    One period because circular coordinates follow the loop's geometry, not
    time, so the phase speed wobbles within each beat; the mean over a whole
    period cancels that wobble, and is exact for a linearly drifting rate.
    ``smooth_s`` in the result records the mean period (default) or the value given.
    A beat is the first time ``Theta`` reaches ``2 pi k`` for
    each integer ``k`` after the first sample, by linear interpolation between
    samples (sub-sample). A constant offset of theta shifts every beat equally
    and leaves intervals, CV and RMSSD unchanged.

    References
    ----------
    .. [1] V. de Silva, D. Morozov and M. Vejdemo-Johansson, Discrete Comput.
       Geom. 45:737-759 (2011).
    .. [2] Task Force of the ESC and NASPE, "Heart rate variability", Circulation
       93:1043-1065 (1996) (RMSSD).

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(0, 10, 0.05)
    >>> ref = reference_from_theta(t, 2 * np.pi * 1.5 * t + 0.1, diagram=None, score=1.0)
    >>> round(ref.rate_mean_bpm, 6)
    90.0
    >>> np.round(ref.beat_times_s[:3], 4)
    array([0.6561, 1.3227, 1.9894])
    """
    t = _check_time(time_s)
    theta = as_float(theta_rad, np.float64)
    if theta.shape != t.shape or not np.all(np.isfinite(theta)):
        raise InputError(
            f"theta_rad must be finite with the same shape as time_s {t.shape}, got "
            f"{theta.shape}. Pass one phase per sample time."
        )
    unwrapped = np.unwrap(theta)
    span = unwrapped[-1] - unwrapped[0]
    if not span > 0:
        raise InputError(
            "theta_rad does not advance over the record (unwrapped change "
            f"{span:.3g} rad); orient it with tempofield.kernels.topology.orient_with_time first."
        )
    mean_period_s = 2 * np.pi * (t[-1] - t[0]) / span
    if smooth_s is not None and not (np.isfinite(smooth_s) and smooth_s > 0):
        raise InputError(f"smooth_s must be a positive time in seconds, got {smooth_s!r}.")
    if smooth_s is None:
        # Pass 1 over the mean period, pass 2 over the local period it finds.
        first = _window_rate(t, unwrapped, np.full(t.size, mean_period_s))
        local_period = np.clip(2 * np.pi / np.maximum(first, 1e-300),
                               0.5 * mean_period_s, 2.0 * mean_period_s)
        rate_rad_s = _window_rate(t, unwrapped, local_period)
        smooth_used = mean_period_s
    else:
        rate_rad_s = _window_rate(t, unwrapped, np.full(t.size, float(smooth_s)))
        smooth_used = float(smooth_s)
    return RhythmReference(
        time_s=t,
        theta_rad=np.mod(theta, 2 * np.pi),
        inst_rate_bpm=rate_rad_s * 60.0 / (2 * np.pi),
        beat_times_s=_beat_times(t, unwrapped),
        diagram=np.zeros((0, 2)) if diagram is None else as_float(diagram, np.float64).reshape(-1, 2),
        score=float(score),
        second_loop_ratio=float(second_loop_ratio),
        quasi_periodic=bool(quasi_periodic),
        window_frames=None if window_frames is None else int(window_frames),
        dim=None if dim is None else int(dim),
        tau=None if tau is None else int(tau),
        smooth_s=float(smooth_used),
        method=str(method),
        check=dict(check or {}),
    )


def reference_from_distances(time_s, dist, *, dim, tau, n_landmarks=200, coeff=47, rng=None,
                             smooth_s=None):
    """The topological route: sliding-window distances -> persistence -> phase -> beats.

    Parameters
    ----------
    time_s : (T,) array_like
        Times of the T frames, in seconds, strictly increasing.
    dist : (N, N) array_like
        Distances (not squared) between the ``N = T - (dim - 1) * tau`` sliding
        windows, e.g. ``np.sqrt(sliding_window_sqdist(G, dim=dim, tau=tau))``.
    dim : int
        Frames per window.
    tau : int
        Delay in frames.
    n_landmarks : int, optional
        Landmarks for persistence and circular coordinates (default 200).
    coeff : int, optional
        Odd prime for the coefficients (default 47).
    rng : None, int or numpy.random.Generator, optional
        Draws the first landmark; None starts at window 0 (deterministic).
    smooth_s : float, optional
        Rate smoothing, see :func:`reference_from_theta`.

    Returns
    -------
    reference : RhythmReference
        Sampled at the window centres ``time_s[i + (dim - 1) tau / 2]`` (the mean
        of the two middle frames' times when ``(dim - 1) tau`` is odd), so it
        spans the recording minus one window length: no beat is reported in the
        first or last half window.

    Raises
    ------
    tempofield.errors.InputError
        If the sizes disagree, or for the errors of
        :func:`tempofield.kernels.topology.h1_persistence` and
        :func:`tempofield.kernels.topology.circular_coordinates`.

    Notes
    -----
    ``theta = orient_with_time(circular_coordinates(dist))`` from the most
    persistent H1 class; the stored score is ``loop_score`` (max persistence /
    sqrt(3), meaningful for centred, unit-normalised windows), with
    ``second_loop_ratio`` and ``is_quasiperiodic`` of the same diagram.

    References
    ----------
    .. [1] J. A. Perea and J. Harer, Found. Comput. Math. 15:799-838 (2015).
    .. [2] V. de Silva, D. Morozov and M. Vejdemo-Johansson, Discrete Comput.
       Geom. 45:737-759 (2011).
    .. [3] J. A. Perea, Abel Symposia 15:435-458 (2020).

    Examples
    --------
    >>> import numpy as np
    >>> from tempofield.kernels.embedding import sliding_window_sqdist
    >>> t = np.arange(300) * 0.02
    >>> x = np.cos(2 * np.pi * 2.0 * t)[:, None]            # 2 Hz = 120 bpm, 25 frames
    >>> d = np.sqrt(sliding_window_sqdist(x @ x.T, dim=13, tau=2))
    >>> ref = reference_from_distances(t, d, dim=13, tau=2, n_landmarks=100)
    >>> round(ref.rate_mean_bpm)
    120
    """
    t = _check_time(time_s)
    d = as_float(dist, np.float64)
    if not (isinstance(dim, (int, np.integer)) and isinstance(tau, (int, np.integer))
            and dim >= 2 and tau >= 1):
        raise InputError(
            f"dim and tau must be integers with dim >= 2 and tau >= 1, got dim={dim!r}, "
            f"tau={tau!r}. Use tempofield.kernels.embedding.window_for_period."
        )
    span = (int(dim) - 1) * int(tau)
    n_windows = t.size - span
    if d.ndim != 2 or d.shape != (n_windows, n_windows):
        raise InputError(
            f"dist has shape {d.shape} but {t.size} frames with dim={dim}, tau={tau} give "
            f"N = T - (dim - 1) * tau = {n_windows} windows; pass the (N, N) window "
            "distances computed with the same dim and tau."
        )
    start = 0 if rng is None else int(np.random.default_rng(rng).integers(n_windows))
    persistence = h1_persistence(d, n_landmarks=n_landmarks, coeff=coeff, cocycles=True,
                                 start=start)
    theta, _ = circular_coordinates(d, persistence=persistence)
    theta = orient_with_time(theta)
    index = np.arange(n_windows)
    centre_s = 0.5 * (t[index + span // 2] + t[index + (span + 1) // 2])
    diagram = persistence.diagram
    return reference_from_theta(
        centre_s, theta, diagram=diagram, score=loop_score(diagram), smooth_s=smooth_s,
        second_loop_ratio=second_loop_ratio(diagram),
        quasi_periodic=is_quasiperiodic(diagram), window_frames=span, dim=dim, tau=tau,
    )
