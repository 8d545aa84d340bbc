"""Between a RhythmResult and napari layer data: which maps become layers, and how they look.

Shared by the analysis panel, the reader and the writer so a map looks the
same however it reached the viewer, and a writer can rebuild a result from the
layers it is given. Layer data are plain ``(data, kwargs, layer_type)``
tuples; nothing here imports napari. The only arithmetic is for display:
robust contrast limits and a thinned grid of velocity arrows.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass

import numpy as np

from tempofield.outputs.result import MAP_NAMES, MAP_UNITS, RhythmResult

#: Labels layers show region outlines this many pixels wide, so the maps stay visible.
REGION_CONTOUR_PX = 1
#: Metadata key under which every tempofield layer keeps its provenance.
META_KEY = "tempofield"
#: Metadata key holding the whole RhythmResult object (tables, references, other maps).
RESULT_KEY = "tempofield_result"

VELOCITY_KEYS = ("velocity_y_um_s", "velocity_x_um_s")  # px_s in place of um_s without a pixel size


def _velocity_keys(extra) -> tuple[tuple[str, str], str] | None:
    """The velocity maps' names in ``extra`` and their unit (micrometre/second or pixel/second), or None."""
    for suffix, unit in (("um_s", "micrometer/second"), ("px_s", "pixel/second")):
        keys = (f"velocity_y_{suffix}", f"velocity_x_{suffix}")
        if all(k in extra for k in keys):
            return keys, unit
    return None

#: Percentiles of the finite values that bound a map's colour range.
ROBUST_PERCENTILES = (1.0, 99.0)


@dataclass(frozen=True)
class MapStyle:
    """How one map is shown: its layer title, colormap, limits rule and visibility."""

    title: str
    colormap: str
    limits: str  # "robust" (1st-99th percentile), "unit" (0..1), "cyclic" (0..2 pi), "period" (0..max period)
    visible: bool


#: Maps shown as image layers, bottom to top.
MAP_STYLES: dict[str, MapStyle] = {
    "periodicity": MapStyle("periodicity", "cividis", "unit", False),
    # the delay's range is the regions' own spread (a 0-0.3 s wave is not one flat colour in 0-1.5 s)
    "delay_s": MapStyle("delay (s)", "plasma", "robust", False),  # activation delay; short so the list shows it whole
    "phase_rad": MapStyle("phase (rad)", "twilight", "cyclic", False),
    # perceptually uniform, its ends differ in lightness (so they stay apart in grey too)
    "rate_bpm": MapStyle("rate (bpm)", "viridis", "robust", True),
}
REGIONS_TITLE = "regions"
VELOCITY_TITLE = "velocity"


#: Longest part of a source's name kept in a layer name (its end: what tells stacks apart).
SOURCE_CHARS = 28
LOOP_TILES_TITLE = "loop score (16 px tiles)"


def short_source(source: str) -> str:
    """The end of a long source name (``"…_A03_run2.tif"``): napari's layer list
    cuts long names in the middle, which hid the part that tells two stacks apart."""
    return source if len(source) <= SOURCE_CHARS else "…" + source[-(SOURCE_CHARS - 1):]


def layer_name(source: str, title: str) -> str:
    """The name of a result layer: what it shows, then (the end of) the source it came from.

    The full source name stays in the layer's metadata (``source_layer``).
    """
    return f"{title} · {short_source(source)}"


def contrast_limits(values: np.ndarray, rule: str, period_s: np.ndarray | None = None) -> tuple[float, float]:
    """Colour range of a map for display (never empty, never NaN)."""
    if rule == "unit":
        return (0.0, 1.0)
    if rule == "cyclic":
        return (0.0, float(2 * np.pi))
    if rule == "period":
        periods = np.asarray(period_s if period_s is not None else values)
        finite = periods[np.isfinite(periods)]
        hi = float(finite.max()) if finite.size else 1.0
        return (0.0, hi if hi > 0 else 1.0)
    finite = np.asarray(values)[np.isfinite(values)]
    if finite.size == 0:
        return (0.0, 1.0)
    lo, hi = (float(v) for v in np.percentile(finite, ROBUST_PERCENTILES))
    if not hi > lo:
        lo, hi = lo - 0.5, hi + 0.5
    return (lo, hi)


