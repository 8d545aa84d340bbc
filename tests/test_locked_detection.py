"""Reference-locked detection: faint tissue beside a known rhythm joins its region.

The matched test of a known signal of unknown phase (Kay 1998, Fundamentals
of Statistical Signal Processing: Detection Theory) against the region's own
reference: no search over rates, so at the stated per-pixel false-alarm rate
it finds fainter tissue than the spectral search over the whole band.
"""

from __future__ import annotations

import contextlib

import numpy as np
import pytest
from scipy import ndimage

import tempofield
from tempofield.engine import run as run_mod
from tempofield.engine import stages
from tempofield.kernels import phase, regions

DT = 0.04
RATE = 72.0


def faint_scene(faint_amp, *, sigma=20.0, cycles=30, shape=(64, 96), seed=0):
    """A bright sheet (a slow wave across it) and, touching it, a faint patch of the same rhythm;
    camera noise sigma per pixel, bleaching to about 60 % and a drifting lamp everywhere."""
    rng = np.random.default_rng(seed)
    n = int(round(cycles * 60.0 / RATE / DT))
    t = np.arange(n) * DT
    y, x = shape
    yy, xx = np.mgrid[:y, :x]
    sheet = (yy - 32) ** 2 + (xx - 28) ** 2 <= 18 ** 2
    patch = ((yy - 32) ** 2 + (xx - 58) ** 2 <= 14 ** 2) & ~sheet
    beat = np.cos(2 * np.pi * RATE / 60.0 * (t[:, None, None] - xx[None] / 400.0))
    frames = 1000.0 + 100.0 * beat * sheet + faint_amp * beat * patch
    frames *= np.exp(-t / (2 * t[-1]))[:, None, None]
    frames *= (1.0 + 0.01 * np.cumsum(rng.normal(0, 0.05, n)))[:, None, None]
    frames += rng.normal(0, sigma, frames.shape)
    return frames.astype(np.float32), sheet, patch


def _coverage(res, sheet, patch):
    found = res.regions > 0
    far = ~ndimage.binary_dilation(sheet | patch, iterations=2)
    return found[patch].mean(), found[far].mean()


@pytest.fixture(scope="module")
def runs():
    out = {}
    for amp in (20.0, 2.5):  # the noise sigma itself, and an eighth of it
        frames, sheet, patch = faint_scene(amp)
        stack = tempofield.open_stack(frames, frame_interval_s=DT)
        out[amp] = (sheet, patch, {locked: tempofield.analyze(stack, (30, 180), locked_detection=locked)
                                   for locked in (False, True)})
    return out


def test_a_patch_as_faint_as_the_noise_is_found(runs):
    """Fundamental amplitude = per-pixel noise sigma over 30 cycles, default pooling: >= 90 % found,
    <= 1 % of the field away from the tissue labelled, with bleaching and lamp flicker."""
    sheet, patch, res = runs[20.0]
    found, false = _coverage(res[True], sheet, patch)
    assert found >= 0.9 and false <= 0.01
    assert res[True].region_table.shape[0] == 1


def test_locked_detection_finds_what_the_spectral_search_misses(runs):
    """At an eighth of the noise sigma the spectral search finds under half of the patch; the
    lock-in against the sheet's reference finds at least 25 points more, with no more false area."""
    sheet, patch, res = runs[2.5]
    before, false_before = _coverage(res[False], sheet, patch)
    after, false_after = _coverage(res[True], sheet, patch)
    assert before < 0.5 and after >= before + 0.25
    assert false_after <= max(0.01, false_before + 0.002)
    detection = res[True].extra_maps["detection"]
    assert set(np.unique(detection).tolist()) <= {0.0, 1.0, 2.0}
    gained = detection == 2
    assert gained.sum() > 0 and (gained & patch).sum() >= 0.9 * gained.sum()
    # joined pixels carry the rate of the reference they locked in to, a phase and a delay
    for label, ref in res[True].references.items():
        here = gained & (res[True].regions == label)
        assert np.allclose(res[True].rate_bpm[here], ref.rate_mean_bpm)
    assert np.all(np.isfinite(res[True].phase_rad[gained])) and np.all(np.isfinite(res[True].delay_s[gained]))
    assert "detection" not in res[False].extra_maps or not np.any(res[False].extra_maps["detection"] == 2)


def test_the_detection_channel_is_saved_and_loaded(runs, tmp_path):
    _, _, res = runs[2.5]
    res[True].save(tmp_path / "r")
    back = tempofield.load_result(tmp_path / "r")
    np.testing.assert_array_equal(back.extra_maps["detection"], res[True].extra_maps["detection"])


def _noise_scores(false_alarm):
    """The matched test's scores on the noise pixels of a scene with one region, from the engine's own
    stages (maps pass, segmentation, references, lock-in), with bleaching and flicker."""
    frames, sheet, patch = faint_scene(0.0, shape=(96, 128), seed=5)
    stack = tempofield.open_stack(frames, frame_interval_s=DT)
    with contextlib.ExitStack() as cleanup:
        run = stages.prepare(stack, (30, 180), {"false_alarm": false_alarm}, None, cleanup)
        upto = run_mod.STAGES.index(stages.lockin) + 1
        for stage in run_mod.STAGES[:upto]:
            list(stage(run))
        score = phase.locked_score(run.lock_amplitude, run.maps["noise_power"], stack.n_frames)
    far = ~ndimage.binary_dilation(sheet, iterations=3)
    return score[far]


def test_false_alarm_rate_on_noise_is_the_stated_one():
    """On noise pixels (bleaching and lamp flicker included), the share above the threshold is within a
    factor 2 of the stated false-alarm rate."""
    for false_alarm in (0.01, 0.05):
        rate = np.mean(_noise_scores(false_alarm) > -np.log(false_alarm))
        assert false_alarm / 2 <= rate <= 2 * false_alarm, (false_alarm, rate)


def test_join_locked_keeps_only_pixels_touching_their_region():
    lab = np.zeros((20, 20), np.int32)
    lab[5:10, 5:10] = 1
    lab[12:18, 12:18] = 2
    cand = regions.nearest_region(lab, [1, 2])
    sig = np.zeros((20, 20), bool)
    sig[5:10, 10:12] = True     # touches region 1
    sig[0, 19] = True           # isolated
    sig[11, 12:18] = True       # touches region 2
    out = regions.join_locked(lab, cand, sig, np.ones((20, 20)), 0)
    assert (out[5:10, 10:12] == 1).all() and out[0, 19] == 0 and (out[11, 12:18] == 2).all()
    assert (out[lab > 0] == lab[lab > 0]).all()
    # a region without a reference is no candidate
    assert set(np.unique(regions.nearest_region(lab, [2])).tolist()) == {2}
