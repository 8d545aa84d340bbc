"""OME-NGFF 0.5 images on Zarr v3: the one place that writes and reads them.

Maps are stored as one (c, y, x) float32 array with a channel per map (names
in ``omero.channels[].label`` and in our own ``tempofield.channels`` list),
``dimension_names`` set, a type and unit on every axis, and the pixel size as
the y/x scale. Label images go under ``labels/NAME`` as the NGFF spec lays out.
Time-lapse stacks converted for the engine are written here too, as (t, y, x)
images with the whole time axis in each chunk.
"""

from __future__ import annotations

import numpy as np
import zarr

NGFF_VERSION = "0.5"


def _space_axes(pixel_size_um):
    unit = {"unit": "micrometer"} if pixel_size_um else {}
    return [{"name": "y", "type": "space", **unit}, {"name": "x", "type": "space", **unit}]


def _multiscales(name, axes, scale):
    return [{"name": name, "axes": axes,
             "datasets": [{"path": "0", "coordinateTransformations": [{"type": "scale", "scale": scale}]}]}]


def write_maps(path, channels: dict[str, np.ndarray], *, pixel_size_um=None, labels=None, units=None) -> None:
    """Write named (Y, X) maps as one multi-channel OME-NGFF image at ``path``."""
    names = list(channels)
    stack = np.stack([np.asarray(channels[n], np.float32) for n in names])
    ps = float(pixel_size_um) if pixel_size_um else 1.0
    root = zarr.open_group(str(path), mode="w", zarr_format=3)
    axes = [{"name": "c", "type": "channel"}] + _space_axes(pixel_size_um)
    root.attrs["ome"] = {
        "version": NGFF_VERSION,
        "multiscales": _multiscales("tempofield maps", axes, [1.0, ps, ps]),
        "omero": {"channels": [{"label": n, "active": i == 0, "color": CHANNEL_COLOURS.get(n, "FFFFFF"),
                                "window": _window(stack[i], n)} for i, n in enumerate(names)]},
    }
    root.attrs["tempofield"] = {"channels": names, "units": {n: (units or {}).get(n, "") for n in names}}
    _write_array(root, "0", stack, ["c", "y", "x"], chunks=(1,) + _plane_chunks(stack.shape[1:]))
    if labels:
        lab_group = root.require_group("labels")
        lab_group.attrs["ome"] = {"version": NGFF_VERSION, "labels": list(labels)}
        for lname, img in labels.items():
            g = lab_group.require_group(lname)
            g.attrs["ome"] = {"version": NGFF_VERSION,
                              "multiscales": _multiscales(lname, _space_axes(pixel_size_um), [ps, ps]),
                              "image-label": {"version": NGFF_VERSION, "source": {"image": "../../"}}}
            _write_array(g, "0", np.asarray(img, np.int32), ["y", "x"], chunks=_plane_chunks(img.shape))


def _plane_chunks(shape):
    return tuple(min(int(s), 1024) for s in shape)


#: Display colours of the map channels for other OME-Zarr viewers (hex RGB), chosen so neighbours differ.
CHANNEL_COLOURS = {"rate_bpm": "FFD400", "period_s": "00C8FF", "amplitude": "FF7F0E", "periodicity": "7FFF00",
                   "coherence": "FFFFFF", "phase_rad": "FF00FF", "delay_s": "1F77FF", "peak_score": "BBBBBB",
                   "mean_intensity": "FFFFFF", "detection": "FF4040", "loop_score_tiles": "9467BD"}

#: Channels whose display window is fixed by their meaning, not by their values.
FIXED_WINDOWS = {"phase_rad": (0.0, float(2 * np.pi)), "periodicity": (0.0, 1.0), "coherence": (0.0, 1.0),
                 "detection": (0.0, 2.0)}


def _window(a, name=""):
    """The omero display window: the full range as min/max, and start/end from the 1st to 99th
    percentile, so that two outlier pixels do not wash out the map (fixed for phase, 0-1 maps)."""
    finite = a[np.isfinite(a)]
    if finite.size == 0:
        return {"start": 0.0, "end": 1.0, "min": 0.0, "max": 1.0}
    lo, hi = float(finite.min()), float(finite.max())
    start, end = FIXED_WINDOWS.get(name) or (float(v) for v in np.percentile(finite, [1, 99]))
    if not end > start:
        start, end = lo, max(hi, lo + 1e-6)
    return {"start": start, "end": end, "min": min(lo, start), "max": max(hi, end)}


def _write_array(group, name, data, dims, chunks):
    fill = np.nan if np.issubdtype(data.dtype, np.floating) else 0
    arr = group.create_array(name, shape=data.shape, dtype=data.dtype, chunks=chunks,
                             dimension_names=dims, fill_value=fill)
    arr[...] = data
    return arr


def read_maps(path) -> tuple[dict[str, np.ndarray], dict]:
    """Read the maps written by :func:`write_maps`: ({name: (Y, X) array}, attrs)."""
    root = zarr.open_group(str(path), mode="r")
    attrs = dict(root.attrs)
    names = attrs.get("tempofield", {}).get("channels") or \
        [c["label"] for c in attrs["ome"]["omero"]["channels"]]
    data = np.asarray(root["0"][...])
    return {n: data[i] for i, n in enumerate(names)}, attrs


def read_label(path, name) -> np.ndarray:
    """The label image ``labels/NAME`` of an image written by :func:`write_maps`, as int32."""
    root = zarr.open_group(str(path), mode="r")
    return np.asarray(root["labels"][name]["0"][...], np.int32)


def create_stack(path, shape, dtype, *, frame_interval_s, pixel_size_um=None, chunk_yx=128):
    """Create an empty (t, y, x) OME-NGFF image with whole-time chunks and return its array.

    The time axis carries the frame interval as its scale, in seconds; y and x
    carry the pixel size in micrometres when it is known.
    """
    t, y, x = (int(s) for s in shape)
    ps = float(pixel_size_um) if pixel_size_um else 1.0
    root = zarr.open_group(str(path), mode="w", zarr_format=3)
    axes = [{"name": "t", "type": "time", "unit": "second"}] + _space_axes(pixel_size_um)
    root.attrs["ome"] = {"version": NGFF_VERSION,
                         "multiscales": _multiscales("stack", axes, [float(frame_interval_s), ps, ps])}
    return root.create_array("0", shape=(t, y, x), dtype=dtype, chunks=(t, min(y, chunk_yx), min(x, chunk_yx)),
                             dimension_names=["t", "y", "x"], fill_value=0)
