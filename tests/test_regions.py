"""Regions and propagation on synthetic scenes whose truth is set by construction (scenes.synthetic).

The project's accuracy targets checked here: each rhythm found as its own region,
conduction velocity within 5 % and direction within 5 degrees (velocity from the
activation-time or phase gradient: Bayly et al. 1998, IEEE Trans. Biomed. Eng.
45:563-571), and no region on pure noise.
"""

from __future__ import annotations

import numpy as np
import pytest

import tempofield
from tempofield.kernels import propagation, regions
from tempofield.scenes import synthetic


@pytest.fixture(scope="module")
def two_clusters():
    s = synthetic.well_scene((300, 96, 96), frame_interval_s=0.04, pixel_size_um=4.0, speed_um_s=1500.0,
                             pacemaker=(30.0, 28.0), cluster_center=(70.0, 70.0), cluster_radius_px=11.0, rng=3)
    res = tempofield.analyze(tempofield.open_stack(s.frames, frame_interval_s=0.04, pixel_size_um=4.0), (20, 150))
    return s, res


def test_two_rhythms_two_regions(two_clusters):
    s, res = two_clusters
    assert res.regions.max() == 2
    table = res.region_table.set_index("region")
    for label in (1, 2):
        truth = s.truth["regions"] == label
        found = res.regions == np.bincount(res.regions[truth]).argmax()
        iou = (truth & found).sum() / (truth | found).sum()
        assert iou >= 0.85, (label, iou)
        assert table.loc[label, "rate_median_bpm"] == pytest.approx(s.truth["rate_by_region_bpm"][label], abs=0.5)
        oy, ox = table.loc[label, ["origin_y_px", "origin_x_px"]]
        ty, tx = s.truth["origins"][label]
        assert np.hypot(oy - ty, ox - tx) <= 3.0, (label, oy, ox)


def test_region_table_units_in_column_names(two_clusters):
    _, res = two_clusters
    cols = res.region_table.columns
    for c in ("area_px", "area_um2", "rate_median_bpm", "rate_iqr_bpm", "conduction_velocity_um_s",
              "wave_direction_deg", "beat_interval_mean_s"):
        assert c in cols
    row = res.region_table.iloc[0]
    assert row.area_um2 == pytest.approx(row.area_px * 16.0)
    assert row.beats >= 10 and row.loop_score > 0.5 and not row.quasi_periodic


@pytest.mark.parametrize("seed", [1, 2])
def test_plane_wave_speed_and_direction_by_both_routes(seed):
    """Bayly et al. 1998: speed = 1/|grad T| (activation time) and omega/|grad phi| (phase): both within
    5 % of the true speed and 5 degrees of the true direction."""
    s = synthetic.plane_wave_scene((300, 48, 48), frame_interval_s=0.02, pixel_size_um=5.0, rate_bpm=90.0,
                                   speed_um_s=6000.0, direction_deg=30.0, noise_sd=10.0, rng=seed)
    res = tempofield.analyze(tempofield.open_stack(s.frames, frame_interval_s=0.02, pixel_size_um=5.0), (40, 200))
    row = res.region_table.iloc[0]
    assert row.conduction_velocity_um_s == pytest.approx(6000.0, rel=0.05)
    assert row.wave_direction_deg == pytest.approx(30.0, abs=5)
    mask = res.regions == 1
    period = res.references[1].beat_intervals_s.mean()
    act = propagation.unwrap_delay(res.delay_s, mask, period)
    sp_t, dir_t, _ = propagation.velocity_from_activation(act, mask, 5.0)
    sp_p, dir_p, _ = propagation.velocity_from_phase(res.phase_rad, mask, 2 * np.pi / period, 5.0)
    for sp, dr in ((sp_t, dir_t), (sp_p, dir_p)):
        assert np.nanmedian(sp) == pytest.approx(6000.0, rel=0.05)
        assert np.nanmedian(dr) == pytest.approx(30.0, abs=5)
    v = res.extra_maps["velocity_x_um_s"], res.extra_maps["velocity_y_um_s"]
    assert np.degrees(np.arctan2(np.nanmedian(v[1]), np.nanmedian(v[0]))) == pytest.approx(30.0, abs=5)


def test_pure_noise_with_bleaching_and_debris_has_no_region():
    s = synthetic.noise_scene((300, 64, 64), debris=8, rng=9)
    res = tempofield.analyze(tempofield.open_stack(s.frames, frame_interval_s=s.frame_interval_s), (20, 150))
    assert (res.regions > 0).mean() <= 0.01
    assert len(res.region_table) == res.regions.max()


