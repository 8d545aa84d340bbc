"""Propagation only where it is measured: no fake wave on tissue that beats all at once.

Conduction velocity from the activation-time gradient, speed = 1 / |grad T|
(Bayly et al. 1998, IEEE Trans. Biomed. Eng. 45:563-571). A sheet that beats
in synchrony, its signal fading toward its edge into camera noise, must get
no speed, direction or origin, and a warning that says within how much it
beats; plane waves at 30 cm/s and at 1 cm/s across the same sheet are still
measured within 5 %.
"""

from __future__ import annotations

import numpy as np
import pytest

import tempofield
from tempofield.kernels import propagation

DT = 0.02
RATE = 60.0
PIXEL_UM = 40.0


def sheet(speed_um_s, *, fade=True, shape=(900, 72, 72), noise=8.0, seed=0):
    """A round sheet filling most of the frame; a plane wave along +x at ``speed_um_s`` (inf: in synchrony);
    the beat fades from the centre to nothing at the edge when ``fade``."""
    rng = np.random.default_rng(seed)
    t_n, y, x = shape
    yy, xx = np.mgrid[:y, :x].astype(float)
    r = np.hypot(yy - (y - 1) / 2, xx - (x - 1) / 2)
    radius = 0.48 * min(y, x)
    disc = r <= radius
    gain = np.clip(1.0 - r / radius, 0, 1) ** 1.5 if fade else disc.astype(float)
    delay = 0.0 if not np.isfinite(speed_um_s) else (xx - xx[disc].min()) * PIXEL_UM / speed_um_s
    t = np.arange(t_n)[:, None, None] * DT
    frames = 1000.0 + 60.0 * gain * np.cos(2 * np.pi * RATE / 60.0 * (t - delay)) * disc
    frames += rng.normal(0, noise, frames.shape)
    return frames.astype(np.float32), disc


def _analyze(frames):
    st = tempofield.open_stack(frames, frame_interval_s=DT, pixel_size_um=PIXEL_UM)
    return tempofield.analyze(st, (30, 180))


def test_synchronous_sheet_with_a_fading_edge_has_no_wave():
    frames, disc = sheet(np.inf)
    res = _analyze(frames)
    assert res.region_table.shape[0] == 1
    row = res.region_table.iloc[0]
    speed_col = [c for c in res.region_table.columns if c.startswith("conduction_velocity")][0]
    assert np.isnan(row[speed_col]) and np.isnan(row["wave_direction_deg"])
    assert np.isnan(row["origin_y_px"]) and np.isnan(row["origin_x_px"])
    assert np.all(np.isnan(res.extra_maps["velocity_x_um_s"])) and np.all(np.isnan(res.extra_maps["velocity_y_um_s"]))
    warned = [w for w in res.parameters["warnings"] if "no measurable propagation" in w]
    assert len(warned) == 1 and "beats within" in warned[0]


@pytest.mark.parametrize("speed_cm_s", [30.0, 1.0])
def test_plane_waves_across_the_same_sheet_are_still_measured(speed_cm_s):
    speed = speed_cm_s * 1e4  # micrometres per second
    frames, disc = sheet(speed, fade=False)
    res = _analyze(frames)
    row = res.region_table.iloc[0]
    assert row["conduction_velocity_um_s"] == pytest.approx(speed, rel=0.05)
    assert abs(row["wave_direction_deg"]) < 5.0
    assert not [w for w in res.parameters["warnings"] if "no measurable propagation" in w]


def test_the_test_of_propagation_is_calibrated_on_noise():
    """Delays of pure noise with known uncertainty pass as propagation about as often as its alpha says;
    a gradient three times the noise over the region is found."""
    rng = np.random.default_rng(1)
    mask = np.ones((40, 40), bool)
    sd = np.full((40, 40), 0.01)
    passed = sum(propagation.propagation_test(rng.normal(0, 0.01, (40, 40)), mask, sd)["measurable"]
                 for _ in range(300))
    assert passed <= 3  # alpha = 1e-3 of 300 trials: 0.3 expected
    yy, xx = np.mgrid[:40, :40]
    ramp = 0.03 * xx / 40 + rng.normal(0, 0.01, (40, 40))
    assert propagation.propagation_test(ramp, mask, sd)["measurable"]
    # delay uncertainty from the lock-in's signal-to-noise ratio: 1 / sqrt(2 SNR) rad of the period
    assert propagation.delay_uncertainty(np.array([50.0]), 1.0)[0] == pytest.approx(0.1 / (2 * np.pi))
