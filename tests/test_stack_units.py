"""open_stack: time units in ImageJ and OME metadata, folders and patterns of single-frame TIFF files,
implausible frame intervals, channels counted from 0, and outputs that would land inside the input.

Files are written with tifffile (the reference writer for ImageJ and OME-TIFF metadata) and read
back with :func:`tempofield.open_stack`.
"""

from __future__ import annotations

import dask.array as da
import numpy as np
import pytest
import tifffile
import zarr

from tempofield import open_stack
from tempofield.engine.stack import seconds_per_time_unit
from tempofield.errors import (
    InputError,
    MissingMetadataError,
    ResultExistsError,
    StackNotFoundError,
)
from tempofield.io.atomic import check_replaceable


@pytest.fixture
def frames(rng):
    return rng.integers(0, 4000, (24, 10, 12)).astype(np.uint16)


# ------------------------------------------------------------------------------------------ time units
@pytest.mark.parametrize("tunit, seconds", [
    ("ms", 0.040),
    ("sec", 40.0),         # ImageJ's own default name
    ("s", 40.0),
    (None, 40.0),          # no tunit: ImageJ's default, seconds
    ("\\u00B5s", 40e-6),   # the micro sign as ImageJ writes it into a TIFF (escaped: the description is ASCII)
    ("us", 40e-6),
    ("min", 2400.0),
])
def test_imagej_finterval_is_in_tunit(tmp_path, frames, tunit, seconds):
    """Reference: ImageJ's FileSaver writes ``finterval`` in the calibration's time unit and adds
    ``tunit=`` when that unit is not "sec"; tifffile writes the same keys into the ImageJ header."""
    p = tmp_path / "ij.tif"
    metadata = {"axes": "TYX", "finterval": 40, "unit": "micron"}
    if tunit is not None:
        metadata["tunit"] = tunit
    tifffile.imwrite(p, frames, imagej=True, resolution=(2.0, 2.0), metadata=metadata)
    assert tifffile.TiffFile(p).imagej_metadata.get("tunit") == tunit  # the file says what we think it says
    s = open_stack(p)
    assert s.frame_interval_s == pytest.approx(seconds)
    assert s.pixel_size_um == pytest.approx(0.5)
    assert s.meta["frame_interval_from"].startswith("ImageJ finterval")


def test_imagej_finterval_in_an_unknown_unit_is_not_guessed(tmp_path, frames):
    p = tmp_path / "ij.tif"
    tifffile.imwrite(p, frames, imagej=True, metadata={"axes": "TYX", "finterval": 40, "tunit": "frame"})
    with pytest.raises(MissingMetadataError, match=r"40 in the unit 'frame'.*frame_interval_s=0.02"):
        open_stack(p)
    assert open_stack(p, frame_interval_s=0.04).frame_interval_s == 0.04  # the argument still works


@pytest.mark.parametrize("unit, seconds", [("ms", 0.040), ("s", 40.0), ("µs", 40e-6), ("min", 2400.0)])
def test_ome_time_increment_unit(tmp_path, frames, unit, seconds):
    """Reference: tifffile's OME writer stores TimeIncrement and TimeIncrementUnit on Pixels."""
    p = tmp_path / "o.ome.tif"
    tifffile.imwrite(p, frames, ome=True, metadata={"axes": "TYX", "TimeIncrement": 40, "TimeIncrementUnit": unit})
    assert f'TimeIncrementUnit="{unit}"' in tifffile.TiffFile(p).ome_metadata
    assert open_stack(p).frame_interval_s == pytest.approx(seconds)


def test_ome_time_increment_in_an_unknown_unit_is_not_taken_as_seconds(tmp_path, frames):
    p = tmp_path / "o.ome.tif"
    tifffile.imwrite(p, frames, ome=True, metadata={"axes": "TYX", "TimeIncrement": 40,
                                                    "TimeIncrementUnit": "fortnight"})
    with pytest.raises(MissingMetadataError, match="unit 'fortnight'"):
        open_stack(p)