def test_segment_splits_touching_rhythms_and_drops_specks():
    rate = np.full((20, 30), np.nan)
    rate[2:18, 2:14] = 60.0
    rate[2:18, 14:28] = 75.0  # touching, but a different rhythm
    rate[0, 29] = 60.0        # a one-pixel speck
    lab = regions.segment(rate, np.isfinite(rate), bin_bpm=2.0, min_area_px=10)
    assert lab.max() == 2 and lab[0, 29] == 0
    assert lab[10, 5] != lab[10, 20]


def test_unwrap_and_local_gradient_on_a_known_field():
    yy, xx = np.mgrid[0:40, 0:50].astype(float)
    act = 0.01 * np.hypot(yy - 5, xx - 7)  # point source, 100 px/s
    period = 0.15
    mask = np.ones_like(act, bool)
    back = propagation.unwrap_delay(np.mod(act, period), mask, period, start=(5, 7))
    np.testing.assert_allclose(back, act, atol=1e-9)
    fit = propagation.fit_region(act, mask)
    assert fit["model"] == "point"
    assert fit["speed_um_s"] == pytest.approx(100.0, rel=1e-3)
    assert np.hypot(fit["origin_yx"][0] - 5, fit["origin_yx"][1] - 7) < 0.1


def test_a_rhythm_nested_inside_another_keeps_its_own_region():
    rate = np.full((30, 30), 60.0)
    rate[10:20, 10:20] = 90.0  # a pacemaker island beating faster
    lab = regions.segment(rate, np.isfinite(rate), bin_bpm=2.0, min_area_px=10)
    assert lab.max() == 2
    assert len(np.unique(lab[10:20, 10:20])) == 1 and lab[15, 15] != lab[0, 0]


def test_relabel_drops_small_regions_and_closes_gaps():
    lab = np.zeros((10, 10), np.int32)
    lab[:5] = 3
    lab[6:, :2] = 1   # 8 px
    lab[9, 9] = 2     # 1 px
    out = regions.relabel(lab, 5)
    assert sorted(np.unique(out).tolist()) == [0, 1, 2]
    assert (out[:5] == 1).all() and (out[6:, :2] == 2).all() and out[9, 9] == 0


def test_line_of_pixels_gives_the_right_direction():
    """A wave along a one-pixel-wide line: the plane fit must not invent a gradient across it."""
    yy = np.arange(40.0)
    act = np.full((40, 40), np.nan)
    mask = np.zeros((40, 40), bool)
    mask[:, 20] = True
    act[:, 20] = yy / 245.0
    fit = propagation.fit_region(act, mask)
    assert fit["direction_deg"] == pytest.approx(90.0, abs=0.5)
    assert fit["speed_um_s"] == pytest.approx(245.0, rel=1e-3)


def test_large_regions_unwrap_on_blocks_like_every_pixel():
    """A region above COARSE_UNWRAP_MIN_PX is unwrapped block-first; the result must equal
    scikit-image's per-pixel unwrapping (the reference algorithm) and the truth up to a constant."""
    rng = np.random.default_rng(3)
    yy, xx = np.mgrid[0:320, 0:300].astype(float)
    period = 0.5
    truth = np.hypot(yy - 40, xx - 250) * 0.004  # a point source: about 3 periods across the field
    mask = np.hypot(yy - 160, xx - 150) < 150
    mask[150:170, 20:120] = False  # a notch the path must go around
    assert mask.sum() > propagation.COARSE_UNWRAP_MIN_PX
    wrapped = np.mod(truth + rng.normal(0, 0.01, truth.shape), period)
    coarse = propagation.unwrap_delay(wrapped, mask, period)
    from skimage.restoration import unwrap_phase

    fine = unwrap_phase(np.ma.array(2 * np.pi * wrapped / period, mask=~mask)).filled(np.nan) * period / (2 * np.pi)
    offset = np.nanmedian((coarse - fine)[mask])
    np.testing.assert_allclose(coarse[mask], fine[mask] + offset, atol=1e-9)
    shift = np.nanmedian((coarse - truth)[mask])
    assert np.nanmax(np.abs(coarse - truth - shift)[mask]) < 0.05
    assert np.all(np.isnan(coarse[~mask]))


@pytest.mark.parametrize("case", ["one-pixel neck", "steep wave"])
def test_block_unwrapping_steps_aside_where_it_would_be_wrong(case):
    """Where blocks cannot stand for their pixels, every pixel is unwrapped (scikit-image, the reference)."""
    from skimage.restoration import unwrap_phase

    yy, xx = np.mgrid[0:300, 0:520].astype(float)
    period = 1.0
    if case == "one-pixel neck":  # two discs joined by a channel one pixel wide
        mask = (np.hypot(yy - 150, xx - 120) < 118) | (np.hypot(yy - 150, xx - 400) < 118)
        mask[150, 230:300] = True
        truth = xx * 0.01
    else:  # about 0.9 rad per pixel: blocks of 4 pixels span more than half a period
        mask = np.ones_like(yy, bool)
        truth = xx * 0.14
    assert mask.sum() > propagation.COARSE_UNWRAP_MIN_PX
    wrapped = np.mod(truth, period)
    got = propagation.unwrap_delay(wrapped, mask, period, start=(150, 10))
    fine = unwrap_phase(np.ma.array(2 * np.pi * wrapped, mask=~mask)).filled(np.nan) / (2 * np.pi)
    fine += wrapped[150, 10] - fine[150, 10]
    np.testing.assert_allclose(got[mask], fine[mask], atol=1e-9)


