"""The analysis panel and the region inspector in a real napari viewer (Xvfb + Mesa).

Checks: the panel's fields come from tempofield.engine.options.OPTIONS and the layer's
metadata; a run adds the named, scaled, coloured layers whose numbers equal
tempofield.analyze on the same input; a rerun replaces them; the event loop keeps
running during a run; Cancel stops the run and adds nothing; a velocity field
becomes a Vectors layer; a (T, C, Y, X) layer is analysed on the chosen channel;
the inspector shows a region picked by a click and exports its row and figures.
"""

from __future__ import annotations

import math
import time
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from conftest_gui import (
    FAST_BAND,
    add_scene,
    big_scene,
    engine_stack,
    result_layers,
    run_panel,
    small_scene,
)
from qtpy.QtCore import QTimer

import tempofield
from tempofield.engine.options import OPTIONS
from tempofield.kernels.reference import reference_from_theta

pytestmark = pytest.mark.gui


@pytest.fixture
def panel(make_napari_viewer):
    from tempofield.plugin._widget import AnalysisPanel

    viewer = make_napari_viewer()
    widget = AnalysisPanel(viewer)
    viewer.window.add_dock_widget(widget, name="rhythm analysis")
    return widget


@pytest.fixture(scope="module")
def scene():
    return small_scene()


def test_fields_come_from_the_option_table_and_the_layer(panel, scene):
    assert list(panel.option_widgets) == [o.name for o in OPTIONS]
    from tempofield.plugin._widget import GUI_DEFAULTS

    assert panel.options() == {o.name: GUI_DEFAULTS.get(o.name, o.default) for o in OPTIONS}
    add_scene(panel.viewer, scene)
    assert panel.layer_box.currentText() == "well sheet"
    assert panel.frame_interval.value() == pytest.approx(scene.frame_interval_s)
    assert panel.pixel_size.value() == pytest.approx(scene.pixel_size_um)
    assert not panel.channel_spin.isEnabled()
    from tempofield.engine.presets import SPECIMENS

    panel.preset_box.setCurrentText("zebrafish-heart-28c")
    assert (panel.rate_lo.value(), panel.rate_hi.value()) == SPECIMENS["zebrafish-heart-28c"].rate_range_bpm
    assert panel.options()["specimen"] == "zebrafish-heart-28c"
    panel.rate_lo.setValue(100.0)
    assert panel.preset_box.currentText() == "custom band" and panel.options()["specimen"] == ""
    # no frame interval: refused with a message, nothing started
    panel.viewer.add_image(scene.frames[:, :20, :20], name="no interval", units=("second", "micrometer", "micrometer"))
    panel.set_layer("no interval")
    assert panel.frame_interval.value() == 0.0
    panel.run_button.click()
    assert panel.worker is None and "frame interval" in panel.status.text()
    panel.set_layer("well sheet")
    panel.set_options(false_alarm="2")
    panel.run_button.click()
    assert panel.worker is None and "false_alarm" in panel.status.text()


def test_run_adds_maps_equal_to_the_engine_and_rerun_replaces_them(panel, scene, qtbot):
    viewer = panel.viewer
    raw = add_scene(viewer, scene)
    raw.translate = (0.0, 8.0, -4.0)
    panel.rate_lo.setValue(FAST_BAND[0])
    panel.rate_hi.setValue(FAST_BAND[1])
    panel.set_options(pooling_radius_px=2)
    run_panel(qtbot, panel)
    layers = {layer.name: layer for layer in result_layers(viewer, "well sheet")}
    expected = tempofield.analyze(engine_stack(scene), FAST_BAND, pooling_radius_px=2)
    titles = ["rate (bpm)", "periodicity", "phase (rad)", "delay (s)", "regions"]
    if "velocity_x_um_s" in expected.extra_maps:  # once the engine measures conduction velocity
        titles.append("velocity")
    assert sorted(layers) == sorted(f"{t} · well sheet" for t in titles)
    rate, phase = layers["rate (bpm) · well sheet"], layers["phase (rad) · well sheet"]
    np.testing.assert_array_equal(rate.data, expected.rate_bpm)
    np.testing.assert_array_equal(phase.data, expected.phase_rad)
    np.testing.assert_array_equal(layers["delay (s) · well sheet"].data, expected.delay_s)
    np.testing.assert_array_equal(layers["periodicity · well sheet"].data, expected.periodicity)
    np.testing.assert_array_equal(layers["regions · well sheet"].data, expected.regions)
    assert np.nanmedian(rate.data) == pytest.approx(72.0, abs=1.0)
    for layer in layers.values():
        np.testing.assert_allclose(layer.scale, raw.scale[-2:])
        np.testing.assert_allclose(layer.translate, raw.translate[-2:])
        info = layer.metadata["tempofield"]
        assert info["version"] == tempofield.__version__
        assert info["parameters"]["pooling_radius_px"] == 2
        assert info["parameters"]["rate_range_bpm"] == list(FAST_BAND)
    assert rate.colormap.name == "viridis" and phase.colormap.name == "twilight"
    assert phase.contrast_limits == pytest.approx([0.0, 2 * math.pi])
    finite = expected.rate_bpm[np.isfinite(expected.rate_bpm)]
    assert rate.contrast_limits == pytest.approx(list(np.percentile(finite, [1, 99])), rel=1e-5)
    assert type(layers["regions · well sheet"]).__name__ == "Labels"
    n_layers = len(viewer.layers)
    run_panel(qtbot, panel)
    assert len(viewer.layers) == n_layers  # replaced, not piled up
    assert len(result_layers(viewer, "well sheet")) == len(titles)


