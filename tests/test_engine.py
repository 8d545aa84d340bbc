"""The engine: lazy tiled passes equal the eager kernels on awkward chunks, progress, cancel, memory plan."""

from __future__ import annotations

import dask.array as da
import numpy as np
import pytest
import zarr

import tempofield
from tempofield.engine import kept, processes, run, stages, tile_kernels, tiles
from tempofield.errors import CancelledError, InputError
from tempofield.kernels import _preprocess_loops, preprocess, spectral


def _eager_maps(frames, dt, rate_range, radius):
    """The kernels applied to the whole stack at once in numpy: the reference for the lazy engine."""
    t, y, x = frames.shape
    padded = np.pad(frames.astype(np.float32), ((0, 0), (radius, radius), (radius, radius)), mode="edge")
    pooled = preprocess.box_pool(padded, radius).reshape(t, y * x)
    opts = tempofield.engine.options.defaults()
    basis = preprocess.trend_basis(t, dt, opts["trend_cutoff_fraction"] * rate_range[0] / 60)
    plan = spectral.plan_spectrum(t, dt, rate_range, false_alarm=opts["false_alarm"])
    out = spectral.spectral_maps(pooled, plan, trend_basis=basis)
    return {k: v.reshape(y, x) for k, v in out.items()}


@pytest.mark.parametrize("chunks", [(240, 5, 7), (240, 3, 11), (60, 48, 48), (240, 48, 48)])
def test_lazy_equals_eager_on_awkward_chunks(well, chunks):
    frames = well.frames
    eager = _eager_maps(frames, well.frame_interval_s, (20, 150), 1)
    stack = tempofield.open_stack(da.from_array(frames, chunks=chunks), frame_interval_s=well.frame_interval_s)
    # the spectral maps alone (reference-locked detection may add pixels the spectral search did not find)
    res = tempofield.analyze(stack, (20, 150), memory_budget_mb=16, locked_detection=False)
    for key in ("rate_bpm", "period_s", "amplitude", "periodicity"):
        got = getattr(res, key)
        np.testing.assert_array_equal(np.isnan(got), np.isnan(eager[key]), err_msg=key)
        np.testing.assert_allclose(got, eager[key], rtol=2e-5, atol=1e-6, equal_nan=True, err_msg=key)


def test_same_numbers_for_any_chunking_and_tile_size(well):
    results = []
    for chunks, budget in [((240, 48, 48), 512), ((240, 7, 5), 16), ((17, 48, 48), 40)]:
        st = tempofield.open_stack(da.from_array(well.frames, chunks=chunks), frame_interval_s=0.04)
        results.append(tempofield.analyze(st, (20, 150), memory_budget_mb=budget))
    for r in results[1:]:
        # the per-pixel maps are the same to the last bit (each trace's arithmetic is its own)
        for key in ("rate_bpm", "period_s", "amplitude", "periodicity"):
            np.testing.assert_array_equal(getattr(r, key), getattr(results[0], key))
        # the phase stage also uses the Gram bins, which tiles sum in their own order: rounding only
        # the phase stage (from the kept spectra) does not depend on the tiles either
        assert r.parameters["phase_source"].startswith("kept spectra")
        np.testing.assert_array_equal(np.isnan(r.phase_rad), np.isnan(results[0].phase_rad))
        ok = np.isfinite(r.phase_rad)
        assert np.abs(np.angle(np.exp(1j * (r.phase_rad[ok] - results[0].phase_rad[ok])))).max() < 1e-4
        np.testing.assert_allclose(r.coherence, results[0].coherence, atol=1e-5)


def test_tile_plan_follows_the_memory_budget():
    shape, chunks = (1000, 1024, 1024), ((1000,), (128,) * 8, (128,) * 8)
    small = tiles.plan_tiles(shape, chunks, memory_budget_mb=64, halo=1, n_parallel=2)
    large = tiles.plan_tiles(shape, chunks, memory_budget_mb=2048, halo=1, n_parallel=2)
    for plan, budget in ((small, 64), (large, 2048)):
        ty, tx = plan.tile_shape
        assert ty * tx * 1000 * tiles.WORK_BYTES_PER_SAMPLE <= 2 * budget * 2**20 / 2
    assert small.n_tiles > large.n_tiles
    assert large.aligned and large.tile_shape[0] % 128 == 0  # whole chunks, no chunk read twice


