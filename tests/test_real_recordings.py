"""Beats of real recorded pulses, against an independent beat detector, interval by interval.

Recordings: the photoplethysmogram (PPG) example recordings shipped inside the
HeartPy package (van Gent et al., 2019, Transportation Research Part F
66:368-378), loaded with ``heartpy.load_exampledata``; nothing is downloaded:

- example 0 (``data.csv``): 25 s at 100 Hz, a finger pulse with a pronounced
  dicrotic wave after every upstroke;
- example 1 (``data2.csv``): its last 23 s (105-128 s; before that the sensor
  was off or moving, and any detector marks artefacts there);
- example 2 (``data3.csv``): its first 300 s (longer than four minutes), about
  67 Hz with uneven time stamps, clipped at the top, with a second bump per beat.

Each recording is resampled to 100 Hz (linear interpolation on its own time
stamps) and filmed (``tempofield.scenes.synthetic.waveform_scene``) at 25
frames per second: a tissue disc whose brightness follows the recording, as
a travelling wave, with camera noise and bleaching.

The independent detector is NeuroKit2's PPG peak detection
(``neurokit2.ppg_clean`` then ``neurokit2.ppg_findpeaks``, Elgendi et al.
2013, PLoS ONE 8:e76585; Makowski et al. 2021, Behav. Res. Methods
53:1689-1696), run on the resampled recording itself. tempofield's beats are
the moments the rhythm's fundamental peaks at the region's earliest pixel, a
fixed lag after the systolic peaks; intervals do not depend on that lag.
Targets per recording: mean rate within 1 %, at least 90 % of the detector's
intervals matched beat for beat, interval mean absolute error at most 40 ms,
SDNN within 25 % and RMSSD within 35 % (beat-to-beat statistics as in the
Task Force of the ESC and NASPE, 1996, Circulation 93:1043-1065).
"""

from __future__ import annotations

import numpy as np
import pytest

import tempofield
from tempofield.scenes import synthetic

heartpy = pytest.importorskip("heartpy")
nk = pytest.importorskip("neurokit2")

FS = 100.0
FRAME_INTERVAL_S = 0.04


def recording(example: int, start_s: float, stop_s: float):
    """One of HeartPy's example recordings, resampled to 100 Hz, cut to [start_s, stop_s)."""
    data, timer = heartpy.load_exampledata(example)
    data = np.asarray(data, float)
    if example == 0:
        t = np.arange(data.size) / 100.0
    elif example == 1:
        t = np.asarray(timer, float) / 1000.0
    else:
        stamps = np.array(timer, dtype="datetime64[us]")
        t = (stamps - stamps[0]) / np.timedelta64(1, "s")
    keep = np.concatenate([[True], np.diff(t) > 0])  # repeated time stamps
    t, data = t[keep], data[keep]
    tu = np.arange(t[0], t[-1], 1.0 / FS)
    x = np.interp(tu, t, data)
    tu = tu - tu[0]
    sel = (tu >= start_s) & (tu < stop_s)
    return tu[sel] - start_s, x[sel]


def detector_beats(t, x):
    """Systolic peaks found by NeuroKit2 (Elgendi's method) on the recording itself."""
    peaks = nk.ppg_findpeaks(nk.ppg_clean(x, sampling_rate=FS), sampling_rate=FS)["PPG_Peaks"]
    return t[np.asarray(peaks, int)]


def match_intervals(beats, truth):
    """Intervals of ``truth`` matched beat for beat by ``beats`` (after removing their common lag).

    Returns (matched truth intervals, the corresponding intervals of ``beats``,
    the number of truth intervals inside the span of ``beats``).
    """
    inside = truth[(truth >= beats[0] - 0.5) & (truth <= beats[-1] + 0.5)]
    d = beats[:, None] - inside[None, :]
    lag = np.median(d[np.arange(beats.size), np.abs(d).argmin(1)])
    shifted = beats - lag
    nearest = np.abs(shifted[:, None] - inside[None, :]).argmin(1)
    close = np.abs(shifted - inside[nearest]) < 0.3 * np.median(np.diff(inside))
    ours, theirs = [], []
    for k in range(beats.size - 1):
        if close[k] and close[k + 1] and nearest[k + 1] == nearest[k] + 1:
            ours.append(shifted[k + 1] - shifted[k])
            theirs.append(inside[nearest[k + 1]] - inside[nearest[k]])
    return np.array(theirs), np.array(ours), inside.size - 1


def _sdnn(iv):
    return float(np.std(iv, ddof=1))


def _rmssd(iv):
    return float(np.sqrt(np.mean(np.diff(iv) ** 2)))


CASES = {
    "dicrotic-25s": (0, 0.0, 25.0),
    "last-23s": (1, 105.0, 128.0),
    "long-300s": (2, 0.0, 300.0),
}


def analyse_case(name):
    """One case of :data:`CASES`: the detector's beats, the filmed scene and tempofield's result."""
    example, start, stop = CASES[name]
    t, x = recording(example, start, stop)
    truth = detector_beats(t, x)
    scene = synthetic.waveform_scene(t, x, frame_interval_s=FRAME_INTERVAL_S, shape=(24, 24), radius_px=8.0,
                                     amplitude=60.0, noise_sd=6.0, wave_speed_px_s=300.0, bleach_fraction=0.2,
                                     rng=example + 1)
    res = tempofield.analyze(tempofield.open_stack(scene.frames, frame_interval_s=FRAME_INTERVAL_S), (40, 200))
    return truth, scene, res


@pytest.fixture(scope="module", params=sorted(CASES))
def analysed(request):
    return (request.param, *analyse_case(request.param))


def test_beats_match_the_independent_detector(analysed):
    name, truth, scene, res = analysed
    disc = scene.truth["regions"] > 0
    # the whole disc is one region with one reference
    label = np.bincount(res.regions[disc]).argmax()
    assert label > 0 and (res.regions[disc] == label).mean() >= 0.9, name
    ref = res.references[label]
    beats = np.asarray(ref.beat_times_s)
    truth_iv = np.diff(truth[(truth >= beats[0] - 0.5) & (truth <= beats[-1] + 0.5)])
    theirs, ours, n_truth = match_intervals(beats, truth)
    assert ref.rate_mean_bpm == pytest.approx(60.0 / truth_iv.mean(), rel=0.01), name
    assert theirs.size >= 0.9 * n_truth, (name, theirs.size, n_truth)
    assert np.mean(np.abs(ours - theirs)) <= 0.040, name
    assert _sdnn(np.diff(beats)) == pytest.approx(_sdnn(truth_iv), rel=0.25), name
    assert _rmssd(np.diff(beats)) == pytest.approx(_rmssd(truth_iv), rel=0.35), name
    assert np.min(ref.inst_rate_bpm) > 0
    assert not ref.check["failures"], (name, ref.check)


def test_a_reference_that_needed_the_fallback_says_so(analysed):
    """Where the topological phase failed on a real pulse, the run's warnings name the fallback."""
    name, _, _, res = analysed
    for label, ref in res.references.items():
        named = [w for w in res.parameters["warnings"] if w.startswith(f"region {label}: the topological phase")]
        if ref.method == "topology":
            assert not named
        else:
            assert len(named) == 1 and ref.method in named[0], (name, res.parameters["warnings"])
