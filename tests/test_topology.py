"""Tests of tempofield.kernels.topology: landmarks, H1 persistence, scores, circular coordinates.

External references: gudhi's RipsComplex (an independent persistence library,
same distance matrix); Perea & Harer 2015, Found. Comput. Math. 15:799-838 and
Adamaszek & Adams 2017, Pacific J. Math. 290:1-40 (sqrt(3) death of a cosine's
windows); Perea & Harer 2015 (best window; formula from memory, numbers computed);
Gakhar & Perea, arXiv:2103.04540 (two loops of a quasi-periodic signal, numbers
computed); de Silva, Morozov & Vejdemo-Johansson 2011, Discrete Comput. Geom.
45:737-759 and Perea 2020, Abel Symposia 15:435-458 (circular coordinates).
"""

import dataclasses

import gudhi
import numpy as np
import pytest
from scipy.spatial.distance import cdist

from tempofield.errors import InputError
from tempofield.kernels.embedding import sliding_window_sqdist
from tempofield.kernels.topology import (
    MAX_LOOP_PERSISTENCE,
    _lifted_cocycle_matrix,
    circular_coordinates,
    greedy_landmarks,
    h1_persistence,
    is_quasiperiodic,
    loop_score,
    orient_with_time,
    second_loop_ratio,
)

SQRT3 = np.sqrt(3.0)
PHI = (1 + np.sqrt(5)) / 2


def _analytic_windows(f, t, dim, tau, center=True, normalize=True):
    """Sliding windows of a function of continuous time (tau need not be a whole frame)."""
    W = np.stack([f(t + k * tau) for k in range(dim)], axis=1)
    if center:
        W = W - W.mean(axis=1, keepdims=True)
    if normalize:
        W = W / np.linalg.norm(W, axis=1, keepdims=True)
    return W


def _persistences(diagram):
    return np.sort(diagram[:, 1] - diagram[:, 0])[::-1]


def _gudhi_h1(dist, max_edge):
    st = gudhi.RipsComplex(distance_matrix=dist, max_edge_length=max_edge).create_simplex_tree(
        max_dimension=2)
    st.compute_persistence()
    bars = np.array(st.persistence_intervals_in_dimension(1)).reshape(-1, 2)
    bars = bars[np.isfinite(bars[:, 1]) & (bars[:, 1] - bars[:, 0] > 1e-9)]
    return bars[np.lexsort((bars[:, 0], bars[:, 1]))]


def test_greedy_landmarks_is_max_min():
    rng = np.random.default_rng(0)
    pts = rng.normal(size=(80, 3))
    d = cdist(pts, pts)
    idx = greedy_landmarks(d, 10, start=4)
    assert idx[0] == 4 and len(set(idx)) == 10
    for m in range(1, 10):  # each pick is the farthest point from those before it
        assert np.isclose(d[:, idx[:m]].min(axis=1).max(), d[idx[m], idx[:m]].min())
    assert len(greedy_landmarks(d, 500)) == 80
    dup = cdist(np.r_[pts[:5], pts[:5]], np.r_[pts[:5], pts[:5]])
    assert len(greedy_landmarks(dup, 8)) == 5  # duplicates are never picked twice


@pytest.mark.parametrize("seed", [0, 1])
def test_h1_matches_gudhi(seed):
    # Reference: gudhi RipsComplex (an independent library) on the same distance matrix,
    # H1 finite bars to 1e-6. ripser computes in float32, hence 1e-6 not 1e-9.
    rng = np.random.default_rng(seed)
    a = rng.uniform(0, 2 * np.pi, 70)
    pts = np.c_[np.cos(a), np.sin(a), 0.3 * np.cos(2 * a)] + 0.15 * rng.normal(size=(70, 3))
    d = cdist(pts, pts)
    res = h1_persistence(d, n_landmarks=70)
    ours = res.diagram[np.lexsort((res.diagram[:, 0], res.diagram[:, 1]))]
    ours = ours[ours[:, 1] - ours[:, 0] > 1e-9]
    ref = _gudhi_h1(d, max_edge=d.max() + 1)
    assert ours.shape == ref.shape and len(ref) >= 2
    np.testing.assert_allclose(ours, ref, atol=1e-6)
    p = res.diagram[:, 1] - res.diagram[:, 0]
    assert np.all(np.diff(p) <= 0)  # sorted by persistence, descending