def test_time_unit_names():
    assert seconds_per_time_unit("millisecond") == seconds_per_time_unit("msec") == 1e-3
    assert seconds_per_time_unit("µs") == seconds_per_time_unit("μs") == seconds_per_time_unit("\\u00b5s") == 1e-6
    assert seconds_per_time_unit(" Sec ") == 1.0 and seconds_per_time_unit("hour") == 3600.0
    assert seconds_per_time_unit("pixel") is None and seconds_per_time_unit(None) is None


# ------------------------------------------------------------------------------------------ frame files
def _write_frames(folder, frames, name="frame{}.tif", **kwargs):
    folder.mkdir(parents=True, exist_ok=True)
    for i, frame in enumerate(frames):
        tifffile.imwrite(folder / name.format(i), frame, **kwargs)


def test_folder_of_single_frame_tiffs_opens_as_one_stack_in_natural_order(tmp_path, frames):
    folder = tmp_path / "frames"
    # frame0 ... frame23: in plain text order frame10 would come before frame2
    _write_frames(folder, frames, resolution=(1 / 0.65, 1 / 0.65), resolutionunit="CENTIMETER")
    (folder / "notes.txt").write_text("not a frame")
    s = open_stack(folder, frame_interval_s=0.05)
    assert isinstance(s.data, da.Array)
    assert s.shape == frames.shape and s.frame_interval_s == 0.05
    np.testing.assert_array_equal(s.data.compute(), frames)
    assert s.pixel_size_um == pytest.approx(0.65e4, rel=1e-6)  # 0.65 cm from the first file's resolution
    assert s.meta["format"] == "tiff-sequence" and s.meta["n_files"] == len(frames)
    assert s.source == str(folder.resolve())
    assert s.identity()["bytes"] == sum(p.stat().st_size for p in folder.glob("*.tif"))


def test_quoted_glob_pattern_opens_the_matching_frames(tmp_path, frames, monkeypatch):
    _write_frames(tmp_path / "frames", frames, name="img_{}.tif")
    tifffile.imwrite(tmp_path / "frames" / "other.tif", frames[0])  # not matched by the pattern
    monkeypatch.chdir(tmp_path)
    s = open_stack("frames/img_*.tif", frame_interval_s=0.1)
    np.testing.assert_array_equal(s.data.compute(), frames)
    assert str(tmp_path / "frames") in s.input_paths()
    with pytest.raises(StackNotFoundError, match="no files match 'frames/none_\\*.tif'"):
        open_stack("frames/none_*.tif", frame_interval_s=0.1)


def test_frame_files_need_a_frame_interval_from_the_user(tmp_path, frames):
    _write_frames(tmp_path / "f", frames, imagej=True, metadata={"finterval": 0.5})  # a single frame's: ignored
    with pytest.raises(MissingMetadataError, match="single-frame TIFF files does not record.*frame_interval_s="):
        open_stack(tmp_path / "f")


def test_frame_files_are_read_only_when_needed(tmp_path, frames):
    """Opening reads only the first file; a later file of another size is an error when it is read,
    naming that file."""
    folder = tmp_path / "f"
    _write_frames(folder, frames)
    tifffile.imwrite(folder / "frame17.tif", np.zeros((4, 4), np.uint16))
    s = open_stack(folder, frame_interval_s=0.05)  # no error yet: frame 17 was not read
    assert s.data.chunks[0] == (1,) * len(frames)  # one chunk per file
    np.testing.assert_array_equal(s.data[:17].compute(), frames[:17])
    with pytest.raises(InputError, match=r"frame17\.tif' holds a uint16 image of shape \(4, 4\)"):
        s.data.compute()


def test_multichannel_frame_files_take_a_channel(tmp_path, rng):
    data = rng.integers(0, 100, (12, 2, 6, 7)).astype(np.uint16)
    _write_frames(tmp_path / "f", data, imagej=True, metadata={"axes": "CYX"})
    with pytest.raises(InputError, match="2 channels"):
        open_stack(tmp_path / "f", frame_interval_s=0.1)
    np.testing.assert_array_equal(open_stack(tmp_path / "f", 0.1, channel=1).data.compute(), data[:, 1])


