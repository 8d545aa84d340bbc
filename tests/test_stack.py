"""open_stack on real files: TIFF flavours, Zarr, OME-Zarr, video, arrays; metadata and errors."""

from __future__ import annotations

import dask.array as da
import numpy as np
import pytest
import tifffile
import zarr

from tempofield import open_stack
from tempofield.errors import InputError, MissingMetadataError, StackNotFoundError


@pytest.fixture
def frames(rng):
    return rng.integers(0, 4000, (24, 10, 12)).astype(np.uint16)


def test_imagej_tiff_metadata_round_trip(tmp_path, frames):
    """Reference: tifffile writes ImageJ finterval, XResolution and unit; we read the same values back."""
    p = tmp_path / "ij.tif"
    tifffile.imwrite(p, frames, imagej=True, resolution=(1 / 0.65, 1 / 0.65),
                     metadata={"axes": "TYX", "finterval": 0.025, "unit": "um"})
    s = open_stack(p)
    assert s.shape == frames.shape
    assert s.frame_interval_s == pytest.approx(0.025)
    assert s.pixel_size_um == pytest.approx(0.65, rel=1e-4)
    np.testing.assert_array_equal(np.asarray(s.data), frames)
    s2 = open_stack(p, frame_interval_s=0.1, pixel_size_um=2.0)  # arguments override the file
    assert (s2.frame_interval_s, s2.pixel_size_um) == (0.1, 2.0)
    assert s2.meta["frame_interval_from"] == "argument"


@pytest.mark.parametrize("unit, um_per_unit", [("micron", 1.0), ("\\u00B5m", 1.0), ("nm", 1e-3), ("mm", 1e3),
                                              ("pixel", None)])
def test_imagej_length_units(tmp_path, frames, unit, um_per_unit):
    """Reference: tifffile writes ImageJ's ``unit`` as given (ImageJ itself writes the escaped
    micro sign); the pixel size comes back in micrometres, and a unit that is not a length gives none."""
    p = tmp_path / "u.tif"
    tifffile.imwrite(p, frames, imagej=True, resolution=(4.0, 4.0),  # 4 pixels per unit
                     metadata={"axes": "TYX", "finterval": 0.02, "unit": unit})
    s = open_stack(p)
    if um_per_unit is None:
        assert s.pixel_size_um is None
    else:
        assert s.pixel_size_um == pytest.approx(um_per_unit / 4.0)


def test_compressed_tiff_is_read_lazily_and_exactly(tmp_path, frames):
    p = tmp_path / "z.tif"
    tifffile.imwrite(p, frames, imagej=True, compression="zlib", metadata={"axes": "TYX", "finterval": 0.05})
    s = open_stack(p)
    assert isinstance(s.data, da.Array)
    np.testing.assert_array_equal(s.data.compute(), frames)


def test_ome_tiff_time_increment_and_pixel_size(tmp_path, frames):
    """Reference: tifffile's OME writer (TimeIncrement, PhysicalSizeX) read back."""
    p = tmp_path / "o.ome.tif"
    tifffile.imwrite(p, frames, ome=True, metadata={"axes": "TYX", "TimeIncrement": 40, "TimeIncrementUnit": "ms",
                                                    "PhysicalSizeX": 0.5, "PhysicalSizeXUnit": "µm"})
    s = open_stack(p)
    assert s.frame_interval_s == pytest.approx(0.04)
    assert s.pixel_size_um == pytest.approx(0.5)


def test_ome_tiff_plane_delta_t(tmp_path, frames):
    p = tmp_path / "d.ome.tif"
    tifffile.imwrite(p, frames, ome=True, metadata={"axes": "TYX", "Plane": {"DeltaT": list(np.arange(24) * 0.03),
                                                                              "DeltaTUnit": ["s"] * 24}})
    s = open_stack(p)
    assert s.frame_interval_s == pytest.approx(0.03)
    assert "DeltaT" in s.meta["frame_interval_from"]


def test_multichannel_tiff_needs_a_channel(tmp_path, rng):
    data = rng.integers(0, 100, (20, 2, 8, 8)).astype(np.uint16)
    p = tmp_path / "c.tif"
    tifffile.imwrite(p, data, imagej=True, metadata={"axes": "TCYX", "finterval": 0.1})
    with pytest.raises(InputError, match="2 channels.*channel=N, counted from 0"):
        open_stack(p)
    s = open_stack(p, channel=1)
    np.testing.assert_array_equal(s.data.compute(), data[:, 1])
    with pytest.raises(InputError, match="out of range"):
        open_stack(p, channel=2)


def test_five_d_array_needs_channel_and_plane(rng):
    data = rng.random((12, 3, 2, 6, 7))
    with pytest.raises(InputError, match="plane"):
        open_stack(data, 0.1, axes="TZCYX", channel=0)
    s = open_stack(data, 0.1, axes="TZCYX", channel=1, plane=2)
    np.testing.assert_allclose(s.data.compute(), data[:, 2, 1])


