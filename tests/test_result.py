"""Result folders: OME-Zarr maps read by the reference reader, atomic writes, no silent overwrite."""

from __future__ import annotations

import json

import numpy as np
import pytest

import tempofield
from tempofield.errors import ResultExistsError
from tempofield.outputs.result import MAP_NAMES, is_complete


@pytest.fixture(scope="module")
def result(well):
    st = tempofield.open_stack(well.frames, frame_interval_s=well.frame_interval_s, pixel_size_um=well.pixel_size_um)
    return tempofield.analyze(st, (20, 150))


def test_save_and_load_round_trip(tmp_path, result):
    out = result.save(tmp_path / "res")
    for name in ("maps.ome.zarr", "run.json", "regions.csv", "beats.csv"):
        assert (out / name).exists()
    back = tempofield.load_result(out)
    for name in MAP_NAMES:
        np.testing.assert_array_equal(getattr(back, name), getattr(result, name), err_msg=name)
    assert back.frame_interval_s == result.frame_interval_s
    assert back.parameters["rate_range_bpm"] == [20.0, 150.0]
    run = json.loads((out / "run.json").read_text())
    assert run["version"] == tempofield.__version__
    assert run["input"]["identity"]["shape"] == list(result.input["shape"])
    assert "maps_pass_s" in run["timings"]


def test_maps_read_by_the_ome_zarr_reference_reader(tmp_path, result):
    """Reference: the ome-zarr package reads our OME-NGFF 0.5 maps: axes, units, scale, channel names."""
    from ome_zarr.io import parse_url
    from ome_zarr.reader import Reader

    out = result.save(tmp_path / "res")
    nodes = list(Reader(parse_url(str(out / "maps.ome.zarr")))())
    image = nodes[0]
    axes = image.metadata["axes"]
    assert [a["name"] for a in axes] == ["c", "y", "x"]
    assert axes[1]["unit"] == "micrometer" and axes[1]["type"] == "space"
    scale = image.metadata["coordinateTransformations"][0][0]["scale"]
    assert scale == [1.0, 4.0, 4.0]
    maps = [n for n in MAP_NAMES if n != "regions"]  # the regions are a label image only
    assert image.metadata["channel_names"][: len(maps)] == maps
    data = np.asarray(image.data[0])
    np.testing.assert_array_equal(data[0], result.rate_bpm)


def test_existing_result_is_never_overwritten_silently(tmp_path, result):
    out = tmp_path / "res"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    with pytest.raises(ResultExistsError, match="overwrite"):
        result.save(out)
    assert (out / "keep.txt").read_text() == "mine"
    # --overwrite replaces an earlier result, never a folder of the user's
    with pytest.raises(ResultExistsError, match="not a tempofield result folder"):
        result.save(out, overwrite=True)
    assert (out / "keep.txt").read_text() == "mine"
    earlier = tmp_path / "earlier"
    result.save(earlier)
    (earlier / "marker").write_text("old")
    result.save(earlier, overwrite=True)
    assert not (earlier / "marker").exists() and is_complete(earlier)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]


def test_output_folder_holding_the_input_is_refused(tmp_path, well):
    import tifffile

    data = tmp_path / "data"
    data.mkdir()
    tifffile.imwrite(data / "s.tif", well.frames, imagej=True, metadata={"axes": "TYX", "finterval": 0.04})
    st = tempofield.open_stack(data / "s.tif")
    res = tempofield.analyze(st, (20, 150), maps_only=True)
    with pytest.raises(ResultExistsError, match="holds the input"):
        res.save(data, overwrite=True)
    assert (data / "s.tif").exists()


def test_a_failed_write_leaves_nothing_behind(tmp_path, result):
    def broken(folder):
        (folder / "half.txt").write_text("x")
        raise OSError("disk full")

    with pytest.raises(OSError, match="disk full"):
        result.save(tmp_path / "res", extra_files={"bad": broken})
    assert list(tmp_path.iterdir()) == []


def test_a_folder_without_run_json_is_not_a_result(tmp_path):
    (tmp_path / "half").mkdir()
    assert not is_complete(tmp_path / "half")
    with pytest.raises(tempofield.errors.InputError, match="not a complete"):
        tempofield.load_result(tmp_path / "half")