def test_streams_from_zarr_with_many_tiles(tmp_path, well):
    """A Zarr store analysed in many small tiles (budget far below the stack) gives the in-memory numbers."""
    frames = np.tile(well.frames, (1, 2, 2))  # 96 x 96: several tiles at the smallest budget
    p = tmp_path / "s.zarr"
    z = zarr.create_array(str(p), shape=frames.shape, chunks=(240, 16, 16), dtype=frames.dtype)
    z[:] = frames
    z.attrs["frame_interval_s"] = well.frame_interval_s
    ticks = []
    res = tempofield.analyze(tempofield.open_stack(p), (20, 150), progress=lambda d, n, s: ticks.append((d, n, s)),
                           memory_budget_mb=16)
    ref = tempofield.analyze(tempofield.open_stack(frames, frame_interval_s=0.04), (20, 150))
    np.testing.assert_allclose(res.rate_bpm, ref.rate_bpm, rtol=2e-5, equal_nan=True)
    dones = [d for d, n, s in ticks if s == "maps"]
    assert dones == sorted(dones) and dones[-1] == ticks[0][1] > 1
    assert ticks[-1][2] == "done"


def test_cancel_stops_the_run(well):
    calls = []

    def cancel():
        calls.append(1)
        return len(calls) >= 2

    st = tempofield.open_stack(da.from_array(well.frames, chunks=(240, 8, 8)), frame_interval_s=0.04)
    with pytest.raises(CancelledError):
        tempofield.analyze(st, (20, 150), cancel=cancel, memory_budget_mb=16, pooling_radius_px=0)


def test_generator_yields_progress_and_returns_the_result(well):
    st = tempofield.open_stack(well.frames, frame_interval_s=0.04)
    gen = run.iter_analyze(st, (20, 150))
    ticks = []
    try:
        while True:
            ticks.append(next(gen))
    except StopIteration as stop:
        result = stop.value
    assert isinstance(result, tempofield.RhythmResult)
    assert ticks[0].done == 0 and ticks[-1].stage == "done"


def test_maps_are_at_input_size_and_units(well):
    res = tempofield.analyze(tempofield.open_stack(well.frames, frame_interval_s=0.04, pixel_size_um=4.0), (20, 150))
    assert res.rate_bpm.shape == well.frames.shape[1:]
    assert res.rate_bpm.dtype == np.float32
    np.testing.assert_allclose(res.period_s, 60 / res.rate_bpm, rtol=1e-5, equal_nan=True)


@pytest.mark.parametrize("err, kwargs, match", [
    (InputError, {"rate_range_bpm": (150, 20)}, "low < high"),
    (InputError, {"rate_range_bpm": "fast"}, "two numbers"),
    (InputError, {"rate_range_bpm": (20, 900)}, "Nyquist"),
    (InputError, {"rate_range_bpm": (20, 150), "pooling_radius_px": 99}, "pooling_radius_px"),
    (InputError, {"rate_range_bpm": (20, 150), "no_such_option": 1}, "unknown option"),
    (InputError, {"rate_range_bpm": (20, 150), "false_alarm": 2}, "false_alarm"),
])
def test_bad_arguments(well, err, kwargs, match):
    st = tempofield.open_stack(well.frames, frame_interval_s=0.04)
    with pytest.raises(err, match=match):
        tempofield.analyze(st, **kwargs)


@pytest.mark.parametrize("frames, kwargs, match", [
    (np.zeros((16, 16)), {}, "single image"),
    (np.zeros((1, 16, 16)), {}, "1 frame"),
    (np.zeros((5, 16, 16)), {}, "at least 8 frames"),
    (np.full((200, 16, 16), 7.0), {}, "constant"),
])
def test_bad_stacks(frames, kwargs, match):
    with pytest.raises(InputError, match=match):
        tempofield.analyze(tempofield.open_stack(frames, frame_interval_s=0.05, **kwargs), (30, 180))


def test_nan_frames_are_a_clear_error(well):
    frames = well.frames.astype(np.float32)
    frames[17, 3:5, 3:5] = np.nan
    frames[40] = np.inf
    with pytest.raises(InputError, match=r"NaN or infinite values \(frames \[(17, )?40\]"):
        tempofield.analyze(tempofield.open_stack(frames, frame_interval_s=0.04), (20, 150), pooling_radius_px=0)


def test_tile_plan_gives_every_worker_a_tile():
    shape, chunks = (600, 256, 256), ((600,), (256,), (256,))
    plan = tiles.plan_tiles(shape, chunks, memory_budget_mb=4096, halo=1, n_parallel=1, min_tiles=8)
    assert plan.n_tiles >= 8


