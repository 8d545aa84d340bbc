"""Synthetic scenes with ground truth, for samples, tests and benchmarks.

Our scenario: a sheet of stem-cell-derived heart muscle in a round culture
well, imaged with a calcium dye or in bright field. A pacemaker site starts
each beat and a wave spreads from it at a set conduction velocity; a smaller
cluster beats on its own, slower; one patch is faint; the dye bleaches; the
camera adds noise; a few specks of debris flicker without a rhythm. Every
scene returns the stack and the truth it was built from.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class Scene:
    """A synthetic stack and its ground truth.

    Attributes
    ----------
    frames : (T, Y, X) ndarray
        The stack (uint16 unless asked otherwise).
    frame_interval_s, pixel_size_um : float
        Acquisition settings the stack pretends to have.
    truth : dict
        ``rate_bpm`` (Y, X) with NaN off tissue, ``delay_s`` (Y, X) activation
        delay after the region's earliest pixel, ``regions`` (Y, X) int32,
        ``beat_times_s`` {label: array}, ``origins`` {label: (y, x)},
        ``speed_um_s`` {label: float}, and ``phase_cycles`` {label: (T,) array}
        (the number of cycles elapsed at each frame, for drifting rates).
    """

    frames: np.ndarray
    frame_interval_s: float
    pixel_size_um: float
    truth: dict = field(default_factory=dict)


def calcium_wave(p):
    """A calcium-transient-like beat shape on phase ``p`` in cycles: fast rise, slower decay, peak 1."""
    p = np.mod(p, 1.0)
    w = (1.0 - np.exp(-p / 0.03)) * np.exp(-p / 0.22)
    return w / 0.8


def sine_wave(p):
    """A smooth contraction-like beat shape in [0, 1]."""
    return 0.5 - 0.5 * np.cos(2 * np.pi * p)


WAVEFORMS = {"calcium": calcium_wave, "sine": sine_wave}


def _cycles(n_frames, dt, rate_bpm, ramp):
    """Cycles elapsed at each frame for a rate that changes linearly by ``ramp`` (fraction) over the record."""
    t = np.arange(n_frames) * dt
    duration = n_frames * dt
    f0 = rate_bpm / 60.0
    # f(t) = f0 (1 + ramp (t/duration - 1/2)): mean rate f0
    return f0 * (t + ramp * (t ** 2 / (2 * duration) - t / 2))


def _beat_times(cycles, dt, delay=0.0):
    """Times where cycles crosses an integer (linear interpolation), shifted by ``delay``."""
    t = np.arange(cycles.size) * dt
    k = np.arange(np.ceil(cycles[0]), np.floor(cycles[-1]) + 1)
    return np.interp(k, cycles, t) + delay


def well_scene(shape=(300, 96, 96), *, frame_interval_s=0.04, pixel_size_um=4.0, rate_bpm=72.0,
               speed_um_s=2000.0, pacemaker=(30.0, 28.0), cluster_rate_bpm=42.0, cluster_center=(70.0, 70.0),
               cluster_radius_px=11.0, faint_patch=True, rate_ramp=0.0, waveform="calcium",
               contrast=0.25, noise_sd=12.0, baseline=1000.0, bleach_tau_s=30.0, debris=4,
               dtype=np.uint16, rng=0) -> Scene:
    """A culture well with a beating sheet, a slower cluster, a faint patch, bleaching, noise and debris.

    Parameters
    ----------
    shape : (T, Y, X)
        Frames and frame size in pixels.
    frame_interval_s, pixel_size_um : float
        Acquisition settings.
    rate_bpm : float
        Mean beat rate of the sheet.
    speed_um_s : float
        Conduction velocity of the radial wave from the pacemaker, micrometres per second.
    pacemaker : (y, x)
        Where each beat of the sheet starts, in pixels.
    cluster_rate_bpm, cluster_center, cluster_radius_px
        An independent, slower round cluster (set ``cluster_radius_px=0`` for none).
    faint_patch : bool
        Part of the sheet beats with a third of the contrast.
    rate_ramp : float
        The sheet's rate changes linearly by this fraction over the recording
        (0.2: from 0.9 to 1.1 times ``rate_bpm``).
    waveform : {"calcium", "sine"}
        Beat shape.
    contrast : float
        Beat amplitude as a fraction of the local baseline.
    noise_sd : float
        Standard deviation of the camera's Gaussian noise, intensity units.
    baseline : float
        Mean tissue brightness.
    bleach_tau_s : float
        Time constant of the exponential bleaching (inf for none).
    debris : int
        Number of flickering, non-rhythmic specks.
    dtype : numpy dtype
        Output type; float types keep the values unrounded.
    rng : int or numpy.random.Generator
        Seed.

    Returns
    -------
    Scene

    Examples
    --------
    >>> s = well_scene((60, 32, 32), pacemaker=(10, 10), cluster_center=(24, 24), cluster_radius_px=5)
    >>> s.frames.shape, sorted(s.truth["origins"])
    ((60, 32, 32), [1, 2])
    """
    rng = np.random.default_rng(rng)
    t_n, y_n, x_n = shape
    dt = frame_interval_s
    wave = WAVEFORMS[waveform]
    yy, xx = np.mgrid[0:y_n, 0:x_n].astype(float)
    cy, cx = (y_n - 1) / 2, (x_n - 1) / 2
    well = np.hypot(yy - cy, xx - cx) <= 0.47 * min(y_n, x_n)
    cluster = np.hypot(yy - cluster_center[0], xx - cluster_center[1]) <= cluster_radius_px
    gap = np.hypot(yy - cluster_center[0], xx - cluster_center[1]) <= cluster_radius_px + 3
    sheet = well & ~gap & (xx + yy < 1.55 * (x_n + y_n) / 2)  # a sheet that covers most of the well
    cluster &= well

    delay_sheet = np.hypot(yy - pacemaker[0], xx - pacemaker[1]) * pixel_size_um / speed_um_s
    delay_cluster = np.hypot(yy - cluster_center[0], xx - cluster_center[1]) * pixel_size_um / speed_um_s
    cyc_sheet = _cycles(t_n, dt, rate_bpm, rate_ramp)
    cyc_cluster = _cycles(t_n, dt, cluster_rate_bpm, 0.0)

    amp = np.zeros((y_n, x_n))
    amp[sheet] = contrast
    if faint_patch:
        patch = sheet & (np.hypot(yy - 0.7 * y_n, xx - 0.25 * x_n) <= 0.12 * min(y_n, x_n))
        amp[patch] = contrast / 3
    amp[cluster] = contrast
    base = baseline * (0.6 + 0.4 * well) * (1 + 0.05 * rng.standard_normal((y_n, x_n)))

    t = np.arange(t_n) * dt
    bleach = np.exp(-t / bleach_tau_s) if np.isfinite(bleach_tau_s) else np.ones(t_n)
    frames = np.empty(shape, np.float32)
    # cycles at pixel (delayed): cycles(t - delay) ~ cyc(t) - f(t) delay; use the exact
    # interpolation of the cycle curve at t - delay.
    for i in range(t_n):
        p_sheet = np.interp(t[i] - delay_sheet, t, cyc_sheet, left=None) if rate_ramp else \
            (t[i] - delay_sheet) * rate_bpm / 60.0
        p_cluster = (t[i] - delay_cluster) * cluster_rate_bpm / 60.0
        signal = np.where(cluster, wave(p_cluster), wave(p_sheet))
        frames[i] = base * bleach[i] * (1 + amp * signal)
    for _ in range(int(debris)):  # flickering specks: random on/off, no rhythm
        dy, dx = rng.integers(2, y_n - 4), rng.integers(2, x_n - 4)
        on = (rng.random(t_n) < 0.3).astype(np.float32)
        frames[:, dy:dy + 3, dx:dx + 3] += (0.4 * baseline * on)[:, None, None]
    frames += rng.normal(0.0, noise_sd, frames.shape).astype(np.float32)

    regions = np.zeros((y_n, x_n), np.int32)
    regions[sheet] = 1
    regions[cluster] = 2
    period_sheet = 60.0 / rate_bpm
    period_cluster = 60.0 / cluster_rate_bpm
    duration = t_n * dt
    rate_map = np.full((y_n, x_n), np.nan)
    rate_map[sheet] = (cyc_sheet[-1] - cyc_sheet[0]) / ((t_n - 1) * dt) * 60.0 if rate_ramp else rate_bpm
    rate_map[cluster] = cluster_rate_bpm
    delay = np.full((y_n, x_n), np.nan)
    d1 = delay_sheet - delay_sheet[sheet].min() if sheet.any() else delay_sheet
    delay[sheet] = np.mod(d1[sheet], period_sheet)
    if cluster.any():
        d2 = delay_cluster - delay_cluster[cluster].min()
        delay[cluster] = np.mod(d2[cluster], period_cluster)
    truth = {
        "rate_bpm": rate_map.astype(np.float32),
        "delay_s": delay.astype(np.float32),
        "regions": regions,
        "origins": {1: tuple(map(float, pacemaker)), 2: tuple(map(float, cluster_center))},
        "speed_um_s": {1: speed_um_s, 2: speed_um_s},
        "rate_by_region_bpm": {1: float(rate_map[sheet][0]) if sheet.any() else float("nan"),
                               2: cluster_rate_bpm},
        "phase_cycles": {1: cyc_sheet, 2: cyc_cluster},
        "beat_times_s": {1: _beat_times(cyc_sheet, dt, 0.0), 2: _beat_times(cyc_cluster, dt, 0.0)},
        "amplitude": (amp * base).astype(np.float32),
        "duration_s": duration,
    }
    if cluster_radius_px <= 0 or not cluster.any():
        for key in ("origins", "speed_um_s", "rate_by_region_bpm", "phase_cycles", "beat_times_s"):
            truth[key].pop(2, None)
    return Scene(_cast(frames, dtype), frame_interval_s, pixel_size_um, truth)


def plane_wave_scene(shape=(240, 64, 64), *, frame_interval_s=0.02, pixel_size_um=5.0, rate_bpm=90.0,
                     speed_um_s=8000.0, direction_deg=30.0, waveform="sine", contrast=0.2,
                     noise_sd=5.0, baseline=1000.0, dtype=np.float32, rng=0) -> Scene:
    """A sheet filling the frame, crossed by a straight wave of known speed and direction.

    ``direction_deg`` is the direction of travel, counter-clockwise from the +x
    axis with y pointing down the image rows (so 90 degrees travels to larger y).
    """
    rng = np.random.default_rng(rng)
    t_n, y_n, x_n = shape
    yy, xx = np.mgrid[0:y_n, 0:x_n].astype(float)
    ang = np.deg2rad(direction_deg)
    along = (xx * np.cos(ang) + yy * np.sin(ang)) * pixel_size_um
    delay_abs = along / speed_um_s
    delay_abs -= delay_abs.min()
    f = rate_bpm / 60.0
    t = np.arange(t_n)[:, None, None] * frame_interval_s
    wave = WAVEFORMS[waveform]
    frames = baseline * (1 + contrast * wave((t - delay_abs[None]) * f))
    frames = frames + rng.normal(0.0, noise_sd, frames.shape)
    truth = {"rate_bpm": np.full((y_n, x_n), rate_bpm, np.float32),
             "delay_s": np.mod(delay_abs, 1 / f).astype(np.float32),
             "delay_unwrapped_s": delay_abs.astype(np.float32),
             "regions": np.ones((y_n, x_n), np.int32), "speed_um_s": {1: speed_um_s},
             "direction_deg": direction_deg, "phase_cycles": {1: f * t[:, 0, 0]}}
    return Scene(_cast(frames, dtype), frame_interval_s, pixel_size_um, truth)


def noise_scene(shape=(300, 64, 64), *, frame_interval_s=0.04, baseline=1000.0, noise_sd=20.0,
                bleach_tau_s=20.0, debris=6, dtype=np.uint16, rng=0) -> Scene:
    """Pure camera noise with bleaching and flickering debris: there is no rhythm anywhere."""
    rng = np.random.default_rng(rng)
    t_n, y_n, x_n = shape
    t = np.arange(t_n) * frame_interval_s
    base = baseline * (1 + 0.1 * rng.standard_normal((y_n, x_n)))
    frames = base[None] * np.exp(-t / bleach_tau_s)[:, None, None]
    for _ in range(int(debris)):
        dy, dx = rng.integers(0, y_n - 3), rng.integers(0, x_n - 3)
        on = (rng.random(t_n) < 0.3).astype(float)
        frames[:, dy:dy + 3, dx:dx + 3] += (0.5 * baseline * on)[:, None, None]
    frames = frames + rng.normal(0.0, noise_sd, frames.shape)
    truth = {"rate_bpm": np.full((y_n, x_n), np.nan, np.float32), "regions": np.zeros((y_n, x_n), np.int32)}
    return Scene(_cast(frames, dtype), frame_interval_s, 1.0, truth)


def _cast(frames, dtype):
    dtype = np.dtype(dtype)
    if np.issubdtype(dtype, np.integer):
        info = np.iinfo(dtype)
        return np.clip(np.rint(frames), info.min, info.max).astype(dtype)
    return frames.astype(dtype)


# ------------------------------------------------------------------ pulse shapes and recorded signals
def _bump(p, centre, width):
    return np.exp(-0.5 * ((p - centre) / width) ** 2)


def _pulse_shape(name):
    """One beat on phase p in [0, 1): peak about 1, baseline 0 (each shape's own rule below)."""
    shapes = {
        # a smooth single bump
        "smooth": lambda p: _bump(p, 0.3, 0.12),
        # an arterial pulse: sharp upstroke, then a dicrotic wave after the notch
        "dicrotic": lambda p: (1.0 - np.exp(-p / 0.04)) * np.exp(-p / 0.16) / 0.62 + 0.55 * _bump(p, 0.45, 0.06),
        # two bumps of nearly equal height per beat
        "two-bump": lambda p: _bump(p, 0.2, 0.06) + 0.85 * _bump(p, 0.55, 0.07),
        # a near-instant upstroke and a slow decay (voltage or calcium transients)
        "sharp": lambda p: np.where(p < 0.02, p / 0.02, np.exp(-(p - 0.02) / 0.18)),
        # a calcium transient with a shoulder on its decay
        "shoulder": lambda p: (1.0 - np.exp(-p / 0.03)) * np.exp(-p / 0.3) / 0.85 + 0.35 * _bump(p, 0.5, 0.1),
    }
    return shapes[name]


PULSE_SHAPES = ("smooth", "dicrotic", "two-bump", "sharp", "shoulder", "alternans")


def pulse_signal(duration_s, sample_interval_s, rate_bpm, shape="dicrotic", *, variation=0.0, rng=None):
    """A train of pulses of a given shape with beat-to-beat variation: (times, signal, beat onsets).

    Parameters
    ----------
    duration_s, sample_interval_s : float
        Length of the record and its sampling interval, seconds.
    rate_bpm : float
        Mean rate.
    shape : str
        One of :data:`PULSE_SHAPES`; ``"alternans"`` is the dicrotic pulse with
        every other beat 30 % smaller.
    variation : float
        Each interval is the mean period times ``1 + u``, u uniform in
        ``[-variation, variation]``.
    rng : int or numpy.random.Generator, optional

    Returns
    -------
    times_s, signal : (n,) ndarray
    onsets_s : (b,) ndarray
        The start of every beat (phase 0 of the shape).
    """
    rng = np.random.default_rng(rng)
    period = 60.0 / rate_bpm
    n_beats = int(np.ceil(duration_s / period)) + 2
    intervals = period * (1.0 + rng.uniform(-variation, variation, n_beats))
    onsets = np.concatenate([[-rng.uniform(0, period)], intervals]).cumsum()
    times = np.arange(int(round(duration_s / sample_interval_s))) * sample_interval_s
    k = np.searchsorted(onsets, times, side="right") - 1
    phase = (times - onsets[k]) / (onsets[k + 1] - onsets[k])
    form = _pulse_shape("dicrotic" if shape == "alternans" else shape)
    gain = np.where(k % 2 == 1, 0.7, 1.0) if shape == "alternans" else 1.0
    signal = gain * form(phase)
    onsets = onsets[(onsets >= 0) & (onsets <= times[-1])]
    return times, signal.astype(np.float64), onsets


def waveform_scene(times_s, signal, *, frame_interval_s=0.04, shape=(48, 48), radius_px=14.0,
                   amplitude=60.0, baseline=800.0, noise_sd=6.0, wave_speed_px_s=400.0, bleach_fraction=0.2,
                   pixel_size_um=2.0, dtype=np.uint16, rng=None) -> Scene:
    """Film a 1-D signal: a tissue disc whose brightness follows it, as a travelling wave.

    The signal is resampled at the frame times (linear interpolation); pixel
    p of the disc shows it delayed by its distance from the disc's left edge
    over ``wave_speed_px_s``. The dye bleaches by ``bleach_fraction`` over the
    record (a faded dye beats less: the beat is scaled, the baseline is not);
    the camera adds Gaussian noise everywhere. Used to turn recorded
    pulses into small videos with the recording's own beat-to-beat timing.

    Returns
    -------
    Scene
        ``truth``: ``regions`` (the disc), ``delay_s`` (Y, X), ``signal`` the
        resampled signal at the disc's first pixel.
    """
    rng = np.random.default_rng(rng)
    times_s = np.asarray(times_s, float)
    signal = np.asarray(signal, float)
    signal = (signal - np.median(signal)) / max(np.percentile(signal, 99) - np.percentile(signal, 1), 1e-12)
    y_n, x_n = shape
    n = int((times_s[-1] - times_s[0]) / frame_interval_s)
    frame_t = times_s[0] + np.arange(n) * frame_interval_s
    yy, xx = np.mgrid[:y_n, :x_n]
    cy, cx = (y_n - 1) / 2.0, (x_n - 1) / 2.0
    disc = (yy - cy) ** 2 + (xx - cx) ** 2 <= radius_px ** 2
    delay = np.where(disc, (xx - (cx - radius_px)) / wave_speed_px_s, np.nan)
    frames = np.full((n, y_n, x_n), baseline, np.float64)
    bleach = 1.0 - bleach_fraction * (frame_t - frame_t[0]) / max(frame_t[-1] - frame_t[0], 1e-12)
    dvals = np.unique(delay[disc])
    for d in dvals:
        cols = disc & (delay == d)
        frames[:, cols] += (amplitude * bleach * np.interp(frame_t - d, times_s, signal))[:, None]
    frames += rng.normal(0.0, noise_sd, frames.shape)
    regions = disc.astype(np.int32)
    truth = {"regions": regions, "delay_s": np.where(disc, delay - np.nanmin(delay), np.nan).astype(np.float32),
             "signal": np.interp(frame_t, times_s, signal), "frame_times_s": frame_t - frame_t[0]}
    return Scene(_cast(frames, dtype), frame_interval_s, pixel_size_um, truth)
