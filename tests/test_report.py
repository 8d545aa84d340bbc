"""The report, CSVs, presets and the magnified preview, as files a person opens."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from PIL import Image

import tempofield
from tempofield.engine import presets
from tempofield.kernels import magnify
from tempofield.outputs.report import render_report
from tempofield.scenes import synthetic


@pytest.fixture(scope="module")
def saved(tmp_path_factory, well):
    st = tempofield.open_stack(well.frames, frame_interval_s=0.04, pixel_size_um=4.0)
    res = tempofield.analyze(st, (20, 150), magnified_preview=True)
    from tempofield.outputs.report import preview_writer, report_writers

    out = tmp_path_factory.mktemp("rep") / "res"
    res.save(out, extra_files={**report_writers(res, st), **preview_writer(res, st)})
    return res, out


def test_report_png_has_content_in_every_panel(saved):
    res, out = saved
    img = np.asarray(Image.open(out / "report.png").convert("L"), float)
    assert img.shape[0] > 800 and img.shape[1] > 1000
    # split the 3 x 3 layout (last row: the table) and require ink in every cell
    h, w = img.shape
    rows = [(0.05, 0.37), (0.41, 0.74), (0.77, 0.93)]
    for r0, r1 in rows:
        for c in range(3):
            cell = img[int(r0 * h):int(r1 * h), int(c * w / 3):int((c + 1) * w / 3)]
            assert cell.std() > 10, (r0, c)


def test_csvs_parse_and_carry_units(saved):
    res, out = saved
    regions = pd.read_csv(out / "regions.csv")
    beats = pd.read_csv(out / "beats.csv")
    assert "rate_median_bpm" in regions.columns and "area_um2" in regions.columns
    assert list(beats.columns) == ["region", "beat", "time_s", "interval_s"]
    assert len(beats) == sum(len(r.beat_times_s) for r in res.references.values())
    np.testing.assert_allclose(beats.interval_s.dropna().median(), 60 / 72.0, rtol=0.02)


def test_report_for_a_field_without_rhythm(tmp_path):
    s = synthetic.noise_scene((300, 32, 32), rng=1)
    st = tempofield.open_stack(s.frames, frame_interval_s=s.frame_interval_s)
    res = tempofield.analyze(st, (20, 150))
    assert render_report(res, tmp_path / "r.png", st).stat().st_size > 10_000


def test_magnified_preview_amplifies_the_band_only(saved):
    """Wu et al. 2012: I + alpha B; the rhythm's band grows by 1 + alpha, other frequencies stay."""
    res, out = saved
    import tifffile

    prev = tifffile.imread(out / "preview_magnified.tif")
    assert prev.shape[1:] == res.shape
    t = np.arange(200) * 0.05  # whole cycles of both components
    beat = np.sin(2 * np.pi * 1.0 * t)
    slow = np.sin(2 * np.pi * 0.2 * t)
    x = (100 + 0.5 * beat + 2 * slow)[:, None, None] * np.ones((1, 8, 8))
    y = magnify.magnify(x, 0.05, (0.8, 1.2), alpha=9.0, sigma_px=0)[:, 4, 4]

    def amp(sig, f):
        return 2 * abs(np.mean((sig - sig.mean()) * np.exp(-2j * np.pi * f * t)))

    assert amp(y, 1.0) == pytest.approx(10 * amp(x[:, 4, 4], 1.0), rel=0.02)
    assert amp(y, 0.2) == pytest.approx(amp(x[:, 4, 4], 0.2), rel=0.02)


def test_specimen_preset_sets_band_and_warns():
    s = synthetic.well_scene((500, 40, 40), pacemaker=(10, 10), cluster_center=(30, 30), cluster_radius_px=5,
                             rng=8)
    st = tempofield.open_stack(s.frames, frame_interval_s=0.04, pixel_size_um=4.0)
    res = tempofield.analyze(st, None, specimen="hpsc-cardiomyocytes")
    warned = res.parameters["warnings"]
    assert not [w for w in warned if " bpm is outside" in w]  # 72 and 42 bpm are plausible here
    # the synthetic wave (2000 um/s = 0.2 cm/s) is slower than such sheets conduct: flagged
    assert any("conduction velocity" in w and "Lee et al. 2012" in w for w in warned)
    assert res.parameters["rate_range_bpm"] == list(presets.SPECIMENS["hpsc-cardiomyocytes"].rate_range_bpm)
    # 72 and 42 bpm are plausible for these cells; for a zebrafish heart they are not
    res = tempofield.analyze(st, (20, 150), specimen="zebrafish-heart-28c")
    text = " ".join(res.parameters["warnings"])
    assert "outside the plausible 120-225 bpm" in text and "Barrionuevo" in text
    # The frame-rate warning: rates up to 225 bpm (3.75 Hz) need more than 7.5 frames per second, a
    # frame interval below 60 / 2 / 225 s (Shannon 1949, Proc. IRE 37:10-21). 25 fps is enough: no warning.
    limit_s = 60 / 2 / 225
    assert res.frame_interval_s < limit_s
    assert "frame rate" not in text
    # ...while the same preset warns once frames are further apart than that limit.
    zebrafish = presets.SPECIMENS["zebrafish-heart-28c"]
    for dt, warns in ((0.99 * limit_s, False), (1.01 * limit_s, True), (0.2, True)):
        got = presets.plausibility_warnings(zebrafish, res.region_table, dt)
        assert any("frame rate" in w and "too low" in w for w in got) == warns, dt
    with pytest.raises(tempofield.errors.InputError, match="known presets"):
        presets.get_specimen("frog")