def test_a_folder_of_stacks_is_not_taken_for_frames(tmp_path, frames):
    tifffile.imwrite(tmp_path / "a.tif", frames, imagej=True, metadata={"axes": "TYX", "finterval": 0.1})
    with pytest.raises(InputError, match="holds 24 images.*one frame per file"):
        open_stack(tmp_path, frame_interval_s=0.1)


def test_a_folder_that_is_neither_zarr_nor_frames_says_what_it_expected(tmp_path):
    folder = tmp_path / "stuff"
    folder.mkdir()
    (folder / "a.png").write_bytes(b"x")
    with pytest.raises(InputError, match=r"Zarr or OME-Zarr store .*zarr.json.* one TIFF file per frame.*a\.png"):
        open_stack(folder)


def test_a_zarr_folder_is_still_zarr(tmp_path, frames):
    p = tmp_path / "plain"  # no .zarr in the name: the metadata file decides
    z = zarr.create_array(str(p), shape=frames.shape, chunks=(24, 5, 6), dtype=frames.dtype)
    z[:] = frames
    z.attrs["frame_interval_s"] = 0.02
    s = open_stack(p)
    assert s.meta["format"] == "zarr"
    np.testing.assert_array_equal(s.data.compute(), frames)


# ------------------------------------------------------------------------------------------ plausibility
def test_an_absurd_frame_interval_says_so_in_pythons_words(frames):
    with pytest.raises(InputError) as err:
        open_stack(frames, frame_interval_s=1e-9)
    text = str(err.value)
    assert "frame_interval_s=1e-09 looks wrong" in text and "1e+09 frames per second" in text
    assert "typical values are 0.001 to 0.1 s" in text
    assert "--" not in text and "bpm" not in text
    assert open_stack(frames, frame_interval_s=1e-4).frame_interval_s == 1e-4  # 10000 per second: a fast camera


def test_an_absurd_frame_interval_in_the_file_names_the_file(tmp_path, frames):
    p = tmp_path / "ij.tif"
    tifffile.imwrite(p, frames, imagej=True, metadata={"axes": "TYX", "finterval": 40, "tunit": "ns"})
    with pytest.raises(InputError, match=r"recorded in .*ij\.tif' \(ImageJ finterval 40 ns\) is 4e-08 s"):
        open_stack(p)


def test_channel_out_of_range_counts_from_zero(tmp_path, rng):
    p = tmp_path / "c.tif"
    tifffile.imwrite(p, rng.integers(0, 100, (20, 3, 8, 8)).astype(np.uint16), imagej=True,
                     metadata={"axes": "TCYX", "finterval": 0.1})
    with pytest.raises(InputError, match=r"channel=3 is out of range: .* 3 channels, counted from 0, so use 0 to 2 "
                                         r"\(the first channel is 0"):
        open_stack(p, channel=3)


# ------------------------------------------------------------------------------------------ outputs
def test_an_output_inside_the_input_is_refused(tmp_path):
    data = tmp_path / "data" / "stack.zarr"
    data.mkdir(parents=True)
    with pytest.raises(InputError, match="lies inside the input"):
        check_replaceable(data / "results", lambda p: True, "result", protect=[data])
    with pytest.raises(InputError, match="lies inside the input"):  # a pattern protects its folder
        check_replaceable(tmp_path / "data" / "res", lambda p: True, "result",
                          protect=[str(tmp_path / "data" / "*.tif")])
    with pytest.raises(ResultExistsError, match="holds the input"):
        check_replaceable(tmp_path / "data", lambda p: True, "result", protect=[data])
    assert check_replaceable(tmp_path / "elsewhere", lambda p: True, "result", protect=[data])


def test_an_output_below_a_file_says_the_file_is_a_file(tmp_path):
    f = tmp_path / "copy.tif"
    f.write_bytes(b"data")
    with pytest.raises(InputError, match=r"copy\.tif' is a file, not a folder"):
        check_replaceable(f / "res", lambda p: True, "result")
    with pytest.raises(ResultExistsError, match=r"copy\.tif' is a file, not a folder"):
        check_replaceable(f, lambda p: True, "result")
    assert f.read_bytes() == b"data"