def test_pure_cosine_best_window_dies_at_sqrt3():
    # Perea & Harer 2015, Found. Comput. Math. 15:799-838; circle geometry: Adamaszek &
    # Adams 2017, Pacific J. Math. 290:1-40. Centred, unit-normalised
    # windows of a cosine at the best window lie on a round unit circle; with 3k
    # equally spaced samples per period the H1 class dies at sqrt(3).
    period, dim, tau = 300, 20, 15  # M = 19 delays, M*tau = 285 = period*M/(M+1)
    x = np.cos(2 * np.pi * np.arange(period + (dim - 1) * tau) / period)[:, None]
    d = np.sqrt(sliding_window_sqdist(x @ x.T, dim=dim, tau=tau))
    res = h1_persistence(d, n_landmarks=300)
    birth, death = res.diagram[0]
    assert abs(death - SQRT3) < 1e-6  # ripser works in float32
    assert (death - birth) >= 0.98 * SQRT3
    assert loop_score(res.diagram) >= 0.98
    # Same construction with 60 = 3 * 20 samples per period, exact in float64 with gudhi.
    x = np.cos(2 * np.pi * np.arange(60 + 19 * 3) / 60)[:, None]
    d = np.sqrt(sliding_window_sqdist(x @ x.T, dim=20, tau=3))
    bars = _gudhi_h1(d, max_edge=1.8)
    assert abs(bars[:, 1].max() - SQRT3) < 1e-9


def test_window_sweep_peaks_at_best_window():
    # Perea & Harer 2015, Found. Comput. Math. 15:799-838 (formula from memory, numbers
    # computed): M = 20,
    # 200 samples per period; persistence is largest at w/period = M/(M+1) and about
    # 0.92 * sqrt(3) at w/period = 0.25 (the value depends on the sampling density:
    # off the best window the circle is traversed unevenly, so gaps open).
    m = 20
    t = np.linspace(0, 2 * np.pi, 200, endpoint=False)
    ratios = [0.25, 0.5, 0.75, m / (m + 1), 1.25, 1.5]
    score = []
    for r in ratios:
        W = _analytic_windows(np.cos, t, m + 1, r * 2 * np.pi / m)
        score.append(_persistences(h1_persistence(cdist(W, W), n_landmarks=200).diagram)[0] / SQRT3)
    assert int(np.argmax(score)) == ratios.index(m / (m + 1))
    assert score[0] == pytest.approx(0.92, abs=0.015)


def test_quasiperiodic_two_loops():
    # Gakhar & Perea, arXiv:2103.04540 (numbers computed): cos t + 0.8 cos(phi t),
    # M = 10 (dim 11), tau = 0.6, dt = 0.25, 400 landmarks -> two strong H1 classes
    # (values computed for that setting, not taken from the paper: ~2.35 and ~1.81, ratio
    # 0.77; our raw windows give ~3.10 and ~2.25, ratio 0.73), the next ~0.5. We check the ratio and the gap, not the absolute values.
    t = np.arange(0, 100, 0.25)
    W = _analytic_windows(lambda s: np.cos(s) + 0.8 * np.cos(PHI * s), t, 11, 0.6,
                          center=False, normalize=False)
    dgm = h1_persistence(cdist(W, W), n_landmarks=400).diagram
    p = _persistences(dgm)
    assert 0.6 <= p[1] / p[0] <= 0.9
    assert p[2] <= 0.3 * p[1]
    assert second_loop_ratio(dgm) == pytest.approx(p[1] / p[0])
    assert is_quasiperiodic(dgm)
    Wc = _analytic_windows(np.cos, t, 11, 0.6, center=False, normalize=False)
    dgm_cos = h1_persistence(cdist(Wc, Wc), n_landmarks=400).diagram
    assert not is_quasiperiodic(dgm_cos)
    assert second_loop_ratio(dgm_cos) < 0.1


def test_noise_cloud_is_not_quasiperiodic():
    pts = np.random.default_rng(7).normal(size=(200, 6))
    assert not is_quasiperiodic(h1_persistence(cdist(pts, pts), n_landmarks=200).diagram)


def test_scores_on_small_diagrams():
    assert loop_score(np.zeros((0, 2))) == 0.0
    assert loop_score([[0.0, 5.0]]) == 1.0  # clipped
    assert loop_score([[0.2, 0.2 + SQRT3 / 2]]) == pytest.approx(0.5)
    assert second_loop_ratio([[0.0, 1.0]]) == 0.0
    assert not is_quasiperiodic([[0.0, 1.0]])
    assert not is_quasiperiodic([[0, 1.0], [0, 0.9], [0, 0.8]])  # no gap to the third
    assert MAX_LOOP_PERSISTENCE == pytest.approx(SQRT3)


def _resultant(theta, angle):
    return max(abs(np.mean(np.exp(1j * (theta - angle)))), abs(np.mean(np.exp(1j * (theta + angle)))))


