"""Loop strength and rhythm phase from the shape of a sliding-window cloud.

Given a square distance matrix between sliding-window points (see
:mod:`tempofield.kernels.embedding`; note it returns *squared* distances), this module
picks a few hundred landmarks by farthest-point sampling, computes the H1
Vietoris-Rips persistence of the landmarks with ripser, turns the diagram into
scores (one loop = one rhythm; two strong loops = a quasi-periodic rhythm), and
computes circular coordinates: a phase ``theta`` in ``[0, 2 pi)`` for every
window, from the most persistent cohomology class, following de Silva, Morozov
& Vejdemo-Johansson (2011) and Perea (2020). Pure numpy/scipy plus ripser; no
I/O, no dask, no napari.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.sparse.linalg import lsqr

from tempofield._dtypes import as_float
from tempofield.errors import InputError

__all__ = [
    "H1Persistence",
    "CircularInfo",
    "greedy_landmarks",
    "h1_persistence",
    "loop_score",
    "second_loop_ratio",
    "is_quasiperiodic",
    "circular_coordinates",
    "orient_with_time",
    "MAX_LOOP_PERSISTENCE",
    "QUASIPERIODIC_RATIO",
    "QUASIPERIODIC_GAP",
]

#: Largest H1 persistence of a cloud of centred, unit-normalised windows: the
#: death of a round unit circle, the side of its inscribed equilateral triangle
#: (Perea & Harer 2015; Adamaszek & Adams 2017).
MAX_LOOP_PERSISTENCE = float(np.sqrt(3.0))

#: :func:`is_quasiperiodic` default: the second loop must hold at least this
#: fraction of the first loop's persistence (two incommensurate frequencies, Gakhar & Perea,
#: arXiv:2103.04540, numbers computed: about 0.77; a pure
#: rhythm has nearly 0).
QUASIPERIODIC_RATIO = 0.5

#: :func:`is_quasiperiodic` default: the second loop must be at least this many
#: times more persistent than the third (the same example: about 1.81 / 0.5 = 3.6),
#: so that a cloud of many similar noise loops is not called quasi-periodic.
QUASIPERIODIC_GAP = 2.0


# --------------------------------------------------------------------------- checks
def _check_dist(dist, min_points=3) -> np.ndarray:
    d = as_float(dist, np.float64)
    if d.ndim != 2 or d.shape[0] != d.shape[1]:
        raise InputError(
            f"dist must be a square (N, N) distance matrix, got shape {d.shape}. "
            "Pass the square root of sliding_window_sqdist(...)."
        )
    if d.shape[0] < min_points:
        raise InputError(
            f"dist has {d.shape[0]} points; at least {min_points} are needed. "
            "Use a longer recording or a shorter window."
        )
    if not np.isfinite(d).all():
        raise InputError("dist contains NaN or infinite values; all distances must be finite.")
    smallest, scale = float(d.min()), max(float(d.max()), 1e-300)
    if smallest < -1e-12 * scale:
        raise InputError(
            f"dist has negative entries (min {smallest:.3g}); distances must be >= 0. "
            "Clip rounding negatives with np.clip(dist, 0, None)."
        )
    if float(np.abs(d - d.T).max()) > 1e-7 * scale:
        raise InputError(
            "dist is not symmetric; pass a distance matrix with dist[i, j] == dist[j, i] "
            "(e.g. 0.5 * (dist + dist.T))."
        )
    return d


def _check_coeff(coeff) -> int:
    ok = isinstance(coeff, (int, np.integer)) and not isinstance(coeff, (bool, np.bool_))
    if ok:
        c = int(coeff)
        ok = c >= 3 and c % 2 == 1 and all(c % q for q in range(3, int(c**0.5) + 1, 2))
    if not ok:
        raise InputError(
            f"coeff must be an odd prime >= 3, got {coeff!r}. Circular coordinates lift a "
            "Z_p cocycle to integers in (-p/2, p/2], which is ambiguous for p = 2 "
            "(+1 = -1) and gives wrong coordinates. Use coeff=47."
        )
    return int(coeff)


def _check_n_landmarks(n_landmarks) -> int:
    if (isinstance(n_landmarks, (bool, np.bool_))
            or not isinstance(n_landmarks, (int, np.integer)) or n_landmarks < 3):
        raise InputError(
            f"n_landmarks must be an integer >= 3, got {n_landmarks!r}. A few hundred "
            "(200-400) is usual; ripser's cost grows about as n**3."
        )
    return int(n_landmarks)


def _check_diagram(diagram) -> np.ndarray:
    d = as_float(diagram, np.float64)
    if d.size == 0:
        return np.zeros((0, 2))
    if d.ndim != 2 or d.shape[1] != 2:
        raise InputError(
            f"diagram must be a (k, 2) array of (birth, death) pairs, got shape {d.shape}. "
            "Pass h1_persistence(...).diagram."
        )
    return d


# ------------------------------------------------------------------- landmarks
def _greedy(dist, n, start):
    n_points = dist.shape[0]
    n = min(n, n_points)
    idx = np.empty(n, dtype=np.intp)
    idx[0] = start
    nearest = dist[start].copy()
    for m in range(1, n):
        far = int(np.argmax(nearest))
        if nearest[far] <= 0.0:  # every point coincides with a landmark: stop early
            idx = idx[:m]
            break
        idx[m] = far
        np.minimum(nearest, dist[far], out=nearest)
    return idx, float(nearest.max())


def greedy_landmarks(dist, n, *, start=0):
    """Farthest-point (max-min) landmarks of a point set given by its distance matrix.

    Parameters
    ----------
    dist : (N, N) array_like
        Symmetric distance matrix.
    n : int
        Number of landmarks; capped at ``N``.
    start : int, optional
        Index of the first landmark (default 0).

    Returns
    -------
    idx : (m,) ndarray of intp
        Landmark indices into ``dist``, in the order they were picked;
        ``m = min(n, N)``, or fewer if all points are already at distance 0
        from a landmark (duplicate points are never picked twice).

    Raises
    ------
    tempofield.errors.InputError
        For a bad ``dist``, ``n < 1`` or ``start`` outside ``[0, N)``.

    Notes
    -----
    ``l_0 = start``, ``l_{m+1} = argmax_x min_{i <= m} d(x, l_i)``. Every point is
    then within the covering radius ``max_x min_i d(x, l_i)`` of a landmark, and
    the diagrams of landmarks and of all points are at bottleneck distance at
    most that radius (Rips stability).

    References
    ----------
    .. [1] V. de Silva and G. Carlsson, "Topological estimation using witness
       complexes", Proc. Symp. Point-Based Graphics (2004).

    Examples
    --------
    >>> import numpy as np
    >>> x = np.array([0.0, 1.0, 2.0, 10.0])
    >>> greedy_landmarks(np.abs(x[:, None] - x[None, :]), 3)
    array([0, 3, 2])
    """
    d = _check_dist(dist, min_points=1)
    if isinstance(n, (bool, np.bool_)) or not isinstance(n, (int, np.integer)) or n < 1:
        raise InputError(f"n must be an integer >= 1, got {n!r}. Ask for 1 or more landmarks.")
    if not isinstance(start, (int, np.integer)) or not 0 <= start < d.shape[0]:
        raise InputError(
            f"start must be a point index in [0, {d.shape[0]}), got {start!r}. Use start=0."
        )
    return _greedy(d, int(n), int(start))[0]


# ------------------------------------------------------------------- persistence
@dataclass(frozen=True)
class H1Persistence:
    """H1 persistence of the landmarks of a distance matrix.

    Attributes
    ----------
    diagram : (k, 2) ndarray of float64
        (birth, death) of each H1 class, in distance units, most persistent first.
    landmarks : (n,) ndarray of intp
        Indices of the landmarks into the input distance matrix.
    cover_radius : float
        Largest distance of any point to its nearest landmark.
    coeff : int
        Prime of the coefficient field Z_p.
    cocycles : list of (m, 3) ndarray of int64, or None
        Representative cocycle of each class, in the order of ``diagram``: rows
        ``(a, b, value)`` with ``a, b`` *positions in* ``landmarks`` and
        ``value`` in ``[0, p)``. None unless asked for.
    landmark_dist : (n, n) ndarray of float64
        Distances between the landmarks (the matrix given to ripser).
    """

    diagram: np.ndarray
    landmarks: np.ndarray
    cover_radius: float
    coeff: int
    cocycles: list | None = None
    landmark_dist: np.ndarray = field(default=None, repr=False)


def h1_persistence(dist, *, n_landmarks=200, coeff=47, cocycles=False, start=0):
    """H1 Vietoris-Rips persistence of greedy landmarks, computed by ripser.

    Parameters
    ----------
    dist : (N, N) array_like
        Symmetric distance matrix (distances, not squared distances).
    n_landmarks : int, optional
        Number of farthest-point landmarks (default 200; all distinct points if
        ``N`` is smaller). Measured on these 2-core machines for a noisy loop of
        2376 windows: about 0.2 s at 200, 0.6 s at 300, 1.4 s at 400 landmarks.
    coeff : int, optional
        Odd prime ``p`` of the coefficient field Z_p (default 47).
    cocycles : bool, optional
        Also return representative cocycles (needed by
        :func:`circular_coordinates`). Default False.
    start : int, optional
        First landmark (default 0).

    Returns
    -------
    result : H1Persistence
        Diagram sorted by persistence (death - birth) descending, landmarks,
        covering radius, and cocycles whose vertex indices are positions in the
        landmark list.

    Raises
    ------
    tempofield.errors.InputError
        For a bad ``dist``, ``n_landmarks < 3``, or ``coeff`` that is not an odd prime.

    Notes
    -----
    ripser is called as ``ripser(dist[L][:, L], distance_matrix=True, maxdim=1,
    coeff=p, do_cocycles=...)`` on the landmark sub-matrix: with ripser's own
    ``n_perm`` the cocycle indices would refer to the original points. An edge
    enters the filtration at its length; H1 classes of a finite metric space all
    die, so the diagram has no infinite bars.

    References
    ----------
    .. [1] U. Bauer, "Ripser: efficient computation of Vietoris-Rips persistence
       barcodes", J. Appl. Comput. Topol. 5:391-423 (2021).
    .. [2] J. A. Perea and J. Harer, Found. Comput. Math. 15:799-838 (2015).

    Examples
    --------
    >>> import numpy as np
    >>> a = 2 * np.pi * np.arange(30) / 30
    >>> pts = np.c_[np.cos(a), np.sin(a)]
    >>> d = np.linalg.norm(pts[:, None] - pts[None], axis=-1)
    >>> res = h1_persistence(d, n_landmarks=30)
    >>> bool(np.isclose(res.diagram[0, 1], np.sqrt(3), atol=1e-6))
    True
    """
    d = _check_dist(dist)
    n_landmarks = _check_n_landmarks(n_landmarks)
    coeff = _check_coeff(coeff)
    if not isinstance(start, (int, np.integer)) or not 0 <= start < d.shape[0]:
        raise InputError(f"start must be a point index in [0, {d.shape[0]}), got {start!r}.")
    return _h1(d, n_landmarks, coeff, bool(cocycles), int(start))


def _h1(d, n_landmarks, coeff, cocycles, start):
    """:func:`h1_persistence` on checked arguments."""
    from ripser import ripser  # imported here: the only module that needs it

    idx, cover = _greedy(d, n_landmarks, start)
    sub = d[np.ix_(idx, idx)]
    sub = np.clip(0.5 * (sub + sub.T), 0.0, None)  # exactly symmetric for ripser
    out = ripser(sub, distance_matrix=True, maxdim=1, coeff=coeff, do_cocycles=bool(cocycles))
    dgm = np.asarray(out["dgms"][1], dtype=np.float64).reshape(-1, 2)
    finite = np.isfinite(dgm[:, 1])
    order = np.argsort(-(dgm[:, 1] - dgm[:, 0]), kind="stable")
    order = order[finite[order]]
    cocs = None
    if cocycles:
        cocs = [np.asarray(out["cocycles"][1][i], dtype=np.int64).reshape(-1, 3) for i in order]
    return H1Persistence(dgm[order], idx, cover, coeff, cocs, sub)


# ------------------------------------------------------------------- scores
def _persistence(diagram):
    d = _check_diagram(diagram)
    return np.sort(d[:, 1] - d[:, 0])[::-1] if len(d) else np.zeros(0)


def loop_score(diagram):
    """Strength of the main loop: max H1 persistence / sqrt(3), in [0, 1].

    Parameters
    ----------
    diagram : (k, 2) array_like
        H1 diagram of centred, unit-normalised windows (distances, not squared).

    Returns
    -------
    score : float
        ``min(max(death - birth) / sqrt(3), 1)``; 0 for an empty diagram.

    Raises
    ------
    tempofield.errors.InputError
        If ``diagram`` is not ``(k, 2)``.

    Notes
    -----
    For centred, unit-normalised sliding windows the largest possible H1
    persistence is ``sqrt(3)``: a pure sinusoid at the best window traces a
    round unit circle whose Rips H1 class dies at the side of the inscribed
    equilateral triangle. The score is only meaningful on that scale.

    References
    ----------
    .. [1] J. A. Perea and J. Harer, Found. Comput. Math. 15:799-838 (2015).
    .. [2] M. Adamaszek and H. Adams, "The Vietoris-Rips complexes of a circle",
       Pacific J. Math. 290:1-40 (2017).

    Examples
    --------
    >>> loop_score([[0.1, 1.5], [0.2, 0.3]])  # doctest: +ELLIPSIS
    0.808...
    """
    p = _persistence(diagram)
    return float(np.clip(p[0] / MAX_LOOP_PERSISTENCE, 0.0, 1.0)) if p.size else 0.0


def second_loop_ratio(diagram):
    """Persistence of the second H1 class over that of the first (0 if fewer than 2).

    Parameters
    ----------
    diagram : (k, 2) array_like
        H1 diagram.

    Returns
    -------
    ratio : float
        ``p_2 / p_1`` in ``[0, 1]`` with ``p_i`` the i-th largest persistence.

    Raises
    ------
    tempofield.errors.InputError
        If ``diagram`` is not ``(k, 2)``.

    Notes
    -----
    A rhythm with two incommensurate frequencies fills a 2-torus, whose
    windows carry two strong H1 classes; a single rhythm carries one.

    References
    ----------
    .. [1] H. Gakhar and J. A. Perea, "Sliding window persistence of
       quasiperiodic functions", arXiv:2103.04540 (2021).

    Examples
    --------
    >>> second_loop_ratio([[0.0, 2.0], [0.0, 1.0], [0.0, 0.1]])
    0.5
    """
    p = _persistence(diagram)
    return float(p[1] / p[0]) if p.size >= 2 and p[0] > 0 else 0.0


def is_quasiperiodic(diagram, *, ratio=QUASIPERIODIC_RATIO, gap=QUASIPERIODIC_GAP):
    """Whether an H1 diagram shows two strong loops (a 2-torus) rather than one.

    Parameters
    ----------
    diagram : (k, 2) array_like
        H1 diagram.
    ratio : float, optional
        Least ``p_2 / p_1`` (default 0.5).
    gap : float, optional
        Least ``p_2 / p_3`` (default 2.0); ``p_3 = 0`` if there is no third class.

    Returns
    -------
    flag : bool
        True when ``p_2 >= ratio * p_1`` and ``p_2 >= gap * p_3``.

    Raises
    ------
    tempofield.errors.InputError
        If ``diagram`` is not ``(k, 2)`` or ``ratio``/``gap`` are not positive.

    Notes
    -----
    The sliding windows of ``cos t + 0.8 cos(phi t)`` (``phi`` the golden ratio)
    lie on a torus; with ``M = 10``, ``tau = 0.6``, ``dt = 0.25`` and 400
    landmarks ripser gives two classes with ``p_2 / p_1`` about 0.73-0.77 and a
    third class 4-5 times weaker than the second. A pure rhythm has ``p_2 / p_1``
    near 0; noise gives many classes of similar persistence, which ``gap`` rejects.

    References
    ----------
    .. [1] H. Gakhar and J. A. Perea, arXiv:2103.04540 (2021).

    Examples
    --------
    >>> is_quasiperiodic([[0.6, 3.0], [0.6, 2.4], [0.5, 1.0]])
    True
    >>> is_quasiperiodic([[0.0, 1.7], [0.1, 0.2]])
    False
    """
    for name, value in (("ratio", ratio), ("gap", gap)):
        if not np.isfinite(value) or value <= 0:
            raise InputError(f"{name} must be a positive number, got {value!r}.")
    p = _persistence(diagram)
    if p.size < 2 or p[0] <= 0:
        return False
    p3 = p[2] if p.size >= 3 else 0.0
    return bool(p[1] >= ratio * p[0] and p[1] >= gap * p3)


# ------------------------------------------------------------------- circular coordinates
@dataclass(frozen=True)
class CircularInfo:
    """How the circular coordinates were obtained.

    Attributes
    ----------
    birth, death : float
        Bar of the H1 class used (distance units).
    scale : float
        Rips scale ``epsilon`` of the 1-skeleton on which ``min ||z - delta f||``
        was solved (edges of length ``< epsilon``).
    radius : float
        Radius of the landmark balls of the partition of unity.
    extension : str
        ``"perea"`` (exact formula with the cocycle) or ``"circular-mean"``
        (fallback when the class dies before the landmarks cover the points).
    n_components : int
        Connected components of the landmark 1-skeleton at ``scale``.
    landmarks : ndarray of intp
        Landmark indices.
    landmark_theta : ndarray of float64
        ``2 pi (f mod 1)`` on the landmarks.
    persistence : H1Persistence
        The persistence result used.
    """

    birth: float
    death: float
    scale: float
    radius: float
    extension: str
    n_components: int
    landmarks: np.ndarray
    landmark_theta: np.ndarray = field(repr=False)
    persistence: H1Persistence = field(repr=False)


def _lifted_cocycle_matrix(cocycle, n, p, edge_mask):
    """Antisymmetric (n, n) matrix of the integer-lifted cocycle on edges of the skeleton."""
    z = np.zeros((n, n))
    a, b, v = cocycle[:, 0], cocycle[:, 1], cocycle[:, 2] % p
    lifted = np.where(v > p // 2, v - p, v).astype(np.float64)  # (-p/2, p/2] for odd p
    z[a, b] = lifted
    z[b, a] = -lifted
    return np.where(edge_mask, z, 0.0)


def _harmonic_lift(z, edge_mask, density_correction):
    """f minimising sum over edges a<b of w_ab (z[a, b] - (f[b] - f[a]))^2 (min-norm, lsqr)."""
    n = z.shape[0]
    a, b = np.nonzero(np.triu(edge_mask, 1))
    m = a.size
    if m == 0:
        return np.zeros(n), n
    if density_correction:
        degree = edge_mask.sum(axis=1).astype(np.float64)
        sqrt_w = 1.0 / np.sqrt(degree[a] * degree[b])
    else:
        sqrt_w = np.ones(m)
    rows = np.repeat(np.arange(m), 2)
    cols = np.c_[a, b].ravel()
    vals = np.c_[-sqrt_w, sqrt_w].ravel()
    coboundary = coo_matrix((vals, (rows, cols)), shape=(m, n)).tocsr()
    f = lsqr(coboundary, sqrt_w * z[a, b], atol=1e-12, btol=1e-12, iter_lim=20 * n + 1000)[0]
    n_comp = connected_components(coo_matrix((np.ones(m), (a, b)), shape=(n, n)),
                                  directed=False)[0]
    return f, int(n_comp)


def circular_coordinates(dist, *, n_landmarks=200, coeff=47, rng=None, scale_fraction=0.5,
                         density_correction=True, persistence=None):
    """Circular coordinate ``theta`` in ``[0, 2 pi)`` of every point, from the main H1 class.

    Parameters
    ----------
    dist : (N, N) array_like
        Symmetric distance matrix (distances, not squared) satisfying the
        triangle inequality, e.g. between sliding windows.
    n_landmarks : int, optional
        Landmarks for the persistence computation (default 200).
    coeff : int, optional
        Odd prime ``p`` (default 47); 2 is refused.
    rng : None, int or numpy.random.Generator, optional
        If given, the first landmark is drawn at random from it; if None it is
        point 0 (fully deterministic).
    scale_fraction : float, optional
        Where in the bar the Rips scale sits: ``epsilon = birth +
        scale_fraction * (death - birth)`` (default 0.5), raised to
        ``2 * 1.01 * cover_radius`` if that is larger (see Notes). In ``(0, 1)``.
    density_correction : bool, optional
        Weight each edge of the least-squares problem by ``1 / (deg_a deg_b)``
        (default True; see Notes). False gives de Silva et al.'s unweighted problem.
    persistence : H1Persistence, optional
        A result of :func:`h1_persistence` with cocycles on the same ``dist``,
        to avoid computing it twice; ``n_landmarks``, ``coeff`` and ``rng`` are
        then not used.

    Returns
    -------
    theta : (N,) ndarray of float64
        Phase of each point in radians, in ``[0, 2 pi)``. Its orientation and
        origin are arbitrary (see :func:`orient_with_time`).
    info : CircularInfo
        Bar, scale, radius, method and landmark values used.

    Raises
    ------
    tempofield.errors.InputError
        For a bad ``dist``/``coeff``/``scale_fraction``, or a cloud without H1 class.

    Notes
    -----
    1. The most persistent H1 class ``[b, d)`` of the landmarks and its cocycle
       over Z_p are lifted to integers in ``(-p/2, p/2]`` (de Silva et al. 2011).
    2. On the 1-skeleton of the landmark Rips complex at scale ``epsilon``
       (edges of length ``< epsilon``, ``b <= epsilon < d``) the cocycle ``z`` is
       kept on the skeleton edges and ``f = argmin ||W^(1/2) (z - delta f)||_2`` is
       solved by ``scipy.sparse.linalg.lsqr``, where ``(delta f)(a, b) = f_b - f_a``.
       With ``W = I`` this is de Silva et al.'s problem; its solution bunches
       ``theta`` where landmarks are denser (more edges stiffen the fit there),
       and greedy landmarks vary in density by up to 2x. The default weights
       ``w_ab = 1 / (deg_a deg_b)`` (vertex degrees in the skeleton) remove most
       of that bias, in the spirit of the density normalisation of diffusion
       maps (Coifman & Lafon 2006); this is our deviation from the papers. On a
       circle of 80 evenly spaced points with 40 landmarks the resultant
       ``|mean exp(i (theta - angle))|`` is 0.966 without and 0.997 with it.
       The minimum-norm solution fixes the free constant of each connected
       component; a component the loop does not pass through gets constant ``f``.
    3. Every point ``x`` (not only the landmarks) gets Perea's (2020)
       partition-of-unity formula with landmark balls of radius ``r = epsilon / 2``:
       ``phi_k(x) = max(r - d(x, l_k), 0) / sum_l max(r - d(x, l_l), 0)``,
       ``j`` = the landmark nearest ``x``, and

       .. math:: \\theta(x) = 2\\pi\\Big(\\sum_k \\phi_k(x) f_k
                 - \\sum_k \\phi_k(x) z_{jk}\\Big) \\bmod 2\\pi.

       Every pair ``j, k`` with weight lies within ``2 r = epsilon`` of each
       other, so ``z_{jk}`` is defined. The balls must cover every point:
       ``r > cover_radius`` is ensured by ``epsilon >= 2.02 * cover_radius``.
       If that is not below ``d`` (too few landmarks for the loop), the
       extension falls back to the weighted circular mean
       ``angle(sum_k phi_k(x) exp(i theta_k))`` with ``r = 1.01 * cover_radius``,
       and ``info.extension`` says ``"circular-mean"``.

    References
    ----------
    .. [1] V. de Silva, D. Morozov and M. Vejdemo-Johansson, "Persistent
       cohomology and circular coordinates", Discrete Comput. Geom. 45:737-759
       (2011), doi:10.1007/s00454-011-9344-x.
    .. [2] J. A. Perea, "Sparse circular coordinates via principal Z-bundles",
       Abel Symposia 15:435-458 (2020).
    .. [3] R. R. Coifman and S. Lafon, "Diffusion maps", Appl. Comput. Harmon.
       Anal. 21:5-30 (2006).

    Examples
    --------
    >>> import numpy as np
    >>> a = 2 * np.pi * np.arange(80) / 80
    >>> pts = np.c_[np.cos(a), np.sin(a)]
    >>> d = np.linalg.norm(pts[:, None] - pts[None], axis=-1)
    >>> theta, info = circular_coordinates(d, n_landmarks=40)
    >>> r = abs(np.mean(np.exp(1j * (theta - a)))), abs(np.mean(np.exp(1j * (theta + a))))
    >>> bool(max(r) > 0.99)
    True
    """
    d = _check_dist(dist)
    if not (np.isfinite(scale_fraction) and 0.0 < scale_fraction < 1.0):
        raise InputError(
            f"scale_fraction must lie strictly between 0 and 1, got {scale_fraction!r}; "
            "0.5 puts the Rips scale in the middle of the bar."
        )
    if persistence is None:
        start = 0 if rng is None else int(np.random.default_rng(rng).integers(d.shape[0]))
        persistence = _h1(d, _check_n_landmarks(n_landmarks), _check_coeff(coeff), True, start)
    elif persistence.cocycles is None:
        raise InputError(
            "persistence has no cocycles; compute it with h1_persistence(..., cocycles=True)."
        )
    else:
        _check_coeff(persistence.coeff)
        if persistence.landmarks.size and persistence.landmarks.max() >= d.shape[0]:
            raise InputError(
                f"persistence refers to landmark {persistence.landmarks.max()} but dist has "
                f"only {d.shape[0]} points; pass the h1_persistence result of this dist."
            )
    if len(persistence.diagram) == 0:
        raise InputError(
            "the point cloud has no H1 class (no loop), so there is no circular coordinate. "
            "Check the window (window_for_period) and that the region beats."
        )
    p = persistence.coeff
    birth, death = (float(v) for v in persistence.diagram[0])
    ld = persistence.landmark_dist
    n = ld.shape[0]
    cover = persistence.cover_radius
    scale = max(birth + scale_fraction * (death - birth), 2.02 * cover)
    perea = scale < death
    if not perea:
        scale = birth + scale_fraction * (death - birth)
    edge_mask = ld < scale
    np.fill_diagonal(edge_mask, False)
    z = _lifted_cocycle_matrix(persistence.cocycles[0], n, p, edge_mask)
    f, n_comp = _harmonic_lift(z, edge_mask, bool(density_correction))
    landmark_theta = 2 * np.pi * np.mod(f, 1.0)

    to_landmarks = d[:, persistence.landmarks]  # (N, n)
    radius = scale / 2 if perea else 1.01 * cover + 1e-12 * max(death, 1e-300)
    weights = np.clip(radius - to_landmarks, 0.0, None)
    weights /= weights.sum(axis=1, keepdims=True)
    if perea:
        nearest = np.argmin(to_landmarks, axis=1)
        turns = weights @ f - np.einsum("ik,ik->i", weights, z[nearest])
        theta = 2 * np.pi * np.mod(turns, 1.0)
    else:
        theta = np.mod(np.angle(weights @ np.exp(1j * landmark_theta)), 2 * np.pi)
    theta[theta >= 2 * np.pi] = 0.0
    info = CircularInfo(birth, death, float(scale), float(radius),
                        "perea" if perea else "circular-mean", n_comp,
                        persistence.landmarks, landmark_theta, persistence)
    return theta, info


def orient_with_time(theta):
    """Flip a phase series so that it increases with the sample index on average.

    Parameters
    ----------
    theta : (N,) array_like
        Phase in radians, in time order.

    Returns
    -------
    theta : (N,) ndarray of float64
        ``theta mod 2 pi`` if its unwrapped least-squares slope against the
        index is >= 0, else ``(-theta) mod 2 pi``; values in ``[0, 2 pi)``.

    Raises
    ------
    tempofield.errors.InputError
        If ``theta`` is not a finite 1-D array of at least 2 values.

    Notes
    -----
    ``slope = cov(i, unwrap(theta)) / var(i)``. Circular coordinates are defined up
    to a reflection of the circle; a rhythm's phase advances in time.

    References
    ----------
    .. [1] V. de Silva, D. Morozov and M. Vejdemo-Johansson, Discrete Comput.
       Geom. 45:737-759 (2011).

    Examples
    --------
    >>> import numpy as np
    >>> th = np.mod(-0.5 * np.arange(6), 2 * np.pi)
    >>> np.round(orient_with_time(th), 2)
    array([0. , 0.5, 1. , 1.5, 2. , 2.5])
    """
    th = as_float(theta, np.float64)
    if th.ndim != 1 or th.size < 2 or not np.all(np.isfinite(th)):
        raise InputError(
            f"theta must be a finite 1-D array of at least 2 phases, got shape {th.shape}. "
            "Pass the phase series in time order."
        )
    unwrapped = np.unwrap(th)
    i = np.arange(th.size, dtype=np.float64)
    slope = np.dot(i - i.mean(), unwrapped - unwrapped.mean())
    out = np.mod(th if slope >= 0 else -th, 2 * np.pi)
    out[out >= 2 * np.pi] = 0.0
    return out
