"""Outputs say what they hold: units in names, no pooled or noise rates, empty where not measured."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

import tempofield
from tempofield.scenes import synthetic


@pytest.fixture(scope="module")
def two_rates():
    s = synthetic.well_scene((300, 64, 64), rate_bpm=96.0, cluster_rate_bpm=60.0, cluster_center=(46.0, 46.0),
                             cluster_radius_px=10.0, faint_patch=False, debris=0, rng=3)
    return s


def test_without_a_pixel_size_speeds_are_in_pixels_per_second(two_rates, tmp_path):
    res = tempofield.analyze(tempofield.open_stack(two_rates.frames, frame_interval_s=0.04), (30, 150))
    cols = res.region_table.columns
    assert "conduction_velocity_px_s" in cols and "conduction_velocity_um_s" not in cols
    assert "origin_y_um" not in cols and "area_um2" in cols
    assert not any(k.endswith("_um_s") for k in res.extra_maps)
    res.save(tmp_path / "r")
    assert "conduction_velocity_px_s" in pd.read_csv(tmp_path / "r" / "regions.csv").columns
    with_size = tempofield.analyze(tempofield.open_stack(two_rates.frames, frame_interval_s=0.04, pixel_size_um=4.0),
                                   (30, 150))
    assert {"conduction_velocity_um_s", "origin_y_um", "origin_x_um"} <= set(with_size.region_table.columns)
    row = with_size.region_table.iloc[0]
    if np.isfinite(row["origin_y_px"]):
        assert row["origin_y_um"] == pytest.approx(4.0 * row["origin_y_px"])


def test_coherence_only_where_there_is_a_rhythm(two_rates):
    res = tempofield.analyze(tempofield.open_stack(two_rates.frames, frame_interval_s=0.04), (30, 150))
    assert np.all(np.isnan(res.coherence[res.regions == 0]))
    assert np.nanmedian(res.coherence[res.regions > 0]) > 0.9


def test_maps_only_leaves_the_rhythm_columns_empty(two_rates, tmp_path):
    res = tempofield.analyze(tempofield.open_stack(two_rates.frames, frame_interval_s=0.04), (30, 150),
                             maps_only=True)
    table = res.region_table
    assert len(table) >= 1
    assert table["beats"].isna().all() and table["quasi_periodic"].isna().all()
    assert table["loop_score"].isna().all()
    res.save(tmp_path / "m")
    text = (tmp_path / "m" / "regions.csv").read_text().splitlines()
    header, first = text[0].split(","), text[1].split(",")
    assert first[header.index("beats")] == "" and first[header.index("quasi_periodic")] == ""


def test_summary_has_a_rate_per_region_and_none_for_noise(two_rates, tmp_path):
    from tempofield.cli import print_summary

    res = tempofield.analyze(tempofield.open_stack(two_rates.frames, frame_interval_s=0.04), (30, 150))
    import io

    text = io.StringIO()
    print_summary(res, tmp_path, stream=text)
    lines = [ln for ln in text.getvalue().splitlines() if ln.strip().startswith("region ") and ": rate" in ln]
    assert len(lines) == len(res.region_table) >= 2
    rates = sorted(float(ln.split("rate ")[1].split(" bpm")[0]) for ln in lines)
    assert rates[0] == pytest.approx(60.0, abs=1.0) and rates[-1] == pytest.approx(96.0, abs=1.0)
    noise = synthetic.noise_scene((300, 48, 48), rng=4)
    quiet = tempofield.analyze(tempofield.open_stack(noise.frames, frame_interval_s=0.04), (30, 150))
    text = io.StringIO()
    print_summary(quiet, tmp_path, stream=text)
    assert "no beating region found" in text.getvalue() and " bpm (median" not in text.getvalue()


def test_report_states_the_direction_convention_and_drops_empty_panels(two_rates, tmp_path):
    from tempofield.outputs import report

    assert "+90" in report.DIRECTION_NOTE and "down" in report.DIRECTION_NOTE
    res = tempofield.analyze(tempofield.open_stack(two_rates.frames, frame_interval_s=0.04, pixel_size_um=4.0),
                             (30, 150), maps_only=True)
    path = report.render_report(res, tmp_path / "maps_only.png")
    assert path.stat().st_size > 10_000


def test_rates_in_hertz_for_cilia_and_on_request(two_rates, tmp_path):
    from tempofield.cli import print_summary

    stack = tempofield.open_stack(two_rates.frames, frame_interval_s=0.04)
    res = tempofield.analyze(stack, (30, 150), rate_unit="Hz")
    assert res.rate_unit == "Hz"
    res.save(tmp_path / "hz")
    table = pd.read_csv(tmp_path / "hz" / "regions.csv")
    assert "rate_median_hz" in table.columns and "rate_median_bpm" not in table.columns
    assert table["rate_median_hz"].iloc[0] == pytest.approx(res.region_table["rate_median_bpm"].iloc[0] / 60)
    import io

    text = io.StringIO()
    print_summary(res, tmp_path, stream=text)
    assert " Hz (median" in text.getvalue() and " bpm (median" not in text.getvalue()
    assert tempofield.analyze(stack, (30, 150), maps_only=True).rate_unit == "bpm"
    # the cilia preset reports in hertz unless asked otherwise
    t = np.arange(400)[:, None, None] * 0.01
    cilia = (500 + 30 * np.sin(2 * np.pi * 9.0 * t) * np.ones((1, 24, 24))
             + np.random.default_rng(0).normal(0, 3, (400, 24, 24))).astype(np.float32)
    fast = tempofield.open_stack(cilia, frame_interval_s=0.01)
    assert tempofield.analyze(fast, specimen="airway-cilia", maps_only=True).rate_unit == "Hz"
    assert tempofield.analyze(fast, specimen="airway-cilia", maps_only=True, rate_unit="bpm").rate_unit == "bpm"