def test_rgb_becomes_luminance(tmp_path, rng):
    rgb = rng.integers(0, 255, (10, 6, 7, 3)).astype(np.uint8)
    p = tmp_path / "rgb.tif"
    tifffile.imwrite(p, rgb, photometric="rgb", metadata={"axes": "TYXS"})
    s = open_stack(p, frame_interval_s=0.05)
    expected = rgb @ np.array([0.299, 0.587, 0.114])
    np.testing.assert_allclose(s.data.compute(), expected, rtol=1e-5)


@pytest.mark.parametrize("fmt", [2, 3])
def test_plain_zarr_array(tmp_path, frames, fmt):
    p = tmp_path / f"a{fmt}.zarr"
    z = zarr.create_array(str(p), shape=frames.shape, chunks=(24, 5, 6), dtype=frames.dtype, zarr_format=fmt)
    z[:] = frames
    with pytest.raises(MissingMetadataError, match="frame_interval_s=0.02"):  # Python's name, in Python
        open_stack(p)
    z.attrs["frame_interval_s"] = 0.02
    s = open_stack(p)
    assert s.frame_interval_s == 0.02
    assert s.data.chunks[0] == (24,)
    np.testing.assert_array_equal(s.data.compute(), frames)


def test_ome_zarr_written_by_the_reference_writer(tmp_path, frames):
    """Reference: the ome-zarr package's writer (axes with units, scale transformations)."""
    from ome_zarr.writer import write_image

    p = tmp_path / "ref.ome.zarr"
    root = zarr.open_group(str(p), mode="w")
    write_image(frames, root, axes=["t", "y", "x"], scale_factors=None,
                scale={"t": 25.0, "y": 0.8, "x": 0.8},
                axes_units={"t": "millisecond", "y": "micrometer", "x": "micrometer"})
    s = open_stack(p)
    assert s.frame_interval_s == pytest.approx(0.025)
    assert s.pixel_size_um == pytest.approx(0.8)
    np.testing.assert_array_equal(s.data.compute(), frames)


def _write_video(p, gray, rate=25):
    import av

    n, h, w = gray.shape
    with av.open(str(p), "w") as out:
        stream = out.add_stream("ffv1", rate=rate)  # lossless, so values survive
        stream.width, stream.height, stream.pix_fmt = w, h, "gray"
        for g in gray:
            for packet in stream.encode(av.VideoFrame.from_ndarray(g, format="gray")):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)


def test_video_file(tmp_path, rng):
    p = tmp_path / "clip.avi"
    n, h, w = 30, 32, 48
    gray = rng.integers(0, 255, (n, h, w)).astype(np.uint8)
    _write_video(p, gray)
    s = open_stack(p)
    assert s.shape == (n, h, w)
    assert s.frame_interval_s == pytest.approx(1 / 25)
    assert s.data.dtype == np.uint8  # 8-bit luminance, a quarter of float32's memory
    np.testing.assert_array_equal(s.data.compute(), gray)


def test_mp4_h264_video_gives_its_frame_rate_and_its_beat(tmp_path):
    """An H.264 MP4 (lossy, colour: yuv420p), as a phone or a high-speed camera's export would be:
    the frame interval comes from the container and the beat survives the codec."""
    import av

    p = tmp_path / "beat.mp4"
    n, h, w, fps = 200, 32, 48, 50
    t = np.arange(n)[:, None, None] / fps
    frames = (120 + 60 * np.sin(2 * np.pi * 1.5 * t) * np.ones((1, h, w))).astype(np.uint8)
    with av.open(str(p), "w") as out:
        stream = out.add_stream("libx264", rate=fps, options={"crf": "12"})
        stream.width, stream.height, stream.pix_fmt = w, h, "yuv420p"
        for f in frames:
            rgb = np.repeat(f[:, :, None], 3, axis=2)
            for packet in stream.encode(av.VideoFrame.from_ndarray(rgb, format="rgb24")):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)
    s = open_stack(p)
    assert s.shape == (n, h, w)
    assert s.frame_interval_s == pytest.approx(1 / fps)
    assert np.abs(s.data.compute().astype(float) - frames).mean() < 3  # luminance, within the codec's loss
    import tempofield

    res = tempofield.analyze(s, (60, 200), maps_only=True)
    assert np.isfinite(res.rate_bpm).mean() > 0.95
    assert np.nanmedian(res.rate_bpm) == pytest.approx(90.0, abs=0.5)