def _components_by_scipy(rate, ok, tol):
    """The reference: the same neighbour rule as a sparse graph, scipy's connected_components."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    h, w = ok.shape
    idx = np.arange(h * w).reshape(h, w)
    rows, cols = [], []
    for a, b in ((np.s_[:, :-1], np.s_[:, 1:]), (np.s_[:-1, :], np.s_[1:, :])):
        keep = ok[a] & ok[b] & (np.abs(rate[a] - rate[b]) <= np.minimum(tol[a], tol[b]))
        rows.append(idx[a][keep])
        cols.append(idx[b][keep])
    graph = coo_matrix((np.ones(sum(r.size for r in rows), np.int8), (np.concatenate(rows), np.concatenate(cols))),
                       shape=(h * w, h * w))
    _, comp = connected_components(graph, directed=False)
    return np.where(ok, comp.reshape(h, w), -1)


def test_rate_components_equal_scipy_connected_components(rng):
    from tempofield.kernels import _regions_loops

    rate = np.round(rng.uniform(60, 66, (90, 120)), 0)  # plateaus of equal rate that touch and split
    rate[20:50, 30:90] = 90.0
    ok = rng.random((90, 120)) < 0.8
    tol = regions.rate_tolerance_bpm(np.where(ok, rate, 0.0), 1.0)
    got = np.empty(ok.shape, np.int64)
    _regions_loops.rate_components(rate, ok, tol, got)
    want = _components_by_scipy(rate, ok, tol)
    # Same partition, same order (by each component's first pixel); scipy also numbers the
    # pixels left out, so compare ranks.
    np.testing.assert_array_equal(got[~ok], -1)
    np.testing.assert_array_equal(got[ok], np.unique(want[ok], return_inverse=True)[1].ravel())
    assert got.max() > 50


def _plane_gradient_by_uniform_filters(field, mask, radius=3, min_points=6):
    """The local plane fit written with scipy's box filters (the definition the compiled loop follows)."""
    import scipy.ndimage as ndi

    f = np.asarray(field, float)
    m = np.asarray(mask, bool) & np.isfinite(f)
    yy, xx = np.mgrid[0:f.shape[0], 0:f.shape[1]].astype(float)
    size = 2 * radius + 1
    w = m.astype(float)
    fz = np.where(m, f, 0.0)

    def box(a):
        return ndi.uniform_filter(a, size=size, mode="constant") * size * size

    n = box(w)
    with np.errstate(invalid="ignore", divide="ignore"):
        my, mx = box(w * yy) / n, box(w * xx) / n
        syy = box(w * yy * yy) - n * my * my
        sxx = box(w * xx * xx) - n * mx * mx
        sxy = box(w * xx * yy) - n * mx * my
        sf = box(fz)
        sfy, sfx = box(fz * yy) - my * sf, box(fz * xx) - mx * sf
        det = syy * sxx - sxy ** 2
        gy, gx = (sxx * sfy - sxy * sfx) / det, (syy * sfx - sxy * sfy) / det
    bad = ~m | (n < min_points - 1e-9) | ~(np.abs(det) > 1e-9)
    gy[bad] = np.nan
    gx[bad] = np.nan
    return gy, gx


def test_local_gradient_equals_the_box_filter_formulation(rng):
    """Compiled box sums against scipy's uniform filters: a curved field with noise, holes, a ragged
    mask, a one-pixel-wide line (no plane: NaN) and NaN values inside the mask."""
    yy, xx = np.mgrid[0:90, 0:70].astype(float)
    act = 1e-3 * np.hypot(yy - 20, xx - 50) + 1e-5 * rng.normal(size=yy.shape)
    mask = (np.hypot(yy - 45, xx - 35) < 40) & (rng.random(yy.shape) > 0.1)
    mask[:, 3] = False
    mask[80:, 3] = True  # an isolated vertical line of pixels
    act[mask & (rng.random(yy.shape) < 0.02)] = np.nan
    for radius, min_points in ((3, 6), (1, 4)):
        got = propagation.local_gradient(act, mask, radius, min_points)
        want = _plane_gradient_by_uniform_filters(act, mask, radius, min_points)
        for g, w in zip(got, want):
            np.testing.assert_array_equal(np.isnan(g), np.isnan(w))
            np.testing.assert_allclose(g[~np.isnan(g)], w[~np.isnan(w)], rtol=1e-7, atol=1e-12)
