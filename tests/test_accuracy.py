"""Accuracy on synthetic scenes whose truth is set by construction (tempofield.scenes.synthetic).

The project's own accuracy targets, stated in each test: median rate error <= 0.5 bpm
with >= 10 cycles and per-pixel noise 3x the beat amplitude, >= 90 % of the beating
tissue found, and no rhythm on pure noise.
"""

from __future__ import annotations

import numpy as np
import pytest

import tempofield
from tempofield.scenes import synthetic


@pytest.mark.parametrize("waveform", ["sine", "calcium"])
def test_rate_error_with_noise_three_times_the_beat(waveform):
    """Median rate error <= 0.5 bpm with >= 10 cycles and per-pixel noise 3x the beat amplitude.

    The beat amplitude is that of the rhythm's fundamental (for the sine
    shape, half the peak-to-peak); the default pooling (3 x 3 pixels) brings
    the noise down to about the amplitude, which is what the engine sees.
    """
    base, contrast = 1000.0, 0.2
    noise_sd = 3 * base * contrast * _fundamental(waveform)
    s = synthetic.well_scene((400, 64, 64), frame_interval_s=0.04, contrast=contrast, baseline=base,
                             noise_sd=noise_sd, waveform=waveform, faint_patch=False, debris=0,
                             pacemaker=(20, 20), cluster_center=(48, 48), cluster_radius_px=8, bleach_tau_s=60,
                             dtype=np.float32, rng=11)
    res = tempofield.analyze(tempofield.open_stack(s.frames, frame_interval_s=0.04), (30, 150))
    for label, rate in s.truth["rate_by_region_bpm"].items():
        cycles = rate / 60 * 400 * 0.04
        assert cycles >= 10
        inside = s.truth["regions"] == label
        found = np.isfinite(res.rate_bpm[inside])
        assert found.mean() > 0.9, (label, found.mean())
        err = np.abs(res.rate_bpm[inside] - rate)
        assert np.nanmedian(err) <= 0.5


def test_no_rhythm_on_pure_noise_with_bleaching_and_debris():
    s = synthetic.noise_scene((300, 64, 64), rng=5)
    res = tempofield.analyze(tempofield.open_stack(s.frames, frame_interval_s=s.frame_interval_s), (30, 150))
    assert np.isfinite(res.rate_bpm).mean() <= 0.01


def _fundamental(waveform):
    """Amplitude of a beat shape's fundamental per unit contrast (what the amplitude map reports)."""
    p = np.arange(256) / 256
    return 2 * abs(np.mean(synthetic.WAVEFORMS[waveform](p) * np.exp(-2j * np.pi * p)))


@pytest.mark.parametrize("rng", [3, 4])
def test_coverage_with_a_faint_patch_under_noise_twice_its_beat(rng):
    """>= 90 % of the beating tissue is found, and >= 90 % of the faint patch itself, whose per-pixel
    noise is twice its beat amplitude (as in the rate-error test, the amplitude of the fundamental:
    the patch beats at a third of the sheet's contrast, 1000 * 0.25 / 3 * 0.276 = 23 intensity units)."""
    faint_amp = 1000 * 0.25 / 3 * _fundamental("calcium")
    s = synthetic.well_scene((400, 64, 64), pacemaker=(20, 20), cluster_center=(50, 50), cluster_radius_px=6,
                             noise_sd=2 * faint_amp, bleach_tau_s=60, debris=0, rng=rng)
    res = tempofield.analyze(tempofield.open_stack(s.frames, frame_interval_s=s.frame_interval_s), (20, 150))
    tissue = s.truth["regions"] > 0
    assert np.isfinite(res.rate_bpm[tissue]).mean() >= 0.9
    amp = s.truth["amplitude"]
    faint = (s.truth["regions"] == 1) & (amp > 0) & (amp < 0.5 * np.nanmax(amp))
    assert faint.sum() > 100
    assert np.isfinite(res.rate_bpm[faint]).mean() >= 0.9
    assert np.nanmedian(np.abs(res.rate_bpm[faint] - 72.0)) < 0.5


def test_fainter_patch_found_with_wider_pooling():
    """Noise twice the patch's peak-to-baseline beat (about 7x its fundamental) hides much of it
    from the default 3 x 3 pooling (40-55 % found, seeds 3-5); 5 x 5 pooling finds >= 90 %."""
    faint_peak = 1000 * 0.25 / 3
    s = synthetic.well_scene((400, 64, 64), pacemaker=(20, 20), cluster_center=(50, 50), cluster_radius_px=6,
                             noise_sd=2 * faint_peak, bleach_tau_s=60, debris=0, rng=3)
    st = tempofield.open_stack(s.frames, frame_interval_s=s.frame_interval_s)
    amp = s.truth["amplitude"]
    faint = (s.truth["regions"] == 1) & (amp > 0) & (amp < 0.5 * np.nanmax(amp))
    narrow = tempofield.analyze(st, (20, 150), maps_only=True)
    wide = tempofield.analyze(st, (20, 150), maps_only=True, pooling_radius_px=2)
    assert np.isfinite(wide.rate_bpm[faint]).mean() >= 0.9
    assert np.isfinite(wide.rate_bpm[faint]).mean() > np.isfinite(narrow.rate_bpm[faint]).mean() + 0.2
    assert np.nanmedian(np.abs(wide.rate_bpm[faint] - 72.0)) < 0.5