def test_event_loop_runs_during_a_run_and_cancel_adds_nothing(panel, qtbot):
    viewer = panel.viewer
    add_scene(viewer, big_scene(3), name="big")  # runs for a few seconds even on a quiet machine
    # Many small tiles: many yields. Fewer landmarks than the default keep each ripser call
    # (which holds the GIL inside the engine) short; with the default 300 landmarks one call
    # alone can hold the event loop for ~0.3-0.5 s on these machines (reported to the engine).
    panel.set_options(memory_budget_mb=16, n_landmarks=150)
    beats: list[float] = []
    timer = QTimer()
    timer.setInterval(20)
    timer.timeout.connect(lambda: beats.append(time.perf_counter()))
    timer.start()
    returned, stages = [], []
    panel.run_button.click()
    panel.worker.returned.connect(lambda _r: returned.append(time.perf_counter()))
    panel.worker.yielded.connect(lambda tick: stages.append((time.perf_counter(), tick.stage, tick.done)))
    qtbot.waitUntil(lambda: not panel.busy, timeout=60000)
    timer.stop()
    beats = np.array(beats)
    during = beats[beats <= returned[0]]
    after = beats[beats > returned[0] - 0.1]
    run_gap, add_gap = np.diff(during).max(), np.diff(after).max()
    i = int(np.argmax(np.diff(during)))
    near = [(stage, done) for tt, stage, done in stages if during[i] - 0.02 <= tt <= during[i + 1] + 0.02]
    print(f"\nlongest gap at {during[i] - during[0]:.2f} s, next to engine ticks {near}")
    print(f"\nrun of {during[-1] - during[0]:.1f} s in {panel.last_result.parameters['tile_shape_px']} px tiles: "
          f"longest event-loop gap {run_gap * 1000:.0f} ms; while adding the layers {add_gap * 1000:.0f} ms")
    assert during[-1] - during[0] > 1.0  # the run was long enough to say something
    assert run_gap < 0.5

    # cancel after the first few tiles: the run stops at the next tile and adds nothing
    panel.remove_result_layers("big")
    n_before = len(viewer.layers)
    stopped, ticks = [], []
    panel.analysis_stopped.connect(stopped.append)
    panel.run_button.click()
    panel.worker.yielded.connect(ticks.append)
    qtbot.waitUntil(lambda: len(ticks) >= 3, timeout=30000)
    t_cancel = time.perf_counter()
    panel.cancel_button.click()
    qtbot.waitUntil(lambda: not panel.busy, timeout=10000)
    latency = time.perf_counter() - t_cancel
    print(f"cancel after tile {ticks[-1].done} of {ticks[-1].total}: run ended {latency * 1000:.0f} ms later")
    assert stopped == ["cancelled"]
    # stopped before the end: mid-stage, or at a stage boundary when the cancel lands as a stage ends
    assert ticks[-1].stage in ("maps", "references", "phase")
    assert ticks[-1].done < ticks[-1].total or ticks[-1].stage != "phase"
    qtbot.wait(300)
    assert len(viewer.layers) == n_before
    assert result_layers(viewer, "big") == []
    assert "Cancelled" in panel.status.text()
    assert panel.run_button.isEnabled()


