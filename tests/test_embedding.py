"""Tests of tempofield.kernels.embedding: Gram-based sliding-window geometry.

External references: explicit embedding + scipy.spatial.distance.cdist, scikit-learn
PCA, Perea & Harer 2015, Found. Comput. Math. 15:799-838 (best window) and Takens
1981, Lecture Notes in Math. 898:366-381 (dimension needed).
"""

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from sklearn.decomposition import PCA

from tempofield.errors import InputError
from tempofield.kernels.embedding import (
    WindowChoice,
    motion_modes,
    sliding_window_points,
    sliding_window_sqdist,
    window_for_period,
    window_pca,
)


def _video(T=70, P=12, seed=0):
    """Video-like (T, P) data: a lagged beat per pixel, a bright offset, and noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(T)
    lags = rng.uniform(0, 2 * np.pi, P)
    beat = np.cos(2 * np.pi * t[:, None] / 9.3 - lags[None, :]) ** 2
    return 5.0 + 2.0 * beat + 0.3 * rng.normal(size=(T, P))


@pytest.mark.parametrize("center,normalize", [(False, False), (True, False), (False, True), (True, True)])
@pytest.mark.parametrize("dim,tau", [(2, 1), (5, 3), (8, 2), (11, 1)])
def test_sqdist_equals_explicit_embedding_cdist(center, normalize, dim, tau):
    # Reference: explicit embedding + scipy cdist 'sqeuclidean', equal to 1e-6 relative.
    X = _video()
    got = sliding_window_sqdist(X @ X.T, dim=dim, tau=tau, center=center, normalize=normalize)
    W = sliding_window_points(X, dim=dim, tau=tau, center=center, normalize=normalize)
    want = cdist(W, W, "sqeuclidean")
    assert got.shape == (X.shape[0] - (dim - 1) * tau,) * 2
    assert got.dtype == np.float64
    np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-9 * want.max())
    assert np.all(got >= 0) and np.array_equal(got, got.T)


def test_explicit_points_layout_and_pointwise_centring():
    X = np.arange(12.0).reshape(6, 2)
    W = sliding_window_points(X, dim=3, tau=2, center=False, normalize=False)
    np.testing.assert_array_equal(W[0], [0, 1, 4, 5, 8, 9])
    Wc = sliding_window_points(X, dim=3, tau=2, center=True, normalize=False)
    # Each pixel's mean over the window's frames is removed (P = 1 case: window mean).
    np.testing.assert_allclose(Wc.reshape(-1, 3, 2).mean(axis=1), 0.0, atol=1e-12)


def test_zero_norm_window_is_at_distance_sqrt2():
    # A bright constant stretch: its centred windows are zero up to rounding of G.
    x = 1000.0 + np.r_[np.zeros(10), np.cos(np.arange(20))][:, None]
    d2 = sliding_window_sqdist(x @ x.T, dim=4, tau=1)
    assert d2[0, 0] == 0.0
    np.testing.assert_allclose(d2[0, 15], 2.0)  # constant window: cos = 0 by convention
    W = sliding_window_points(x, dim=4, tau=1)
    np.testing.assert_allclose(d2[10:, 10:], cdist(W[10:], W[10:], "sqeuclidean"), atol=1e-6)


@pytest.mark.parametrize("period", [21.0, 30.0, 42.0, 63.5, 100.0, 250.0])
def test_window_for_period_hits_best_window(period):
    # Perea & Harer 2015, Found. Comput. Math. 15:799-838 (formula from memory): best window
    # M*tau = period * M / (M + 1).
    dim, tau, window = window_for_period(period)
    m = dim - 1
    assert 3 <= dim <= 21 and tau >= 1 and window == m * tau
    assert abs(m * tau - period * m / (m + 1)) <= 0.05 * period * m / (m + 1)
    assert m >= 10  # enough frames per period for 10-20 delays


def test_window_for_period_short_periods_and_fixed_dim():
    assert window_for_period(3.0) == WindowChoice(3, 1, 2)
    assert window_for_period(4.0) == WindowChoice(4, 1, 3)
    assert window_for_period(2.5).dim == 3  # nothing fits well: best available, dim >= 3
    assert window_for_period(60.0, dim=11) == WindowChoice(11, 5, 50)


def test_window_pca_matches_sklearn():
    # Reference: scikit-learn PCA on the explicit, pointwise-centred windows.
    X = _video(T=60, P=7, seed=3)
    got = window_pca(X @ X.T, dim=6, tau=2, n_components=5)
    W = sliding_window_points(X, dim=6, tau=2, center=True, normalize=False)
    want = PCA(n_components=5).fit(W).explained_variance_ratio_
    np.testing.assert_allclose(got, want, rtol=1e-8, atol=1e-12)
    got_n = window_pca(X @ X.T, dim=6, tau=2, normalize=True, n_components=3)
    Wn = sliding_window_points(X, dim=6, tau=2, center=True, normalize=True)
    np.testing.assert_allclose(got_n, PCA(n_components=3).fit(Wn).explained_variance_ratio_, rtol=1e-8)


def test_window_pca_dimension_needed():
    # Takens 1981, Lecture Notes in Math. 898:366-381; Perea & Harer 2015, Found. Comput.
    # Math. 15:799-838: one sinusoid -> 2 components hold
    # all the variance; cos t + cos 3t (two components) needs 4.
    t = 2 * np.pi * np.arange(400) / 40
    pattern = np.array([1.0, 0.4, -0.7])
    one = np.outer(np.cos(t), pattern)
    two = np.outer(np.cos(t) + np.cos(3 * t), pattern)
    r1 = window_pca(one @ one.T, dim=21, tau=2)
    r2 = window_pca(two @ two.T, dim=21, tau=2)
    assert r1[:2].sum() >= 0.999
    assert r2[:3].sum() < 0.999 and r2[:4].sum() >= 0.999


def test_motion_modes_match_sklearn_components():
    # Reference: scikit-learn PCA components (up to sign) of the explicit windows.
    X = _video(T=80, P=6, seed=5)
    modes = motion_modes(X, X @ X.T, dim=5, tau=2, n_modes=3)
    W = sliding_window_points(X, dim=5, tau=2, center=True, normalize=False)
    comps = PCA(n_components=3).fit(W).components_.reshape(3, 5, 6)
    assert modes.shape == (3, 5, 6)
    for m in range(3):
        sign = np.sign(np.sum(modes[m] * comps[m]))
        np.testing.assert_allclose(modes[m], sign * comps[m], atol=1e-8)


BAD = [
    (sliding_window_sqdist, (np.ones((4, 5)),), dict(dim=2, tau=1), r"gram must be a square"),
    (sliding_window_sqdist, (np.full((5, 5), np.nan),), dict(dim=2, tau=1), r"NaN"),
    (sliding_window_sqdist, (np.eye(10),), dict(dim=1, tau=1), r"dim must be an integer >= 2, got 1"),
    (sliding_window_sqdist, (np.eye(10),), dict(dim=3, tau=0), r"tau must be an integer >= 1, got 0"),
    (sliding_window_sqdist, (np.eye(10),), dict(dim=3, tau=1.5), r"tau must be an integer"),
    (sliding_window_sqdist, (np.eye(10),), dict(dim=6, tau=2), r"recording has only T=10"),
    (sliding_window_points, (np.ones((4, 3, 2)),), dict(dim=2, tau=1), r"X must be a \(T, P\)"),
    (window_for_period, (2.0,), {}, r"period_frames must be .* above 2, got 2.0"),
    (window_for_period, ("fast",), {}, r"period_frames must be"),
    (window_for_period, (30.0,), dict(max_dim=2), r"max_dim must be an integer >= 3"),
    (window_pca, (np.eye(20),), dict(dim=3, tau=1, n_components=50), r"n_components=50 exceeds"),
    (window_pca, (np.ones((20, 20)),), dict(dim=3, tau=1), r"no variance"),
    (motion_modes, (np.ones((10, 3)), np.eye(9)), dict(dim=2, tau=1), r"gram has 9 frames but X has 10"),
]


@pytest.mark.parametrize("func,args,kwargs,match", BAD)
def test_bad_inputs(func, args, kwargs, match):
    with pytest.raises(InputError, match=match):
        func(*args, **kwargs)
    with pytest.raises(ValueError):  # InputError is a ValueError too
        func(*args, **kwargs)
