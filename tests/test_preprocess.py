"""Pooling, binning and detrending kernels."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.ndimage

from tempofield.kernels import preprocess


def test_box_pool_equals_scipy_uniform_filter_interior(rng):
    """Reference: scipy.ndimage.uniform_filter on the interior (the halo is the caller's padding)."""
    x = rng.standard_normal((5, 20, 23)).astype(np.float32)
    for r in (1, 2):
        ours = preprocess.box_pool(x, r)
        ref = scipy.ndimage.uniform_filter(x, size=(1, 2 * r + 1, 2 * r + 1))[:, r:-r, r:-r]
        np.testing.assert_allclose(ours, ref, rtol=1e-5, atol=1e-6)


def test_box_pool_does_not_depend_on_where_the_block_starts(rng):
    x = rng.standard_normal((4, 30, 30)).astype(np.float32)
    whole = preprocess.box_pool(x, 2)
    part = preprocess.box_pool(x[:, 7:20, 3:25], 2)
    np.testing.assert_array_equal(whole[:, 7:16, 3:21], part)


def test_bin_pixels_means(rng):
    x = rng.standard_normal((3, 9, 10))
    b = preprocess.bin_pixels(x, 3)
    assert b.shape == (3, 3, 3)
    assert b[1, 2, 1] == pytest.approx(x[1, 6:9, 3:6].mean(), rel=1e-5)


def test_detrend_removes_bleaching_keeps_the_beat():
    dt, n = 0.04, 500
    t = np.arange(n) * dt
    beat = 10 * np.sin(2 * np.pi * 1.0 * t)
    x = (1000 * np.exp(-t / 8) + beat)[:, None]
    q = preprocess.trend_basis(n, dt, cutoff_hz=0.25)
    np.testing.assert_allclose(q.T @ q, np.eye(q.shape[1]), atol=1e-5)
    y = preprocess.detrend(x, q)[:, 0]
    inner = slice(25, -25)  # the basis fits the very ends slightly less well
    # A bleaching curve 100 times the beat is gone to within 15 % of the beat,
    # and the beat loses at most 3 % of its amplitude to the trend components.
    assert np.abs(y[inner] - beat[inner]).max() < 1.5
    amp = 2 * abs(np.sum(y * np.exp(-2j * np.pi * 1.0 * t))) / n
    assert amp == pytest.approx(10, rel=0.03)


def test_uint16_becomes_float32():
    x = np.full((3, 4, 4), 65000, np.uint16)
    assert preprocess.box_pool(np.pad(x, ((0, 0), (1, 1), (1, 1)), mode="edge"), 1).dtype == np.float32
    assert preprocess.detrend(x.reshape(3, 16), preprocess.trend_basis(3, 1.0, 0.1)).dtype == np.float32


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.int16, np.float64])
def test_box_pool_of_any_number_type_equals_the_float_sum(rng, dtype):
    x = (rng.random((3, 11, 13)) * 200).astype(dtype)
    ref = scipy.ndimage.uniform_filter(x.astype(np.float64), size=(1, 3, 3))[:, 1:-1, 1:-1]
    np.testing.assert_allclose(preprocess.box_pool(x, 1), ref, rtol=1e-6, atol=1e-4)


def test_box_pool_rows_equal_the_rows_of_the_whole_pool(rng):
    """The engine pools a tile band by band; each band is exactly those rows of the whole pool."""
    x = rng.standard_normal((6, 20, 17)).astype(np.float32)
    whole = preprocess.box_pool(x, 2)
    for y0, y1 in [(0, 3), (3, 11), (11, 16)]:
        np.testing.assert_array_equal(preprocess.box_pool_rows(x, 2, y0, y1), whole[:, y0:y1])