def test_velocity_field_becomes_a_vectors_layer(panel, scene, qtbot):
    raw = add_scene(panel.viewer, scene)
    y, x = scene.frames.shape[1:]
    nan = np.full((y, x), np.nan, np.float32)
    vy = np.full((y, x), 3000.0, np.float32)
    vx = np.full((y, x), 4000.0, np.float32)
    vy[:10] = np.nan
    result = tempofield.RhythmResult(
        rate_bpm=np.full((y, x), 72.0, np.float32), period_s=nan, amplitude=nan, periodicity=nan,
        coherence=nan, phase_rad=nan, delay_s=nan, regions=np.ones((y, x), np.int32),
        frame_interval_s=scene.frame_interval_s, pixel_size_um=scene.pixel_size_um,
        extra_maps={"velocity_y_um_s": vy, "velocity_x_um_s": vx}, version="test")
    place = {"scale": tuple(raw.scale[-2:]), "translate": tuple(raw.translate[-2:]), "units": raw.units[-2:]}
    with qtbot.waitSignal(panel.analysis_finished):
        panel._on_result(result, None, raw.name, place)
    vec = panel.viewer.layers["velocity · well sheet"]
    assert type(vec).__name__ == "Vectors"
    np.testing.assert_allclose(vec.scale, raw.scale[-2:])
    np.testing.assert_allclose(vec.features["speed_um_s"], 5000.0)
    assert (vec.data[:, 0, 0] >= 10).all()  # no arrows where the field is NaN
    d = vec.data[0, 1]
    assert d[1] / d[0] == pytest.approx(4 / 3)
    # a result without a velocity field has no vectors layer; rerun removes the old one
    result.extra_maps = {}
    with qtbot.waitSignal(panel.analysis_finished):
        panel._on_result(result, None, raw.name, place)
    assert "velocity · well sheet" not in panel.viewer.layers


def test_channel_of_a_tcyx_layer(panel, scene, qtbot):
    rng = np.random.default_rng(3)
    noise = rng.normal(1000, 12, scene.frames.shape).astype(np.float32)
    tcyx = np.stack([noise, scene.frames.astype(np.float32)], axis=1)
    fi, ps = scene.frame_interval_s, scene.pixel_size_um
    panel.viewer.add_image(tcyx, name="two channels", scale=(fi, 1, ps, ps),
                           metadata={"frame_interval_s": fi, "pixel_size_um": ps})
    assert panel.channel_spin.isEnabled() and panel.channel_spin.maximum() == 1
    panel.channel_spin.setValue(1)
    run_panel(qtbot, panel)
    rate = panel.viewer.layers["rate (bpm) · two channels"]
    expected = tempofield.analyze(tempofield.open_stack(tcyx, frame_interval_s=fi, axes="TCYX", channel=1),
                                panel.rate_range_bpm())
    np.testing.assert_array_equal(rate.data, expected.rate_bpm)
    np.testing.assert_allclose(rate.scale, (ps, ps))
    assert rate.metadata["tempofield"]["channel"] == 1


def test_inspector_shows_a_clicked_region_and_exports(panel, scene, qtbot, tmp_path):
    from tempofield.plugin._inspector import RegionInspector

    viewer = panel.viewer
    add_scene(viewer, scene)
    inspector = RegionInspector(viewer)
    viewer.window.add_dock_widget(inspector, name="region inspector")
    run_panel(qtbot, panel)
    regions = viewer.layers["regions · well sheet"]
    assert inspector.result_box.currentText() == regions.name
    # a hand-made reference and table row (the topology/regions work fills these in later)
    result = regions.metadata["tempofield_result"]
    t = np.arange(200) * 0.05
    result.references = {1: reference_from_theta(t, 2 * np.pi * 1.2 * t, diagram=np.array([[0.1, 0.9], [0.2, 0.25]]),
                                                 score=0.8)}
    result.region_table = pd.DataFrame({"region": [1], "rate_bpm": [72.0], "area_um2": [1234.0]})
    # click on a pixel of region 1 (world coordinates of the regions layer)
    ys, xs = np.nonzero(regions.data == 1)
    pos = regions.data_to_world((ys[0], xs[0]))
    event = SimpleNamespace(type="mouse_press", position=(0.0, *pos), view_direction=None, dims_displayed=[1, 2])
    with qtbot.waitSignal(inspector.region_shown, timeout=30000) as sig:
        inspector._on_click(viewer, event)
    assert sig.args == [1]
    assert inspector.region_spin.value() == 1
    trace_ax = inspector.figures["trace"].axes[0]
    assert len(trace_ax.lines[0].get_ydata()) == scene.frames.shape[0]
    assert "beats" in trace_ax.get_title()
    spec_ax = inspector.figures["spectrum"].axes[0]
    peak = [ln for ln in spec_ax.lines if ln.get_label().startswith("peak")]
    assert peak and peak[0].get_xdata()[0] == pytest.approx(72.0, abs=1.5)
    assert len(inspector.figures["persistence"].axes[0].collections[0].get_offsets()) == 2
    assert len(inspector.figures["phase"].axes) == 2  # theta and the rate on a twin axis
    cells = {inspector.table.item(i, 0).text(): inspector.table.item(i, 1).text()
             for i in range(inspector.table.rowCount())}
    assert cells["area_um2"] == "1234" and cells["region"] == "1"
    csv = inspector.export_table(tmp_path / "out")
    row = pd.read_csv(csv)
    assert row.loc[0, "region"] == 1 and row.loc[0, "loop_score"] == pytest.approx(0.8)
    pngs = inspector.export_figures(tmp_path / "out")
    assert len(pngs) == 4 and all(p.stat().st_size > 1000 for p in pngs)
    # region 2 (the cluster, 42 bpm) through the spin box
    with qtbot.waitSignal(inspector.region_shown, timeout=30000):
        inspector.region_spin.setValue(2)
    spec_ax = inspector.figures["spectrum"].axes[0]
    peak = [ln for ln in spec_ax.lines if ln.get_label().startswith("peak")]
    assert peak  # whatever region 2 is in this result, its spectrum is drawn


