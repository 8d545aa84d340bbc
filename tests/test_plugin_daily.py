"""The viewer as a daily tool: reruns update layers in place, errors are told once, the
inspector names only regions that exist and exports the traces, the reader dialog offers
tempofield for a result folder, options read in words, and the noise sample runs.

Real napari viewer under Xvfb + Mesa; the reruns draw on a shown canvas (the software
renderer crashed on the third remove-and-re-add).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from conftest_gui import FAST_BAND, add_scene, result_layers, run_panel, small_scene

from tempofield.engine.options import OPTIONS
from tempofield.scenes import synthetic

pytestmark = pytest.mark.gui


@pytest.fixture(scope="module")
def scene():
    return small_scene()


def _panel(viewer):
    from tempofield.plugin._widget import AnalysisPanel

    panel = AnalysisPanel(viewer)
    viewer.window.add_dock_widget(panel, name="rhythm analysis")
    return panel


def test_three_reruns_update_the_same_layers(make_napari_viewer, scene, qtbot):
    viewer = make_napari_viewer(show=True)
    panel = _panel(viewer)
    add_scene(viewer, scene)
    panel.rate_lo.setValue(FAST_BAND[0])
    panel.rate_hi.setValue(FAST_BAND[1])
    run_panel(qtbot, panel)
    first = {id(layer): layer for layer in result_layers(viewer, "well sheet")}
    rate = next(layer for layer in first.values() if layer.metadata["tempofield"]["map"] == "rate_bpm")
    rate.colormap = "magma"  # the user's display choices survive a rerun
    rate.name = "my rate"
    for radius in (2, 0, 3):
        panel.set_options(pooling_radius_px=radius)
        run_panel(qtbot, panel)
        qtbot.wait(50)  # let the shown canvas draw the new data
        now = {id(layer): layer for layer in result_layers(viewer, "well sheet")}
        assert now.keys() == first.keys()  # the same layer objects, none removed and re-added
        result = panel.last_result
        assert result.parameters["pooling_radius_px"] == radius
        np.testing.assert_array_equal(rate.data, result.rate_bpm)
        labels = next(layer for layer in now.values() if layer.metadata["tempofield"]["map"] == "regions")
        np.testing.assert_array_equal(labels.data, result.regions)
        delay = next(layer for layer in now.values() if layer.metadata["tempofield"]["map"] == "delay_s")
        np.testing.assert_array_equal(delay.data, result.delay_s)
        finite = result.delay_s[np.isfinite(result.delay_s)]
        assert delay.contrast_limits == pytest.approx(list(np.percentile(finite, [1, 99])), rel=1e-5)
        assert rate.metadata["tempofield_result"] is result
    assert rate.name == "my rate" and rate.colormap.name == "magma"
    assert viewer.screenshot(canvas_only=True, flash=False).std() > 0  # it still draws


def test_an_input_error_is_told_once_without_a_traceback(make_napari_viewer, scene, qtbot):
    from napari.utils.notifications import ErrorNotification, notification_manager

    viewer = make_napari_viewer()
    panel = _panel(viewer)
    # 60 frames at 25 fps is 2.4 s: too short for three cycles of 20 bpm, found by the engine mid-run
    viewer.add_image(scene.frames[:60], name="short", scale=(0.04, 4.0, 4.0), units=("s", "um", "um"),
                     axis_labels=("t", "y", "x"))
    panel.set_layer("short")
    panel.rate_lo.setValue(20.0)
    panel.rate_hi.setValue(120.0)
    told = []
    notification_manager.notification_ready.connect(told.append)
    try:
        with qtbot.waitSignal(panel.analysis_stopped, timeout=60000) as stopped:
            panel.run_button.click()
        qtbot.waitUntil(lambda: not panel.busy, timeout=10000)
        qtbot.wait(100)
    finally:
        notification_manager.notification_ready.disconnect(told.append)
    why = stopped.args[0]
    assert "cycles" in why and "Error" not in why  # the message, not a Python class name
    assert panel.status.text().count(why) == 1 and panel.status.text().startswith("Failed")
    mine = [n for n in told if "tempofield" in str(n.message)]
    assert len(mine) == 1 and not isinstance(mine[0], ErrorNotification)
    assert not any(isinstance(n, ErrorNotification) for n in told)
    assert panel.run_button.isEnabled()


def test_inspector_bounds_and_trace_export(make_napari_viewer, scene, qtbot, tmp_path):
    from tempofield.plugin._inspector import RegionInspector

    viewer = make_napari_viewer()
    panel = _panel(viewer)
    inspector = RegionInspector(viewer)
    viewer.window.add_dock_widget(inspector, name="region inspector")
    add_scene(viewer, scene)
    run_panel(qtbot, panel)
    result = panel.last_result
    labels = sorted(int(v) for v in np.unique(result.regions) if v > 0)
    assert labels and inspector.labels() == labels
    assert inspector.region_spin.maximum() == max(labels)
    inspector.region_spin.setValue(inspector.region_spin.maximum() + 5)  # cannot name a region beyond the last
    assert inspector.region_spin.value() == max(labels)
    label = labels[0]
    with qtbot.waitSignal(inspector.region_shown, timeout=30000):
        inspector.select_region(label) if inspector.region_spin.value() != label else inspector.show_region()
    assert inspector.table.rowCount() > 4
    names = [inspector.table.item(i, 0).text() for i in range(inspector.table.rowCount())]
    assert "beats" in names and "n_beats" not in names
    # a label that does not exist: the figures and the table are cleared, and it says which ones exist
    inspector.select_region(max(labels) + 7)
    assert inspector.current is None and inspector.table.rowCount() == 0
    assert "does not exist" in inspector.hint.text() and str(label) in inspector.hint.text()
    with qtbot.waitSignal(inspector.region_shown, timeout=30000):
        inspector.select_region(label)
    paths = inspector.export_traces(tmp_path / "out")
    frames, beats = pd.read_csv(paths[0]), pd.read_csv(paths[1])
    assert list(frames.columns) == ["time_s", "mean_signal", "theta_rad", "rate_bpm"]
    assert len(frames) == scene.frames.shape[0]
    np.testing.assert_allclose(frames["time_s"].diff().iloc[1:], scene.frame_interval_s)
    mask = result.regions == label
    np.testing.assert_allclose(frames["mean_signal"], scene.frames[:, mask].mean(axis=1), rtol=1e-4)
    assert frames["theta_rad"].between(0, 2 * np.pi).all()
    ref = result.references[label]
    np.testing.assert_allclose(beats["time_s"], ref.beat_times_s)
    np.testing.assert_allclose(beats["interval_s"].iloc[1:], np.diff(ref.beat_times_s))
    # theta on the frames wraps once per beat, near the beat times
    wraps = frames["time_s"].to_numpy()[1:][np.diff(frames["theta_rad"].to_numpy()) < -np.pi]
    inner = ref.beat_times_s[(ref.beat_times_s > ref.time_s[0]) & (ref.beat_times_s < ref.time_s[-1])]
    assert len(wraps) >= len(inner)
    assert np.abs(wraps[:, None] - inner[None]).min(axis=0).max() <= 2 * scene.frame_interval_s


def test_result_folder_offers_tempofield_first(make_napari_viewer, tmp_path, scene):
    from napari._qt.dialogs.qt_reader_dialog import QtReaderDialog
    from napari.plugins import _npe2

    import tempofield

    make_napari_viewer()  # the plugin manager with this plugin registered
    result = tempofield.analyze(tempofield.open_stack(scene.frames[:, :40, :40], frame_interval_s=0.04),
                                FAST_BAND, maps_only=True)
    folder = result.save(tmp_path / "plate1_A01")
    readers = _npe2.get_readers(str(folder))
    dialog = QtReaderDialog(pth=str(folder), readers=readers)
    assert dialog._get_plugin_choice() == "Tempofield"


def test_options_read_in_words_and_the_band_fits(make_napari_viewer):
    from tempofield.plugin._widget import OPTION_LABELS

    viewer = make_napari_viewer()
    panel = _panel(viewer)
    assert set(OPTION_LABELS) == {o.name for o in OPTIONS}  # a new option needs its words
    assert all("_" not in text for text in OPTION_LABELS.values())
    for box in (panel.rate_lo, panel.rate_hi):
        box.setValue(1200.0)
        assert box.minimumWidth() >= box.fontMetrics().horizontalAdvance(box.text())


def test_noise_sample_runs_at_the_default_band_and_says_no_rhythm(make_napari_viewer, qtbot):
    from tempofield.plugin._sample_data import noise

    viewer = make_napari_viewer()
    panel = _panel(viewer)
    data, kwargs, _ = noise()[0]
    viewer.add_image(data, **kwargs)
    run_panel(qtbot, panel)
    assert "no rhythm found" in panel.status.text()
    assert panel.last_result.summary()["n_regions"] == 0


def test_previews_and_tile_map_become_layers(make_napari_viewer, scene, qtbot):
    from tempofield.plugin._layers import LOOP_TILES_TITLE, layer_name, result_layer_data

    viewer = make_napari_viewer()
    panel = _panel(viewer)
    add_scene(viewer, scene)
    panel.rate_lo.setValue(FAST_BAND[0])
    panel.rate_hi.setValue(FAST_BAND[1])
    panel.set_options(magnified_preview=True)
    run_panel(qtbot, panel)
    preview = viewer.layers["magnified preview · well sheet"]
    assert preview.data.ndim == 3 and preview.data.shape[1:] == scene.frames.shape[1:]
    assert np.std(preview.data - scene.frames[:preview.data.shape[0]]) > 0  # amplified, not a copy
    # the tile loop-score map, when the result has one, is a layer of its own
    result = panel.last_result
    result.extra_maps = dict(result.extra_maps or {}, loop_score_tiles=np.full(result.rate_bpm.shape, 0.7,
                                                                                 np.float32))
    names = [kw["name"] for _, kw, _ in result_layer_data(result, "well sheet")]
    assert layer_name("well sheet", LOOP_TILES_TITLE) in names


def test_long_source_names_keep_their_end():
    from tempofield.plugin._layers import layer_name

    a = layer_name("plate1_2026-11-30_well_A01_brightfield_run3.tif", "rate (bpm)")
    b = layer_name("plate1_2026-11-30_well_A01_brightfield_run4.tif", "rate (bpm)")
    assert a != b and a.startswith("rate (bpm)") and a.endswith("run3.tif") and len(a) < 45


def test_noise_scene_is_long_enough():  # the sample's own promise, without a viewer
    scene = synthetic.noise_scene((300, 64, 64), rng=1)
    assert scene.frames.shape[0] * scene.frame_interval_s >= 3 * 60.0 / 20.0
