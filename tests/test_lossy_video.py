"""Lossy video: the codec's flicker is not taken for a rhythm.

H.264 (and the like) code frames from one another: unchanged blocks are
repeated exactly until a refresh, and the picture's quality follows the key
frames and the bit budget. A beating blob on a still, textured background
with camera noise, written with PyAV (libx264), must give one region at the
blob's rate, the codec warning and at most 1 % false area.
"""

from __future__ import annotations

import numpy as np
import pytest

import tempofield
from tempofield.io.video import probe_video

av = pytest.importorskip("av")


def write_video(path, codec="libx264", n=500, shape=(96, 128), fps=25, rate_bpm=100.0, gop=None, seed=0):
    rng = np.random.default_rng(seed)
    h, w = shape
    yy, xx = np.mgrid[:h, :w]
    blob = (yy - 40) ** 2 + (xx - 50) ** 2 <= 15 ** 2
    background = 100 + rng.normal(0, 12, (h, w))
    beat = 40 * np.clip(np.sin(2 * np.pi * rate_bpm / 60 * np.arange(n) / fps), 0, None)
    opts = {"crf": "28"} if codec == "libx264" else {}
    if gop:
        opts["g"] = str(gop)
    with av.open(str(path), "w") as out:
        stream = out.add_stream(codec, rate=fps, options=opts)
        stream.width, stream.height = w, h
        stream.pix_fmt = "yuvj420p" if codec == "mjpeg" else "yuv420p"
        for i in range(n):
            g = np.clip(background + beat[i] * blob + rng.normal(0, 3, (h, w)), 0, 255).astype(np.uint8)
            frame = av.VideoFrame.from_ndarray(np.repeat(g[:, :, None], 3, axis=2), format="rgb24")
            for packet in stream.encode(frame):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)
    return blob


@pytest.mark.parametrize("gop", [None, 12])
def test_h264_blob_on_still_background(tmp_path, gop):
    path = tmp_path / "blob.mp4"
    blob = write_video(path, gop=gop)
    coding = probe_video(path)
    assert coding["codec"] == "h264" and coding["inter_frame_lossy"]
    if gop:
        assert coding["key_frame_interval"] == pytest.approx(gop)
    res = tempofield.analyze(tempofield.open_stack(path), (30, 180))
    assert len(res.region_table) == 1
    assert res.region_table.iloc[0]["rate_median_bpm"] == pytest.approx(100.0, abs=0.5)
    found = res.regions > 0
    assert found[blob].mean() >= 0.95
    assert (found & ~blob).mean() <= 0.01
    warned = [w for w in res.parameters["warnings"] if "h264 video" in w]
    assert len(warned) == 1 and "without loss" in warned[0]
    assert res.parameters["video_coding"]["codec"] == "h264"


def test_an_intra_frame_video_gets_no_codec_warning(tmp_path):
    path = tmp_path / "blob.avi"
    blob = write_video(path, codec="mjpeg", n=300)
    assert not probe_video(path)["inter_frame_lossy"]
    res = tempofield.analyze(tempofield.open_stack(path), (30, 180))
    assert not [w for w in res.parameters["warnings"] if "lossy codec" in w]
    assert res.parameters["video_coding"]["codec"] == "mjpeg"
    found = res.regions > 0
    assert found[blob].mean() >= 0.95


def test_frozen_fraction_tells_a_codec_from_a_camera():
    from tempofield.kernels.preprocess import frozen_fraction

    rng = np.random.default_rng(0)
    camera = rng.normal(100, 3, (50, 4, 4)).round()
    frozen = np.repeat(camera[::10], 10, axis=0)
    assert frozen_fraction(camera).max() < 0.5 and frozen_fraction(frozen).min() >= 0.8
