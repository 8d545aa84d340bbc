"""Accuracy on data tempofield did not make: the figures behind the real-data tests, in one table.

Prints, for each pulse shape at three rates (slow, middle, fast; 15-30 fps),
the beat count against the truth, how many true beat intervals hold exactly
one beat, the lowest instantaneous rate and the method that made the phase;
for each real recorded pulse (HeartPy's example recordings, against
NeuroKit2's beat detector), mean rate, matched intervals, interval error,
SDNN and RMSSD against the targets; and the coverage and false area of a
faint patch beside a bright sheet with and without reference-locked
detection, at several amplitudes. The tests hold the same targets
(``tests/test_pulse_shapes.py``, ``tests/test_real_recordings.py``,
``tests/test_locked_detection.py``); this script shows the numbers.

    python benchmarks/accuracy_real_data.py [--seeds 0 1]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))


def pulse_shapes(seeds):
    import tempofield
    from test_pulse_shapes import RATES, _beats_per_true_interval, _scene

    from tempofield.scenes import synthetic

    print("\npulse shapes (30 cycles, +-8 % beat-to-beat; target: count within +-1, one beat per true "
          "interval, rate never negative)")
    print(f"{'shape':10s} {'bpm':>4s} {'fps':>4s} {'seed':>4s} {'beats/true':>11s} {'intervals != 1':>15s} "
          f"{'min rate':>9s}  method")
    for shape in synthetic.PULSE_SHAPES:
        for rate, fps in RATES:
            for seed in seeds:
                scene, onsets = _scene(shape, rate, fps, seed=seed)
                res = tempofield.analyze(tempofield.open_stack(scene.frames, frame_interval_s=scene.frame_interval_s),
                                         (30, 200))
                for ref in res.references.values():
                    b = np.asarray(ref.beat_times_s)
                    span = (ref.time_s[0], ref.time_s[-1])
                    true = int(np.sum((onsets >= span[0]) & (onsets <= span[1])))
                    bad = int(np.sum(_beats_per_true_interval(b, onsets, span) != 1))
                    print(f"{shape:10s} {rate:4.0f} {fps:4.0f} {seed:4d} {len(b):5d}/{true:<5d} {bad:15d} "
                          f"{ref.inst_rate_bpm.min():9.1f}  {ref.method}")


def recordings():
    from test_real_recordings import CASES, _rmssd, _sdnn, analyse_case, match_intervals

    print("\nreal recorded pulses (HeartPy examples; NeuroKit2 beats; targets: rate 1 %, matched 90 %, "
          "MAE 40 ms, SDNN 25 %, RMSSD 35 %)")
    print(f"{'recording':14s} {'rate err %':>10s} {'matched':>9s} {'MAE ms':>7s} {'SDNN ours/theirs ms':>20s} "
          f"{'RMSSD ours/theirs ms':>21s}  method")
    for name in sorted(CASES):
        truth, scene, res = analyse_case(name)
        disc = scene.truth["regions"] > 0
        label = int(np.bincount(res.regions[disc]).argmax())
        ref = res.references[label]
        beats = np.asarray(ref.beat_times_s)
        iv = np.diff(truth[(truth >= beats[0] - 0.5) & (truth <= beats[-1] + 0.5)])
        theirs, ours, n = match_intervals(beats, truth)
        print(f"{name:14s} {100 * (ref.rate_mean_bpm / (60 / iv.mean()) - 1):10.2f} {theirs.size:4d}/{n:<4d} "
              f"{1000 * np.mean(np.abs(ours - theirs)):7.1f} {1000 * _sdnn(np.diff(beats)):9.1f}/{1000 * _sdnn(iv):<10.1f} "
              f"{1000 * _rmssd(np.diff(beats)):10.1f}/{1000 * _rmssd(iv):<10.1f}  {ref.method}")


def faint_patch():
    import tempofield
    from scipy import ndimage
    from test_locked_detection import DT, faint_scene

    print("\nfaint patch beside a bright sheet (noise sigma 20, 30 cycles, bleaching, lamp drift; "
          "false area: labelled pixels more than 2 px from tissue)")
    print(f"{'amplitude':>9s} {'found, spectral':>16s} {'found, + locked':>16s} {'false, spectral':>16s} "
          f"{'false, + locked':>16s}")
    for amp in (20.0, 10.0, 5.0, 3.3, 2.5, 2.0):
        frames, sheet, patch = faint_scene(amp)
        stack = tempofield.open_stack(frames, frame_interval_s=DT)
        far = ~ndimage.binary_dilation(sheet | patch, iterations=2)
        row = []
        for locked in (False, True):
            found = tempofield.analyze(stack, (30, 180), locked_detection=locked).regions > 0
            row.append((found[patch].mean(), found[far].mean()))
        print(f"{amp:9.1f} {100 * row[0][0]:15.1f}% {100 * row[1][0]:15.1f}% {100 * row[0][1]:15.2f}% "
              f"{100 * row[1][1]:15.2f}%")


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--seeds", type=int, nargs="+", default=[0])
    args = p.parse_args(argv)
    from tempofield import kernels

    kernels.warm_up()
    pulse_shapes(args.seeds)
    recordings()
    faint_patch()


if __name__ == "__main__":
    main()