def provenance(result: RhythmResult, source: str, map_name: str, run_id: str, **extra) -> dict:
    """The metadata every result layer carries: what it is, the parameters and version."""
    return {
        META_KEY: {"map": map_name, "unit": MAP_UNITS.get(map_name, extra.pop("unit", "")),
                   "source_layer": source, "run_id": run_id, "version": result.version,
                   "parameters": dict(result.parameters), "frame_interval_s": result.frame_interval_s,
                   "pixel_size_um": result.pixel_size_um, **extra},
        RESULT_KEY: result,
    }


def result_layer_data(result: RhythmResult, source: str, *, scale=None, translate=None,
                      units=None, extra_meta: dict | None = None) -> list[tuple]:
    """Layer data tuples for a result: the maps, the regions, and velocity arrows if present.

    Parameters
    ----------
    result : RhythmResult
    source : str
        Name of the raw layer (or folder) the result belongs to; it prefixes
        the layer names and is kept in the metadata.
    scale, translate : (2,) sequence, optional
        World transform of the raw stack's last two axes, so the maps overlay it.
    units : (2,) sequence of str, optional
        Spatial units of those axes.
    extra_meta : dict, optional
        More provenance for every layer's ``metadata["tempofield"]`` (e.g. the channel).
    """
    extra_meta = dict(extra_meta or {})
    run_id = uuid.uuid4().hex[:12]
    spatial = {}
    if scale is not None:
        spatial["scale"] = tuple(float(s) for s in scale)
    if translate is not None:
        spatial["translate"] = tuple(float(t) for t in translate)
    if units is not None:
        spatial["units"] = tuple(units)
    out = []
    for name, style in MAP_STYLES.items():
        data = np.asarray(getattr(result, name), np.float32)
        out.append((data, {
            "name": layer_name(source, style.title), "colormap": style.colormap,
            "contrast_limits": contrast_limits(data, style.limits, result.period_s),
            "visible": style.visible, "opacity": 0.75, "blending": "translucent",
            "metadata": provenance(result, source, name, run_id, **extra_meta), **spatial}, "image"))
    tiles = (result.extra_maps or {}).get("loop_score_tiles")
    if tiles is not None:  # the optional tile loop-score map (option tile_loop_map)
        data = np.asarray(tiles, np.float32)
        out.append((data, {
            "name": layer_name(source, LOOP_TILES_TITLE), "colormap": "magma", "contrast_limits": (0.0, 1.0),
            "visible": False, "opacity": 0.75, "blending": "translucent",
            "metadata": provenance(result, source, "loop_score_tiles", run_id, unit="", **extra_meta),
            **spatial}, "image"))
    out.append((np.asarray(result.regions, np.int32), {
        "name": layer_name(source, REGIONS_TITLE), "opacity": 0.6, "visible": False,
        "metadata": provenance(result, source, "regions", run_id, **extra_meta), **spatial}, "labels"))
    vectors = velocity_vectors(result)
    if vectors is not None:
        data, speed = vectors
        _, unit = _velocity_keys(result.extra_maps)
        feature = "speed_um_s" if unit.startswith("micro") else "speed_px_s"
        lo, hi = contrast_limits(speed, "robust")  # a few outliers near a pacemaker must not set the colours
        out.append((data, {
            "name": layer_name(source, VELOCITY_TITLE), "features": {feature: speed},
            "edge_color": feature, "edge_colormap": "magma", "edge_contrast_limits": (lo, hi),
            "edge_width": 1.0, "vector_style": "arrow", "visible": False,
            "metadata": provenance(result, source, "velocity", run_id, unit=unit, **extra_meta),
            **spatial}, "vectors"))
    return out


