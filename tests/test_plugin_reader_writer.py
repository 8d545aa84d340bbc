"""The plugin's reader and writer: result folders and stacks.

Round trip: result layers (as the analysis panel makes them) -> writer ->
folder -> tempofield.load_result and the reader -> the same maps. The writer
never replaces an existing folder and leaves no partial folder. The stack
reader keeps the frame interval found by tempofield.open_stack (tifffile
ImageJ metadata written by tempofield.scenes.samples).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import tifffile

import tempofield
from tempofield.errors import ResultExistsError
from tempofield.plugin import _reader, _writer
from tempofield.plugin._layers import result_from_layers, result_layer_data
from tempofield.scenes import samples


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    s = tempofield.scenes.synthetic.well_scene((200, 40, 40), frame_interval_s=0.04, pixel_size_um=4.0,
                                      pacemaker=(10.0, 10.0), cluster_center=(30.0, 30.0),
                                      cluster_radius_px=5.0, rng=11)
    return tempofield.analyze(tempofield.open_stack(s.frames, frame_interval_s=0.04, pixel_size_um=4.0), (30, 240))


def _as_writer_input(layer_data):
    """What napari hands a writer: (data, attributes, layer type) per layer."""
    return [(d, dict(a), t) for d, a, t in layer_data]


def test_writer_then_reader_round_trip(result, tmp_path):
    layers = result_layer_data(result, "well", scale=(4.0, 4.0))
    out = tmp_path / "saved"
    paths = _writer.write_result(str(out), _as_writer_input(layers))
    assert paths == [str(out)]
    back = tempofield.load_result(out)
    for name in ("rate_bpm", "periodicity", "phase_rad", "delay_s", "period_s", "amplitude", "coherence"):
        np.testing.assert_array_equal(getattr(back, name), getattr(result, name), err_msg=name)
    np.testing.assert_array_equal(back.regions, result.regions)
    assert back.parameters["rate_range_bpm"] == [30.0, 240.0]
    assert sorted(back.references) == sorted(result.references)

    reader = _reader.get_result_reader(str(out))
    assert reader is not None and _reader.get_stack_reader(str(out)) is None
    read = {attrs["name"]: (data, attrs, kind) for data, attrs, kind in reader(str(out))}
    rate = read["rate (bpm) · saved"]
    np.testing.assert_array_equal(rate[0], result.rate_bpm)
    assert rate[1]["colormap"] == "viridis" and rate[1]["scale"] == (4.0, 4.0)
    assert rate[1]["metadata"]["tempofield"]["unit"] == "1/minute"
    phase = read["phase (rad) · saved"]
    assert phase[1]["colormap"] == "twilight" and phase[1]["contrast_limits"] == (0.0, 2 * math.pi)
    assert phase[1]["metadata"]["tempofield"]["unit"] == "radian"
    assert read["regions · saved"][2] == "labels"
    # read layers can be written again, and carry the whole result (tables, references)
    again = result_from_layers(_as_writer_input(read.values()))
    assert len(again.region_table) == len(result.region_table)


def test_writer_keeps_edited_labels_and_fills_missing_maps(result, tmp_path):
    data, attrs, kind = next(ld for ld in result_layer_data(result, "well") if ld[2] == "labels")
    edited = np.zeros_like(data)
    edited[:5, :5] = 7
    # a regions layer alone, without the result object: the other maps are written as NaN
    info = dict(attrs["metadata"]["tempofield"])
    only = [(edited, {**attrs, "metadata": {"tempofield": info}}, "labels")]
    out = _writer.write_result(str(tmp_path / "labels_only"), only)[0]
    back = tempofield.load_result(out)
    np.testing.assert_array_equal(back.regions, edited)
    assert np.isnan(back.rate_bpm).all()
    assert back.frame_interval_s == result.frame_interval_s


def test_writer_never_overwrites_and_leaves_no_partial_folder(result, tmp_path):
    dest = tmp_path / "existing"
    dest.mkdir()
    (dest / "keep.txt").write_text("mine")
    with pytest.raises(ResultExistsError, match="already exists"):
        _writer.write_result(str(dest), _as_writer_input(result_layer_data(result, "well")))
    assert (dest / "keep.txt").read_text() == "mine" and len(list(dest.iterdir())) == 1
    with pytest.raises(ValueError, match="none of the selected layers"):
        _writer.write_result(str(tmp_path / "new"), [(np.zeros((4, 4)), {"name": "x", "metadata": {}}, "image")])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["existing"]


def test_stack_reader_keeps_the_frame_interval(tmp_path):
    paths = samples.write_samples(tmp_path)
    tif = next(p for p in paths if p.name == "well_sheet.tif")
    reader = _reader.get_stack_reader(str(tif))
    assert reader is not None and _reader.get_result_reader(str(tif)) is None
    (data, attrs, kind), = reader(str(tif))
    assert kind == "image" and data.shape == (250, 80, 80)
    assert attrs["metadata"]["frame_interval_s"] == pytest.approx(0.04)
    assert attrs["metadata"]["pixel_size_um"] == pytest.approx(4.0)
    assert attrs["scale"] == pytest.approx((0.04, 4.0, 4.0))
    # a plain TIFF without timing: opened, but the frame interval stays unknown (no silent default)
    plain = tmp_path / "plain.tif"
    tifffile.imwrite(plain, np.zeros((20, 8, 8), np.uint16))
    (_, attrs, _), = _reader.read_stack(str(plain))
    assert attrs["metadata"]["frame_interval_s"] is None and attrs["scale"][0] == 1.0
    assert _reader.get_stack_reader(str(tmp_path / "notes.txt")) is None


@pytest.mark.gui
def test_save_and_open_through_the_viewer(make_napari_viewer, result, tmp_path):
    viewer = make_napari_viewer()
    for data, attrs, kind in result_layer_data(result, "well", scale=(4.0, 4.0)):
        getattr(viewer, f"add_{kind}")(data, **attrs)
    viewer.layers.selection = set(viewer.layers)
    out = tmp_path / "from_viewer"
    saved = viewer.layers.save(str(out), selected=True, plugin="tempofield")
    assert saved == [str(out)] and tempofield.outputs.result.is_complete(out)
    assert (out / "report.png").stat().st_size > 10_000  # the same report as `tempofield analyze` writes
    viewer.open(str(out), plugin="tempofield")
    rate = viewer.layers["rate (bpm) · from_viewer"]
    np.testing.assert_array_equal(rate.data, result.rate_bpm)
    assert rate.colormap.name == "viridis"
    np.testing.assert_allclose(rate.scale, (4.0, 4.0))
