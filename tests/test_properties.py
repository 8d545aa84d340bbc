"""Invariants of the engine over random small scenes (hypothesis).

For any placement of tissue (none, one to three discs anywhere, also across
tile edges and in corners), number type, odd or even T, frame sizes that do
not divide the tile size, input chunking and tiling:

- the analysis ends with a result or an InputError, never anything else;
- the per-pixel maps and the regions are the same whatever the tiling and chunking;
- nothing is labelled away from the tissue.

Tiles are made small by raising the engine's working bytes per sample (the
same arithmetic as a small memory budget on a large stack), so a scene of a
few dozen pixels is cut into one to dozens of tiles.
"""

from __future__ import annotations

import dask.array as da
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import ndimage

import tempofield
from tempofield.engine import tiles
from tempofield.errors import InputError

DT = 0.05
BAND = (40.0, 180.0)

disc = st.tuples(st.floats(0.0, 1.0), st.floats(0.0, 1.0), st.floats(3.0, 7.0), st.sampled_from([60.0, 84.0, 126.0]))

scene = st.fixed_dictionaries({
    "t": st.integers(100, 161),
    "y": st.integers(14, 45),
    "x": st.integers(14, 45),
    "dtype": st.sampled_from(["uint8", "uint16", "float32"]),
    "discs": st.lists(disc, min_size=0, max_size=3),
    "seed": st.integers(0, 2**16),
})

layout = st.fixed_dictionaries({
    "chunk_t": st.sampled_from([None, 17, 64]),  # None: the whole time axis in one chunk
    "chunk_y": st.integers(3, 30),
    "chunk_x": st.integers(3, 30),
    "work_scale": st.sampled_from([1, 200, 2000, 20000]),  # one tile ... dozens of tiles
})


def _make(spec):
    rng = np.random.default_rng(spec["seed"])
    t, y, x = spec["t"], spec["y"], spec["x"]
    yy, xx = np.mgrid[:y, :x]
    time = np.arange(t)[:, None, None] * DT
    frames = np.full((t, y, x), 100.0) + rng.normal(0, 2.0, (t, y, x))
    tissue = np.zeros((y, x), bool)
    for fy, fx, radius, rate in spec["discs"]:
        inside = (yy - fy * (y - 1)) ** 2 + (xx - fx * (x - 1)) ** 2 <= radius ** 2
        tissue |= inside
        frames += 25.0 * np.sin(2 * np.pi * rate / 60.0 * time + rng.uniform(0, 6)) * inside[None]
    if spec["dtype"] == "uint8":
        frames = np.clip(np.rint(frames), 0, 255).astype(np.uint8)
    elif spec["dtype"] == "uint16":
        frames = np.clip(np.rint(frames * 10), 0, 65535).astype(np.uint16)
    else:
        frames = frames.astype(np.float32)
    return frames, tissue


def _analyze(frames, chunks, work_scale):
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(tiles, "WORK_BYTES_PER_SAMPLE", 14 * work_scale)
        stack = tempofield.open_stack(da.from_array(frames, chunks=chunks), frame_interval_s=DT)
        return tempofield.analyze(stack, BAND, memory_budget_mb=16)


@settings(max_examples=12, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(spec=scene, lay=layout)
def test_any_tiling_gives_the_same_maps_and_nothing_off_the_tissue(spec, lay):
    frames, tissue = _make(spec)
    t, y, x = frames.shape
    chunks = (lay["chunk_t"] or t, lay["chunk_y"], lay["chunk_x"])
    try:
        tiled = _analyze(frames, chunks, lay["work_scale"])
    except InputError:
        return  # a clear refusal is allowed (it must then be the same for one tile)
    whole = _analyze(frames, (t, y, x), 1)
    assert whole.parameters["tile_shape_px"] == [y, x] or whole.parameters["tile_shape_px"][0] <= y
    for key in ("rate_bpm", "period_s", "amplitude", "periodicity"):
        np.testing.assert_array_equal(getattr(tiled, key), getattr(whole, key), err_msg=key)
    np.testing.assert_array_equal(tiled.regions, whole.regions)
    assert set(tiled.references) == set(whole.references)
    # nothing labelled away from the tissue (the 3 x 3 pooling may reach one pixel beyond it)
    near = ndimage.binary_dilation(tissue, iterations=2)
    assert not np.any(tiled.regions[~near] > 0)
    assert not np.any(np.isfinite(tiled.rate_bpm[~near]) & (tiled.regions[~near] > 0))


@settings(max_examples=10, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(spec=scene, work_scale=st.sampled_from([200, 20000]))
def test_only_input_errors_escape(spec, work_scale):
    """Scenes at the edge of what can be measured (few frames, odd sizes, flat uint8) end in a
    result or an InputError that says why, never another exception."""
    frames, _ = _make(spec)
    frames = frames[: max(8, spec["t"] // 3)]  # often too short for the band: must be refused cleanly
    try:
        _analyze(frames, (frames.shape[0], 7, 9), work_scale)
    except InputError as exc:
        assert str(exc)
