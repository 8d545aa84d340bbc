"""The rhythm reference locks on the fundamental of any pulse shape, and checks itself.

Pulses with one or two bumps per beat, sharp upstrokes, a dicrotic wave, a
shoulder and alternans, with beat-to-beat variation, at slow, middle and fast
rates sampled at 15-30 frames per second (scenes from
``tempofield.scenes.synthetic.pulse_signal``, filmed as a travelling wave
over a tissue disc with camera noise and bleaching). The truth is the pulse
train itself: one reference beat per true beat.
"""

from __future__ import annotations

import numpy as np
import pytest

import tempofield
from tempofield.kernels import rhythm
from tempofield.scenes import synthetic

#: (rate bpm, frames per second): 40-180 bpm at 15-30 fps
RATES = [(45.0, 15.0), (100.0, 25.0), (170.0, 30.0)]


def _scene(shape, rate_bpm, fps, variation=0.08, seed=0, cycles=30):
    duration = cycles * 60.0 / rate_bpm + 2.0
    times, signal, onsets = synthetic.pulse_signal(duration, 0.002, rate_bpm, shape, variation=variation, rng=seed)
    scene = synthetic.waveform_scene(times, signal, frame_interval_s=1.0 / fps, shape=(32, 32), radius_px=10.0,
                                     amplitude=80.0, noise_sd=8.0, wave_speed_px_s=300.0, rng=seed + 1)
    return scene, onsets


def _beats_per_true_interval(beats, onsets, span):
    """How many reference beats fall in each true beat interval that lies inside the reference's span."""
    inside = [(a, b) for a, b in zip(onsets[:-1], onsets[1:]) if a >= span[0] and b <= span[1]]
    return np.array([np.sum((beats >= a) & (beats < b)) for a, b in inside])


def _check_one_beat_per_beat(res, onsets, rate_bpm):
    assert len(res.references) == 1, res.parameters["warnings"]
    ref = next(iter(res.references.values()))
    beats = np.asarray(ref.beat_times_s)
    per_interval = _beats_per_true_interval(beats, onsets, (ref.time_s[0], ref.time_s[-1]))
    # one beat per true beat over the record: the count within +-1
    expected = np.sum((onsets >= ref.time_s[0]) & (onsets <= ref.time_s[-1]))
    assert abs(len(beats) - expected) <= 1, (len(beats), expected)
    assert np.sum(per_interval != 1) <= 2, per_interval
    assert np.min(ref.inst_rate_bpm) > 0
    assert ref.rate_mean_bpm == pytest.approx(rate_bpm, rel=0.05)
    return ref


@pytest.mark.parametrize("shape", synthetic.PULSE_SHAPES)
@pytest.mark.parametrize("rate_bpm, fps", RATES)
def test_one_reference_beat_per_true_beat(shape, rate_bpm, fps):
    scene, onsets = _scene(shape, rate_bpm, fps)
    stack = tempofield.open_stack(scene.frames, frame_interval_s=scene.frame_interval_s)
    res = tempofield.analyze(stack, (30, 200), worker_processes=0)
    ref = _check_one_beat_per_beat(res, onsets, rate_bpm)
    assert not ref.check.get("failures"), ref.check
    # the disc is found as one region
    found = res.regions > 0
    disc = scene.truth["regions"] > 0
    assert (found & disc).sum() >= 0.9 * disc.sum()


def test_a_failing_topological_phase_falls_back_to_the_fundamental(monkeypatch):
    """When both topological routes give a phase that winds twice per beat (as a harmonic loop
    does), the self-check rejects them and the band-limited fundamental makes the reference:
    beats still right, the fallback named in the warnings, the CLI summary and run.json."""
    scene, onsets = _scene("dicrotic", 100.0, 25.0, seed=3)
    plain = rhythm.reference_from_distances

    def twice_per_beat(*args, **kwargs):
        ref = plain(*args, **kwargs)
        return rhythm.reference_from_theta(ref.time_s, 2 * np.unwrap(ref.theta_rad), diagram=ref.diagram,
                                           score=ref.score)

    monkeypatch.setattr(rhythm, "reference_from_distances", twice_per_beat)
    stack = tempofield.open_stack(scene.frames, frame_interval_s=scene.frame_interval_s)
    res = tempofield.analyze(stack, (30, 200), worker_processes=0)
    ref = _check_one_beat_per_beat(res, onsets, 100.0)
    assert ref.method == "band-limited fundamental"
    assert not ref.check["failures"]
    assert "mean rate is 2.0" in " ".join(ref.check["tried"]["topology"])
    warned = [w for w in res.parameters["warnings"] if "failed its self-check" in w]
    assert len(warned) == 1 and "band-limited fundamental" in warned[0]


def test_the_self_check_reads_what_it_measures():
    """A reference that is right passes; its own phase doubled fails on rate, beats and coherence."""
    t = np.arange(1200) * 0.04
    x = np.cos(2 * np.pi * 1.5 * t)[:, None] * np.ones((1, 6)) + np.random.default_rng(0).normal(0, 0.3, (1200, 6))
    good = rhythm.reference_from_theta(t, 2 * np.pi * 1.5 * t, diagram=None, score=1.0)
    check = rhythm.self_check(good, x, t, 90.0)
    assert check["failures"] == [] and check["coherence"] > 0.9 and check["rate_ratio"] == pytest.approx(1.0)
    doubled = rhythm.reference_from_theta(t, 4 * np.pi * 1.5 * t, diagram=None, score=1.0)
    failures = " ".join(rhythm.self_check(doubled, x, t, 90.0)["failures"])
    assert "mean rate is 2.00 x" in failures and "beats where" in failures and "coherence" in failures
    backwards = rhythm.reference_from_theta(t, 2 * np.pi * 1.5 * t + 2.5 * np.sin(2 * np.pi * 1.5 * t),
                                            diagram=None, score=1.0)
    assert "runs backwards" in " ".join(rhythm.self_check(backwards, x, t, 90.0)["failures"])


def test_reference_method_and_check_survive_save_and_load(tmp_path):
    scene, _ = _scene("two-bump", 100.0, 25.0, cycles=15)
    res = tempofield.analyze(tempofield.open_stack(scene.frames, frame_interval_s=scene.frame_interval_s),
                             (30, 200), worker_processes=0)
    res.save(tmp_path / "r")
    back = tempofield.load_result(tmp_path / "r")
    for label, ref in res.references.items():
        assert back.references[label].method == ref.method
        assert back.references[label].check["coherence"] == pytest.approx(ref.check["coherence"])
