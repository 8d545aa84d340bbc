"""Tests of tempofield.kernels.reference: phase -> beats, instantaneous rate, variability.

Ground truth is set by construction (synthetic phases with a known, drifting
rate, so the truth is exact). Target: beat times within 1.5 frames (the project's
accuracy target for beat times).
"""

import json

import numpy as np
import pytest

from tempofield.errors import InputError
from tempofield.kernels.embedding import sliding_window_sqdist, window_for_period
from tempofield.kernels.reference import (
    RhythmReference,
    reference_from_distances,
    reference_from_theta,
)

DT = 0.02  # s per frame
F0 = 2.0  # Hz


def _ramp_phase(t, duration):
    """Phase of a rate ramping linearly from 0.8*F0 to 1.2*F0 (+-20%) over the record."""
    return 2 * np.pi * F0 * (0.8 * t + 0.2 * t**2 / duration)


def _ramp_beats(k, duration):
    """Exact times where the ramp phase equals 2 pi k (root of 0.2/D t^2 + 0.8 t - k/F0 = 0)."""
    a, b = 0.2 / duration, 0.8
    return (-b + np.sqrt(b * b + 4 * a * k / F0)) / (2 * a)


@pytest.mark.parametrize("wobble", [0.0, 0.3])
def test_ramp_rate_and_beats(wobble):
    # Ground truth by construction. wobble != 0 makes the phase speed vary within each
    # beat (as circular coordinates do) but keeps theta = 0 at the true beats.
    duration = 20.0
    t = np.arange(0, duration, DT)
    psi = _ramp_phase(t, duration)
    phase = psi + wobble * np.sin(psi)
    theta = np.mod(phase, 2 * np.pi)
    ref = reference_from_theta(t, theta, diagram=[[0.1, 1.6]], score=0.87)
    true_rate = 60 * F0 * (0.8 + 0.4 * t / duration)
    assert np.mean(np.abs(ref.inst_rate_bpm - true_rate)) < 2.0
    k = np.arange(1, len(ref.beat_times_s) + 1)
    true_beats = _ramp_beats(k, duration)
    assert len(ref.beat_times_s) == int(psi[-1] // (2 * np.pi))
    assert np.max(np.abs(ref.beat_times_s - true_beats)) < 0.1 * DT
    # Definition: beats / duration from the unwrapped phase.
    assert ref.rate_mean_bpm == pytest.approx((phase[-1] - phase[0]) / (2 * np.pi) / (t[-1] - t[0]) * 60,
                                              rel=1e-9)


def test_interval_statistics():
    # RMSSD and CV by their textbook definitions (Task Force ESC/NASPE 1996).
    beats = np.array([0.0, 1.0, 2.1, 3.0, 4.05])
    ref = RhythmReference(np.arange(5.0), np.zeros(5), np.zeros(5), beats)
    iv = np.diff(beats)
    np.testing.assert_allclose(ref.beat_intervals_s, iv)
    assert ref.rmssd_s == pytest.approx(np.sqrt(np.mean(np.diff(iv) ** 2)))
    assert ref.interval_cv == pytest.approx(np.std(iv, ddof=1) / np.mean(iv))
    few = RhythmReference(np.arange(5.0), np.zeros(5), np.zeros(5), np.array([1.0, 2.0]))
    assert np.isnan(few.rmssd_s) and np.isnan(few.interval_cv)


def test_json_round_trip():
    t = np.arange(0, 5, 0.05)
    ref = reference_from_theta(t, 2 * np.pi * 1.2 * t, diagram=[[0.1, 1.5], [0.2, 0.3]], score=0.8,
                               second_loop_ratio=0.07, window_frames=12, dim=13, tau=1)
    back = RhythmReference.from_dict(json.loads(json.dumps(ref.to_dict())))
    for name in ("time_s", "theta_rad", "inst_rate_bpm", "beat_times_s", "diagram"):
        np.testing.assert_array_equal(getattr(back, name), getattr(ref, name))
    assert back.diagram.shape == (2, 2)
    assert (back.score, back.window_frames, back.dim, back.tau) == (0.8, 12, 13, 1)
    assert back.rate_mean_bpm == pytest.approx(72.0)


def test_reference_from_distances_tracks_drifting_video():
    # A small video with a rate drifting +-10% (sinusoidally) around 120 bpm, each pixel a
    # lagged beat plus noise. Truth by construction; target: beats within 1.5 frames.
    rng = np.random.default_rng(2)
    n_frames, n_pix = 700, 12
    t = np.arange(n_frames) * DT
    duration = t[-1]
    # rate F0 * (1 + 0.1 sin(2 pi t / D)), integrated exactly
    psi = 2 * np.pi * F0 * (t + 0.1 * duration / (2 * np.pi) * (1 - np.cos(2 * np.pi * t / duration)))
    lags = rng.uniform(0, 1.0, n_pix)
    X = 3.0 + np.cos(psi[:, None] - lags[None, :]) + 0.1 * rng.normal(size=(n_frames, n_pix))
    dim, tau, _ = window_for_period(1 / (F0 * DT))
    d = np.sqrt(sliding_window_sqdist(X @ X.T, dim=dim, tau=tau))
    ref = reference_from_distances(t, d, dim=dim, tau=tau, n_landmarks=300)
    assert ref.score > 0.8 and not ref.quasi_periodic
    assert ref.window_frames == (dim - 1) * tau
    # Window centres: the reference spans the record minus one window.
    assert ref.time_s[0] == pytest.approx((dim - 1) * tau / 2 * DT)
    assert len(ref.time_s) == n_frames - (dim - 1) * tau
    # Align the arbitrary origin of theta to the truth, then compare beat times.
    psi_c = np.interp(ref.time_s, t, psi)
    offset = np.angle(np.mean(np.exp(1j * (ref.theta_rad - psi_c))))
    levels = 2 * np.pi * np.arange(1, 200) - offset
    true_beats = np.interp(levels, psi, t, left=np.nan, right=np.nan)
    true_beats = true_beats[(true_beats > ref.time_s[0]) & (true_beats < ref.time_s[-1])]
    err = np.abs(ref.beat_times_s[:, None] - true_beats[None, :]).min(axis=1)
    assert abs(len(ref.beat_times_s) - len(true_beats)) <= 1
    assert np.max(err) < 1.5 * DT
    true_rate = 60 * np.gradient(np.interp(ref.time_s, t, psi), ref.time_s) / (2 * np.pi)
    assert np.mean(np.abs(ref.inst_rate_bpm - true_rate)) < 2.0


BAD = [
    (reference_from_theta, ([0, 1, 1, 2], np.zeros(4)), dict(diagram=None, score=1.0),
     r"time_s must be a finite, strictly increasing"),
    (reference_from_theta, (np.arange(5.0), np.zeros(4)), dict(diagram=None, score=1.0),
     r"theta_rad must be finite with the same shape"),
    (reference_from_theta, (np.arange(5.0), np.zeros(5)), dict(diagram=None, score=1.0),
     r"does not advance.*orient_with_time"),
    (reference_from_theta, (np.arange(5.0), np.arange(5.0)), dict(diagram=None, score=1.0, smooth_s=-1.0),
     r"smooth_s must be a positive time"),
    (reference_from_distances, (np.arange(20.0), np.zeros((10, 10))), dict(dim=3, tau=2),
     r"dist has shape \(10, 10\) but 20 frames .* give N = T - \(dim - 1\) \* tau = 16"),
    (reference_from_distances, (np.arange(20.0), np.zeros((16, 16))), dict(dim=3.0, tau=2),
     r"dim and tau must be integers"),
    (RhythmReference.from_dict, ({"time_s": [], "colour": 1},), {}, r"unknown RhythmReference field"),
]


@pytest.mark.parametrize("func,args,kwargs,match", BAD)
def test_bad_inputs(func, args, kwargs, match):
    with pytest.raises(InputError, match=match):
        func(*args, **kwargs)