def test_a_video_too_big_for_memory_points_to_convert_which_streams_it(tmp_path, rng, monkeypatch):
    from tempofield.engine import stack as stack_mod
    from tempofield.engine.convert import convert_stack

    p = tmp_path / "long.avi"
    gray = rng.integers(0, 255, (40, 24, 40)).astype(np.uint8)
    _write_video(p, gray, rate=50)
    monkeypatch.setattr(stack_mod, "video_memory_limit", lambda: 10 * 24 * 40)  # ten frames
    with pytest.raises(InputError, match=r"tempofield convert long.avi long.ome.zarr"):
        open_stack(p)
    # convert decodes frame by frame to disk, never the whole video in memory
    monkeypatch.setattr(stack_mod, "_decode_video", lambda *a, **k: pytest.fail("decoded whole"))
    out = convert_stack(p, tmp_path / "long.ome.zarr")
    s = open_stack(out)
    assert s.shape == gray.shape and s.frame_interval_s == pytest.approx(0.02)
    np.testing.assert_array_equal(s.data.compute(), gray)
    assert sorted(q.name for q in tmp_path.iterdir()) == ["long.avi", "long.ome.zarr"]  # no spill left


def test_arrays(frames):
    s = open_stack(frames, frame_interval_s=0.1)
    assert s.shape == frames.shape
    s = open_stack(da.from_array(frames, chunks=(24, 5, 5)), frame_interval_s=0.1, pixel_size_um=1.5)
    assert s.data.chunks[1] == (5, 5)


@pytest.mark.parametrize("err, args, kwargs, match", [
    (MissingMetadataError, (np.zeros((20, 4, 4)),), {}, "frame_interval_s=0.02"),
    (InputError, (np.zeros((20, 4, 4)),), {"frame_interval_s": -1}, "positive"),
    (InputError, (np.zeros((20, 4, 4)),), {"frame_interval_s": 0.1, "pixel_size_um": 0}, "positive"),
    (InputError, (np.zeros((3, 4, 4)),), {"frame_interval_s": 0.1}, "at least 8 frames"),
    (InputError, (np.zeros((20, 2, 4, 4)),), {"frame_interval_s": 0.1}, "axes="),
    (StackNotFoundError, ("/no/such/stack.tif",), {}, "no such stack"),
])
def test_bad_inputs(err, args, kwargs, match):
    with pytest.raises(err, match=match):
        open_stack(*args, **kwargs)


def test_unknown_and_broken_files(tmp_path):
    p = tmp_path / "notes.txt"
    p.write_text("hello")
    with pytest.raises(InputError, match="unknown file type"):
        open_stack(p)
    q = tmp_path / "broken.tif"
    q.write_bytes(b"II*\x00garbage")
    with pytest.raises(InputError, match="cannot read"):
        open_stack(q)
    with pytest.raises(FileNotFoundError):  # the builtin is caught too
        open_stack(tmp_path / "missing.zarr")


@pytest.mark.parametrize("kind", ["imagej", "imagej-zlib", "ome", "plain"])
@pytest.mark.parametrize("keep", [0.9, 0.5, 0.01])
def test_truncated_tiff_is_a_clear_error(tmp_path, rng, kind, keep):
    """A TIFF cut short (an interrupted copy) is refused as truncated, when it is opened or at the
    latest when it is read, never analysed as the single frame tifffile falls back to, and never
    with a bare library error."""
    import tempofield

    data = rng.integers(0, 4000, (200, 32, 32)).astype(np.uint16)
    p = tmp_path / "t.tif"
    if kind == "ome":
        tifffile.imwrite(p, data, ome=True, metadata={"axes": "TYX", "TimeIncrement": 0.05})
    elif kind == "plain":
        tifffile.imwrite(p, data)
    else:
        tifffile.imwrite(p, data, imagej=True, compression="zlib" if kind.endswith("zlib") else None,
                         metadata={"axes": "TYX", "finterval": 0.05})
    raw = p.read_bytes()
    p.write_bytes(raw[: int(len(raw) * keep)])
    with pytest.raises(InputError, match=r"t\.tif.* truncated or corrupt"):
        st = open_stack(p, frame_interval_s=0.05)
        tempofield.analyze(st, (30, 180), maps_only=True)


def test_convert_decodes_frame_wise_pieces_once(tmp_path, rng):
    """A source stored in whole-frame pieces (like a compressed TIFF page in one strip) is decoded
    once, not once per 128-row band, and converts exactly; the temporary file is removed."""
    import threading

    import tempofield
    from tempofield.engine.convert import convert_stack

    frames = rng.integers(0, 4000, (30, 300, 70), dtype=np.uint16)
    decoded = []
    lock = threading.Lock()

    def decode(block, block_info=None):
        with lock:
            decoded.append(block_info[0]["chunk-location"])
        return block

    data = da.from_array(frames, chunks=(1, 300, 70)).map_blocks(decode, dtype=frames.dtype)
    out = convert_stack(tempofield.open_stack(data, frame_interval_s=0.05), tmp_path / "c.ome.zarr")
    assert sorted(decoded) == sorted(set(decoded)) and len(decoded) == 30  # each frame once (3 bands)
    np.testing.assert_array_equal(tempofield.open_stack(out).data.compute(), frames)
    assert [p.name for p in tmp_path.iterdir()] == ["c.ome.zarr"]