def test_results_are_readable_by_default(panel, scene, qtbot):
    """After a run: the rate layer is selected (hovering reads bpm), every map shows its colour bar,
    the rate colormap's ends differ in lightness, the delay's colours span the regions' own delays,
    the conduction arrows start hidden with colours not set by outliers, and the panel showed its progress."""
    viewer = panel.viewer
    add_scene(viewer, scene)
    panel.rate_lo.setValue(FAST_BAND[0])
    panel.rate_hi.setValue(FAST_BAND[1])
    seen = []
    panel.status.setText("")
    timer = QTimer()
    timer.timeout.connect(lambda: seen.append(panel.status.text()))
    timer.start(5)
    run_panel(qtbot, panel)
    timer.stop()
    layers = {layer.name: layer for layer in result_layers(viewer, "well sheet")}
    rate = layers["rate (bpm) · well sheet"]
    assert viewer.layers.selection.active is rate
    for name, layer in layers.items():
        if layer._type_string == "image":
            assert layer.colorbar.visible, name
    lightness = np.asarray(rate.colormap.colors)[:, :3] @ [0.299, 0.587, 0.114]
    assert abs(lightness[-1] - lightness[0]) > 0.5
    delay = layers["delay (s) · well sheet"]
    finite = delay.data[np.isfinite(delay.data)]
    assert delay.contrast_limits == pytest.approx(list(np.percentile(finite, [1, 99])), rel=1e-5)
    assert delay.contrast_limits[1] < np.nanmax(panel.last_result.period_s)
    vectors = [layer for name, layer in layers.items() if name.startswith("velocity")]
    for layer in vectors:
        assert not layer.visible
        speed = layer.features.iloc[:, 0].to_numpy()
        assert layer.edge_contrast_limits[1] <= np.percentile(speed, 99) + 1e-6
    assert any("%" in text and text.startswith("Analysing:") for text in seen)


def test_the_layer_units_and_axes_are_read(panel, scene):
    """A layer scaled in ms and nm with axes labelled (y, x, t) is prefilled 0.04 s and 4 um with its time
    axis found; a (C, T, Y, X) layer offers its channels; a 2-D image is listed as not analysable;
    renaming the chosen layer keeps it and the typed frame interval survives adding a layer."""
    viewer = panel.viewer
    yxt = np.moveaxis(scene.frames[:, :24, :24], 0, -1)
    viewer.add_image(yxt, name="yxt", scale=(4000.0, 4000.0, 40.0), units=("nm", "nm", "ms"),
                     axis_labels=("y", "x", "t"))
    panel.set_layer("yxt")
    assert panel.frame_interval.value() == pytest.approx(0.04)
    assert panel.pixel_size.value() == pytest.approx(4.0)
    stack = panel.make_stack()
    assert stack.shape == (scene.frames.shape[0], 24, 24)
    np.testing.assert_array_equal(np.asarray(stack.data[:, 3, 5]), yxt[3, 5])
    ctyx = np.stack([scene.frames[:, :16, :16]] * 3)
    viewer.add_image(ctyx, name="ctyx", axis_labels=("c", "t", "y", "x"))
    panel.set_layer("ctyx")
    assert (panel.channel_spin.minimum(), panel.channel_spin.maximum()) == (0, 2) and panel.channel_spin.isEnabled()
    viewer.add_image(scene.frames[0], name="one frame")
    texts = [panel.layer_box.itemText(i) for i in range(panel.layer_box.count())]
    flat = [t for t in texts if t.startswith("one frame")]
    assert flat and "not analysable" in flat[0]
    panel.set_layer("yxt")
    panel.frame_interval.setValue(0.05)
    viewer.layers["yxt"].name = "renamed"
    assert panel.layer_box.currentText() == "renamed"
    viewer.add_image(scene.frames[:, :8, :8], name="later")
    assert panel.layer_box.currentText() == "renamed" and panel.frame_interval.value() == pytest.approx(0.05)
    assert panel.make_stack().frame_interval_s == pytest.approx(0.05)
