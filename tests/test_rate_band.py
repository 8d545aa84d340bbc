"""A rate band that starts above the rhythm: the harmonic is never reported silently.

A pulse train at rate f has harmonics at 2f and 3f (Fourier series of a
periodic signal); when the band excludes f, the spectral search finds a
harmonic. The run must warn with the likely true rate and the band that
would include it.
"""

from __future__ import annotations

import re

import numpy as np

import tempofield
from tempofield.scenes import synthetic


def test_60_bpm_under_a_90_to_240_band_names_60_bpm():
    s = synthetic.well_scene((400, 48, 48), rate_bpm=60.0, cluster_radius_px=0, faint_patch=False, debris=0, rng=2)
    res = tempofield.analyze(tempofield.open_stack(s.frames, frame_interval_s=s.frame_interval_s), (90, 240))
    named = [w for w in res.parameters["warnings"] if "harmonic" in w]
    assert named, res.parameters["warnings"]
    rates = [float(r) for w in named for r in re.findall(r"about (\d+(?:\.\d+)?) bpm", w)]
    assert any(abs(r - 60.0) <= 3.0 for r in rates), named
    assert any("--rate-range" in w for w in named)
    # a reference outside the band is never reported without a warning
    for label, ref in res.references.items():
        if not 90 <= ref.rate_mean_bpm <= 240:
            assert any(w.startswith(f"region {label}: its rhythm reference beats at") for w in res.parameters["warnings"])


def test_two_rates_under_a_narrow_preset_are_not_silent_harmonics():
    """Two rhythms (120 and 97.5 bpm) under the mouse preset (band 200-850 bpm): whatever the rate map
    shows in the band, each region's warnings say it is probably a harmonic of the slower rhythm."""
    s = synthetic.well_scene((500, 64, 64), frame_interval_s=0.02, rate_bpm=120.0, cluster_rate_bpm=97.5,
                             cluster_center=(46.0, 46.0), cluster_radius_px=10.0, faint_patch=False, debris=0,
                             rng=5)
    res = tempofield.analyze(tempofield.open_stack(s.frames, frame_interval_s=s.frame_interval_s),
                             specimen="mouse-heart")
    assert len(res.region_table) >= 1
    for _, row in res.region_table.iterrows():
        label = int(row["region"])
        mine = [w for w in res.parameters["warnings"] if w.startswith(f"region {label}:") and "harmonic" in w]
        assert mine, (label, row["rate_median_bpm"], res.parameters["warnings"])