def velocity_vectors(result: RhythmResult, max_arrows_per_side: int = 24):
    """Arrows for a velocity field in ``result.extra_maps``, or None if there is none.

    Returns ``(data, speed)``: data (N, 2, 2) of [start (y, x) in pixels,
    direction (dy, dx) scaled so an arrow at the 90th percentile of speed spans
    one grid step, faster ones no longer] and speed (N,) in micrometres per second (pixels per
    second without a pixel size).
    """
    extra = result.extra_maps or {}
    found = _velocity_keys(extra)
    if found is None:
        return None
    vy, vx = (np.asarray(extra[k], np.float32) for k in found[0])
    step = max(1, int(np.ceil(max(vy.shape) / max_arrows_per_side)))
    yy, xx = np.mgrid[step // 2:vy.shape[0]:step, step // 2:vy.shape[1]:step]
    sy, sx = vy[yy, xx], vx[yy, xx]
    ok = np.isfinite(sy) & np.isfinite(sx)
    speed = np.hypot(sy, sx)[ok]
    if speed.size == 0:
        return None
    # A robust scale: a few very fast arrows (near a pacemaker) must not shrink all others.
    top = float(np.percentile(speed, 90)) or 1.0
    start = np.stack([yy[ok], xx[ok]], axis=1).astype(np.float32)
    direction = np.stack([sy[ok], sx[ok]], axis=1) / np.maximum(speed, top)[:, None] * 0.9 * step
    direction *= np.minimum(speed / top, 1.0)[:, None]
    return np.stack([start, direction.astype(np.float32)], axis=1), speed.astype(np.float32)


def result_from_layers(layers: list[tuple]) -> RhythmResult:
    """Rebuild a RhythmResult from ``(data, attributes, layer_type)`` of result layers.

    Maps come from the layers (so edits, e.g. to the region labels, are kept);
    everything else (tables, references, other maps) from the result object in
    their metadata when there is one; maps that are in neither are NaN.

    Raises
    ------
    ValueError
        If no layer is a tempofield map, or the layers come from different runs.
    """
    found: dict[str, np.ndarray] = {}
    meta = None
    base = None
    for data, attrs, _ in layers:
        md = (attrs or {}).get("metadata") or {}
        info = md.get(META_KEY)
        if not info or info.get("map") not in MAP_NAMES:
            continue
        if meta is not None and info.get("run_id") != meta.get("run_id"):
            raise ValueError("the selected layers come from different analyses "
                             f"({meta.get('source_layer')!r} and {info.get('source_layer')!r}); "
                             "select the layers of one result only.")
        meta = info
        base = md.get(RESULT_KEY, base)
        found[info["map"]] = np.asarray(data)
    if meta is None:
        raise ValueError("none of the selected layers is a tempofield map; select the layers of a "
                         "result (e.g. '... · rate (bpm)' and '... · regions').")
    shape = next(iter(found.values())).shape
    maps = {}
    for name in MAP_NAMES:
        if name in found:
            maps[name] = found[name]
        elif base is not None:
            maps[name] = getattr(base, name)
        else:
            maps[name] = np.zeros(shape, np.int32) if name == "regions" else np.full(shape, np.nan, np.float32)
    maps = {k: (np.asarray(v, np.int32) if k == "regions" else np.asarray(v, np.float32)) for k, v in maps.items()}
    common = dict(frame_interval_s=meta["frame_interval_s"], pixel_size_um=meta.get("pixel_size_um"),
                  parameters=dict(meta.get("parameters") or {}), version=meta.get("version", ""))
    if base is not None:
        return RhythmResult(**maps, **common, region_table=base.region_table, references=base.references,
                            input=base.input, timings=base.timings, extra_maps=base.extra_maps)
    return RhythmResult(**maps, **common)