@pytest.mark.parametrize("noise", [0.0, 0.05])
def test_circular_coordinates_on_circle(noise):
    # de Silva, Morozov & Vejdemo-Johansson 2011, Discrete Comput. Geom. 45:737-759; sparse
    # version: Perea 2020, Abel Symposia 15:435-458. On points of a circle theta matches
    # the angle for one orientation, |mean exp(i(theta -+ angle))| >= 0.99, also with 5% noise.
    rng = np.random.default_rng(11)
    a = rng.uniform(0, 2 * np.pi, 1200)
    pts = np.c_[np.cos(a), np.sin(a)] + noise * rng.normal(size=(1200, 2))
    theta, info = circular_coordinates(cdist(pts, pts), n_landmarks=200)
    assert theta.shape == (1200,) and np.all((theta >= 0) & (theta < 2 * np.pi))
    assert _resultant(theta, a) >= 0.99
    assert info.extension == "perea" and info.n_components == 1
    assert info.birth <= info.scale < info.death and info.radius > info.persistence.cover_radius


def test_cocycle_lift_is_an_integer_cocycle_on_the_skeleton():
    # The lifted Z_47 cocycle must sum to 0 around every triangle of the Rips complex at the
    # chosen scale (cocycle condition, de Silva et al. 2011), which checks our orientation.
    rng = np.random.default_rng(3)
    a = rng.uniform(0, 2 * np.pi, 300)
    pts = np.c_[np.cos(a), np.sin(a)] + 0.05 * rng.normal(size=(300, 2))
    _, info = circular_coordinates(cdist(pts, pts), n_landmarks=60)
    ld = info.persistence.landmark_dist
    edge = ld < info.scale
    np.fill_diagonal(edge, False)
    z = _lifted_cocycle_matrix(info.persistence.cocycles[0], len(ld), 47, edge)
    i, j, k = np.nonzero(edge[:, :, None] & edge[:, None, :] & edge[None, :, :])
    assert i.size > 0
    np.testing.assert_array_equal(z[i, j] + z[j, k] + z[k, i], 0.0)
    assert np.all(np.abs(z[edge]) <= 23)


def test_circular_mean_fallback_and_rng():
    rng = np.random.default_rng(5)
    a = rng.uniform(0, 2 * np.pi, 600)
    d = cdist(np.c_[np.cos(a), np.sin(a)], np.c_[np.cos(a), np.sin(a)])
    pers = h1_persistence(d, n_landmarks=100, cocycles=True)
    # Pretend the landmarks cover too coarsely for Perea's formula: the fallback is used.
    coarse = dataclasses.replace(pers, cover_radius=pers.diagram[0, 1])
    theta, info = circular_coordinates(d, persistence=coarse)
    assert info.extension == "circular-mean" and _resultant(theta, a) >= 0.99
    theta2, info2 = circular_coordinates(d, n_landmarks=100, rng=1)
    assert info2.landmarks[0] != 0 and _resultant(theta2, a) >= 0.99


def test_orient_with_time():
    t = np.arange(200)
    up = np.mod(0.3 * t + 1.0, 2 * np.pi)
    np.testing.assert_allclose(orient_with_time(up), up)
    flipped = orient_with_time(np.mod(-0.3 * t, 2 * np.pi))
    assert np.all(np.diff(np.unwrap(flipped)) > 0)


BAD = [
    (h1_persistence, (np.ones((4, 5)),), {}, r"dist must be a square"),
    (h1_persistence, (np.zeros((2, 2)),), {}, r"at least 3"),
    (h1_persistence, (np.array([[0, 1, 2], [1, 0, 1], [2, 1, 0.0]]),), dict(coeff=2),
     r"coeff must be an odd prime >= 3, got 2.*Use coeff=47"),
    (h1_persistence, (np.eye(3),), dict(coeff=9), r"odd prime.*got 9"),
    (h1_persistence, (np.eye(3),), dict(n_landmarks=2), r"n_landmarks must be an integer >= 3, got 2"),
    (h1_persistence, (np.array([[0, 1, 2], [1, 0, 1], [3, 1, 0.0]]),), {}, r"not symmetric"),
    (h1_persistence, (-np.ones((3, 3)),), {}, r"negative entries"),
    (circular_coordinates, (np.array([[0, 1, 1], [1, 0, 1], [1, 1, 0.0]]),), dict(coeff=2),
     r"coeff must be an odd prime"),
    (circular_coordinates, (np.array([[0, 1, 1], [1, 0, 1], [1, 1, 0.0]]),), {}, r"no H1 class"),
    (circular_coordinates, (np.eye(3),), dict(scale_fraction=1.0), r"scale_fraction must lie"),
    (greedy_landmarks, (np.eye(3), 0), {}, r"n must be an integer >= 1, got 0"),
    (greedy_landmarks, (np.eye(3), 2), dict(start=5), r"start must be a point index"),
    (loop_score, (np.ones((3, 3)),), {}, r"diagram must be a \(k, 2\)"),
    (is_quasiperiodic, ([[0, 1.0]],), dict(ratio=-1), r"ratio must be a positive number"),
    (orient_with_time, ([1.0],), {}, r"theta must be a finite 1-D array"),
]


@pytest.mark.parametrize("func,args,kwargs,match", BAD)
def test_bad_inputs(func, args, kwargs, match):
    with pytest.raises(InputError, match=match):
        func(*args, **kwargs)
