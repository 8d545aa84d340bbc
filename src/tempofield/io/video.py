"""What a video's container says about how its frames were coded (PyAV, no decoding).

Lossy codecs that code frames from one another (H.264, HEVC, MPEG-4, VP8/9,
AV1, ...) freeze unchanged blocks between refreshes and shift the picture's
quality at every key frame and with the bit budget; on still background this
flicker can pass for a rhythm. Intra-frame codecs (MJPEG, PNG, FFV1, raw)
code each frame on its own. :func:`probe_video` reads the codec and the key
frames from the packets alone.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

#: Codecs that code a frame from others (lossy): their pictures can flicker with the coding.
INTER_FRAME_LOSSY = frozenset({
    "h264", "hevc", "h265", "mpeg4", "mpeg2video", "mpeg1video", "msmpeg4v2", "msmpeg4v3", "h263", "vp8",
    "vp9", "av1", "theora", "wmv1", "wmv2", "wmv3", "vc1", "flv1"})


def probe_video(path) -> dict:
    """The codec and key-frame spacing of a video's first video stream.

    Returns
    -------
    dict
        ``codec`` (FFmpeg's name), ``inter_frame_lossy`` (bool),
        ``frames`` (packets counted), ``key_frames`` (their number) and
        ``key_frame_interval`` (median spacing in frames, or None with
        fewer than two key frames).
    """
    import av

    with av.open(str(Path(path))) as container:
        stream = container.streams.video[0]
        codec = str(stream.codec_context.name)
        keys, n = [], 0
        for packet in container.demux(stream):
            if packet.size == 0:  # the flush packet at the end
                continue
            if packet.is_keyframe:
                keys.append(n)
            n += 1
    spacing = float(np.median(np.diff(keys))) if len(keys) > 1 else None
    return {"codec": codec, "inter_frame_lossy": codec in INTER_FRAME_LOSSY, "frames": n,
            "key_frames": len(keys), "key_frame_interval": spacing}