def test_phase_kernel_pools_projections_exactly_like_pooled_traces(rng):
    """Lock-in is linear: pooling the projected rows equals locking in the pooled traces."""
    from tempofield.kernels import phase as phase_mod

    t = np.arange(300) * 0.05
    theta = 2 * np.pi * 1.1 * t
    block = (500 + 30 * np.cos(theta[:, None, None] - rng.uniform(0, 6, (1, 12, 14)))
             + rng.normal(0, 5, (300, 12, 14))).astype(np.float32)
    basis = phase_mod.lockin_basis(theta)
    labels = np.ones((10, 12), np.int32)
    out = tile_kernels.phase_tile_kernel(block, 0, 0, halo=1, labels=labels, lockin_bases={1: basis}, dominant=1)
    pooled = preprocess.box_pool(block, 1).reshape(300, -1)
    ph, coh, _ = phase_mod.lockin(pooled, basis)
    np.testing.assert_allclose(out["phase"].ravel(), ph, atol=2e-5)
    np.testing.assert_allclose(out["coherence"].ravel(), coh, atol=2e-5)


@pytest.mark.parametrize("n_frames", [300, 301])  # the compiled FFT's path (blocks across rows), scipy's
def test_tile_bins_hold_the_sums_of_the_detected_pooled_traces(rng, n_frames):
    """Pass 1's Gram bins: per global b x b bin, the sum of the detected pixels' pooled traces."""
    t = np.arange(n_frames) * 0.05
    tissue = np.zeros((1, 22, 26))
    tissue[:, 3:15, 2:13] = 1
    block = (600 + 40 * np.sin(2 * np.pi * 1.2 * t)[:, None, None] * tissue
             + rng.normal(0, 3, (n_frames, 22, 26))).astype(np.uint16)
    plan = spectral.plan_spectrum(n_frames, 0.05, (30, 180))
    q = preprocess.trend_basis(n_frames, 0.05, 0.25)
    y0, x0, b = 13, 6, 4
    out = tile_kernels.maps_tile_kernel(block, y0, x0, halo=1, plan=plan, basis=q, gram_bin=b)
    pooled = preprocess.box_pool(block, 1)
    detected = out["maps"][tile_kernels.PASS1_KEYS.index("detected")] > 0
    assert 0.2 < detected.mean() < 0.9
    expect = {}
    for yy, xx in zip(*np.nonzero(detected)):
        key = (((y0 + yy) // b) << 32) + (x0 + xx) // b
        expect[key] = expect.get(key, 0) + pooled[:, yy, xx].astype(np.float64)
    assert sorted(out["bins"].tolist()) == sorted(expect)
    for i, key in enumerate(out["bins"].tolist()):
        np.testing.assert_allclose(out["bin_sums"][:, i], expect[key], rtol=1e-5)
    assert out["bin_counts"].sum() == detected.sum()
    maps_only = tile_kernels.maps_tile_kernel(block, y0, x0, halo=1, plan=plan, basis=q, gram_bin=None)
    assert "bins" not in maps_only
    np.testing.assert_array_equal(maps_only["maps"], out["maps"])


def _pooled_rows(tile, r0, r1):
    """Box-pooled output rows r0:r1 of a PaddedTile, as (T, (r1 - r0) * tx) float32 traces, from the
    pieces the maps kernel hands the compiled loops (band_pieces, then the pooling loop itself)."""
    left, middle, right, y = tile.band_pieces(r0, r1)
    out = np.empty((tile.shape[0], r1 - r0, middle.shape[2]), np.float32)
    _preprocess_loops.box_pool_rows_split(left, middle, right, tile.halo, y, y + r1 - r0, out)
    return out.reshape(tile.shape[0], -1)


@pytest.mark.parametrize("h", [1, 2])  # the radius-1 loop and the general one
@pytest.mark.parametrize("dtype", [np.uint16, np.float32])
def test_pooling_from_pieces_equals_pooling_the_padded_tile(rng, dtype, h):
    """The kernels read a tile and its neighbours' strips where they lie; the numbers must be
    exactly those of pooling one padded array."""
    ty, tx = 9, 13
    padded = (rng.random((5, ty + 2 * h, tx + 2 * h)) * 1000).astype(dtype)
    rows = [slice(0, h), slice(h, h + ty), slice(h + ty, None)]
    cols = [slice(0, h), slice(h, h + tx), slice(h + tx, None)]
    pieces = tuple(tuple(padded[:, r, c] for c in cols) for r in rows)
    whole = tiles.PaddedTile(padded, h)
    split = tiles.PaddedTile(pieces, h)
    assert split.shape == whole.shape
    reference = preprocess.box_pool(padded, h)
    for r0, r1 in [(0, 4), (2, 6), (3, 7), (4, 9), (0, 9)]:  # reaching the top strip, inside, the bottom
        want = reference[:, r0:r1].reshape(5, -1)
        np.testing.assert_array_equal(_pooled_rows(split, r0, r1), want)
        np.testing.assert_array_equal(_pooled_rows(whole, r0, r1), want)


def test_a_short_last_tile_joins_the_one_before():
    assert tiles._split(10, 8, 3) == (10,)
    assert tiles._split(100, 33, 2) == (33, 33, 34)
    assert tiles._split(100, 33, 1) == (33, 33, 33, 1)
    assert tiles._split(96, 32, 5) == (32, 32, 32)


def test_gram_bins_gathered_over_tiles_and_labelled_by_majority(rng):
    """The vectorised gathering equals adding each bin's parts tile by tile (the plain loop)."""
    from tempofield.kernels import regions as regions_mod

    labels = rng.integers(0, 4, (37, 45)).astype(np.int32)
    labels[:8, :8] = 0  # a bin with no labelled pixel
    b = 4
    results = []
    for y0, ty in ((0, 20), (20, 17)):  # tile edges at 20 and 23 cut bins in two
        for x0, tx in ((0, 23), (23, 22)):
            r0, c0 = y0 // b, x0 // b
            r1, c1 = (y0 + ty - 1) // b, (x0 + tx - 1) // b
            ids = np.array([(by << 32) + bx for by in range(r0, r1 + 1) for bx in range(c0, c1 + 1)], np.int64)
            results.append({"bins": ids, "bin_sums": rng.normal(0, 1, (6, ids.size)).astype(np.float32),
                            "bin_counts": rng.integers(1, 9, ids.size)})
    traces, lab = tile_kernels.gather_bins(results, labels, b)
    sums, counts = {}, {}
    for r in results:
        for i, bid in enumerate(r["bins"].tolist()):
            sums[bid] = sums.get(bid, 0) + r["bin_sums"][:, i]
            counts[bid] = counts.get(bid, 0) + int(r["bin_counts"][i])
    ids = sorted(sums)
    np.testing.assert_array_equal(traces, np.stack([sums[k] / np.float32(counts[k]) for k in ids], axis=1))
    want = []
    for bid in ids:
        block = labels[(bid >> 32) * b:(bid >> 32) * b + b, (bid & 0xFFFFFFFF) * b:(bid & 0xFFFFFFFF) * b + b]
        vals = block[block > 0]
        want.append(np.bincount(vals).argmax() if vals.size else 0)
    np.testing.assert_array_equal(lab, want)
    assert lab[0] == 0 and len(set(want)) > 2
    np.testing.assert_array_equal(regions_mod.bin_labels(labels, np.array(ids), b), want)


def test_lockin_tile_routes_each_pixel_to_its_reference(rng):
    """Pixels of a region with a reference lock in against it; every other pixel against the
    dominant reference, for its coherence only (no phase). Checked pixel by pixel against
    :func:`tempofield.kernels.phase.lockin_from_projection` on each pixel's own column."""
    from tempofield.kernels import phase as phase_mod

    t, ty, tx = 200, 6, 7
    theta = {1: 2 * np.pi * 1.1 * np.arange(t) * 0.05, 2: 2 * np.pi * 1.7 * np.arange(t) * 0.05}
    bases = {k: phase_mod.lockin_basis(v) for k, v in theta.items()}
    lab = rng.choice([0, 1, 2, 3], ty * tx)  # 0: background, 3: a region without a reference
    traces = rng.normal(0, 1, (t, ty * tx)).astype(np.float32)
    proj = {k: (b @ traces).astype(np.float32) for k, b in bases.items()}
    for present in ([0, 1, 2, 3], [1], [0, 3]):
        sub = np.where(np.isin(lab, present), lab, present[0])
        out = tile_kernels._lockin_tile(0, 0, ty, tx, sub, sorted(set(sub.tolist())), proj, bases, dominant=1)
        for j, label in enumerate(sub):
            ref = label if label in bases else 1
            ph, coh, _ = phase_mod.lockin_from_projection(proj[ref][:, j:j + 1], bases[ref])
            assert out["coherence"].ravel()[j] == pytest.approx(coh[0], abs=1e-6)
            if label in bases:
                assert out["phase"].ravel()[j] == pytest.approx(ph[0], abs=1e-6)
            else:
                assert np.isnan(out["phase"].ravel()[j])


def _corner_patch_stack(shape, center, radius, rate_bpm, dt, rng):
    """Noise everywhere and one beating disc: most tiles of a small budget hold no rhythm."""
    t, y, x = shape
    yy, xx = np.mgrid[:y, :x]
    disc = ((yy - center[0]) ** 2 + (xx - center[1]) ** 2 <= radius ** 2).astype(np.float32)
    beat = 30.0 * np.sin(2 * np.pi * rate_bpm / 60.0 * np.arange(t) * dt).astype(np.float32)
    frames = 400.0 + beat[:, None, None] * disc[None] + rng.normal(0, 4.0, shape).astype(np.float32)
    return frames.astype(np.float32), disc > 0


@pytest.mark.parametrize("center", [(12, 12), (47, 80), (40, 40)])
def test_tiles_without_rhythm_are_no_problem(center):
    """Tissue in one corner, on a tile edge or in the middle, many tiles with no rhythmic pixel at
    all: the run completes, finds the patch at its rate, and equals the run in one tile."""
    rng = np.random.default_rng(21)
    frames, disc = _corner_patch_stack((480, 96, 96), center, 9, 75.0, 0.04, rng)
    runs = {}
    for budget, chunks in ((16, (480, 16, 16)), (512, (480, 96, 96))):
        st = tempofield.open_stack(da.from_array(frames, chunks=chunks), frame_interval_s=0.04)
        runs[budget] = tempofield.analyze(st, (30, 180), memory_budget_mb=budget)
    many, one = runs[16], runs[512]
    assert many.parameters["tile_shape_px"][0] * many.parameters["tile_shape_px"][1] < 96 * 96 / 8
    assert many.region_table.shape[0] == 1
    found = many.regions > 0
    # the 3 x 3 pooling may spread the edge by a pixel
    assert (found & disc).sum() >= 0.9 * disc.sum() and (found & ~disc).sum() <= 0.2 * disc.sum()
    assert abs(np.nanmedian(many.rate_bpm[found]) - 75.0) < 0.5
    assert len(many.references) == 1
    np.testing.assert_array_equal(many.rate_bpm, one.rate_bpm)
    np.testing.assert_array_equal(many.regions, one.regions)


def test_no_tissue_anywhere_in_many_tiles():
    rng = np.random.default_rng(5)
    frames = (300.0 + rng.normal(0, 5.0, (480, 64, 64))).astype(np.float32)
    st = tempofield.open_stack(da.from_array(frames, chunks=(480, 16, 16)), frame_interval_s=0.04)
    res = tempofield.analyze(st, (30, 180), memory_budget_mb=16)
    assert res.parameters["tile_shape_px"][0] < 64
    assert res.regions.max() == 0 and not res.references and res.region_table.shape[0] == 0


def test_gathering_skips_tiles_without_bins(rng):
    """A tile with no detected pixel contributes no bins and no columns (it used to raise IndexError)."""
    t = 12
    empty = {"bins": np.zeros(0, np.int64), "bin_sums": np.zeros((t, 0), np.float32),
             "bin_counts": np.zeros(0, np.int64)}
    full = {"bins": np.array([0, 1], np.int64), "bin_sums": rng.normal(size=(t, 2)).astype(np.float32),
            "bin_counts": np.array([2, 4])}
    labels = np.ones((4, 4), np.int32)
    for order in ([empty, full], [full, empty], [empty, full, empty]):
        traces, regions = tile_kernels.gather_bins([dict(r) for r in order], labels, 2)
        np.testing.assert_allclose(traces, full["bin_sums"] / full["bin_counts"].astype(np.float32))
        assert regions.tolist() == [1, 1]
    traces, regions = tile_kernels.gather_bins([dict(empty)], labels, 2)
    assert traces.shape[1] == 0 and regions.size == 0


def test_a_region_of_one_gram_bin():
    """A small patch that fits in one Gram bin (a coarse bin from a low pixel cap) still gets a
    reference from its single binned trace, or a warning that says why not; never an error."""
    rng = np.random.default_rng(8)
    frames, disc = _corner_patch_stack((480, 96, 96), (20, 20), 3.2, 75.0, 0.04, rng)
    st = tempofield.open_stack(da.from_array(frames, chunks=(480, 32, 32)), frame_interval_s=0.04)
    res = tempofield.analyze(st, (30, 180), memory_budget_mb=16, gram_max_pixels=100, min_area_px=9)
    assert res.parameters["gram_bin_px"] == 10
    assert res.region_table.shape[0] == 1
    if res.references:
        assert abs(res.references[1].rate_mean_bpm - 75.0) < 1.0
    else:
        assert any("reference" in w for w in res.parameters["warnings"])
