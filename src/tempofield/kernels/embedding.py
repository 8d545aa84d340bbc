"""Sliding-window (delay) geometry of a whole video, computed from its frame Gram matrix.

A sliding-window point at frame ``i`` stacks the frames ``i, i+tau, ...,
i+(dim-1)*tau`` of a ``(T, P)`` data matrix ``X`` (P preprocessed pixels). Every
quantity needed downstream -- squared distances between windows with or without
the pointwise centring and unit normalisation of Perea & Harer (2015), the
principal-component spectrum of the window cloud -- is a function of the
``(T, T)`` frame Gram matrix ``G = X X^T`` alone, so after one streaming pass
over the stack the cost no longer depends on the image size. This module holds
those pure-numpy kernels, the choice of window for a given period, and the
read-back of principal motion modes (the only step that needs ``X`` again). It
does no I/O and knows nothing about dask or napari.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from tempofield._dtypes import as_float
from tempofield.errors import InputError

__all__ = [
    "WindowChoice",
    "sliding_window_sqdist",
    "sliding_window_points",
    "window_for_period",
    "window_pca",
    "motion_modes",
]

#: Relative error of the window length ``M*tau`` against the best window
#: ``period*M/(M+1)`` that :func:`window_for_period` accepts before it trades
#: delays for a more accurate window.
WINDOW_LENGTH_TOLERANCE = 0.05


# --------------------------------------------------------------------------- checks
def _check_int(name, value, *, minimum, hint):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise InputError(
            f"{name} must be an integer >= {minimum}, got {value!r} "
            f"({type(value).__name__}). {hint}"
        )
    if value < minimum:
        raise InputError(f"{name} must be an integer >= {minimum}, got {value}. {hint}")
    return int(value)


def _check_gram(gram) -> np.ndarray:
    g = as_float(gram, np.float64)
    if g.ndim != 2 or g.shape[0] != g.shape[1]:
        raise InputError(
            f"gram must be a square (T, T) frame Gram matrix X @ X.T, got shape "
            f"{g.shape}. Compute it as X @ X.T from a (T, P) matrix of frames."
        )
    if not np.all(np.isfinite(g)):
        raise InputError(
            "gram contains NaN or infinite values. Replace missing pixels (e.g. with "
            "the pixel's temporal mean) before accumulating X @ X.T."
        )
    return g


def _check_window(n_frames, dim, tau) -> int:
    dim = _check_int("dim", dim, minimum=2, hint="Use dim >= 2 coordinates per window (3 or more is usual).")
    tau = _check_int("tau", tau, minimum=1, hint="The delay tau is a whole number of frames, at least 1.")
    n_windows = n_frames - (dim - 1) * tau
    if n_windows < 2:
        raise InputError(
            f"a window of dim={dim}, tau={tau} spans {(dim - 1) * tau + 1} frames but the "
            f"recording has only T={n_frames}; at least 2 windows are needed. "
            "Use a smaller dim or tau (see window_for_period) or a longer recording."
        )
    return n_windows


# ------------------------------------------------------------------ inner products
def _diagonal_window_sum(gram, dim, tau, n_windows):
    """``S[i, j] = sum_k G[i + k tau, j + k tau]`` as a sum of shifted diagonal blocks."""
    s = np.zeros((n_windows, n_windows), dtype=np.float64)
    for k in range(dim):
        lo = k * tau
        s += gram[lo : lo + n_windows, lo : lo + n_windows]
    return s


def _window_block_sum(gram, dim, tau, n_windows):
    """``(A G A^T)[i, j] = sum_k sum_l G[i + k tau, j + l tau]``, A the window indicator.

    Two passes of shifted-slice sums: rows first (``B = A G``, shape (N, T)),
    then columns (``B A^T``), so the cost is O(dim * N * T), never O(dim^2 N^2).
    """
    n_frames = gram.shape[0]
    rows = np.zeros((n_windows, n_frames), dtype=np.float64)
    for k in range(dim):
        rows += gram[k * tau : k * tau + n_windows, :]
    out = np.zeros((n_windows, n_windows), dtype=np.float64)
    for k in range(dim):
        out += rows[:, k * tau : k * tau + n_windows]
    return out


def _window_inner_products(gram, dim, tau, center):
    """Inner products ``<W_i, W_j>`` of the (optionally pointwise-centred) windows.

    Also returns the uncentred squared norms ``S(i, i)``, the scale against which
    the rounding of the centring subtraction is judged.
    """
    n_windows = gram.shape[0] - (dim - 1) * tau
    inner = _diagonal_window_sum(gram, dim, tau, n_windows)
    raw_sq_norm = np.diag(inner).copy()
    if center:
        inner -= _window_block_sum(gram, dim, tau, n_windows) / dim
    # Symmetrise: shifted sums of a symmetric G are symmetric up to rounding.
    return 0.5 * (inner + inner.T), raw_sq_norm


#: A centred window whose energy is below this fraction of its uncentred energy
#: is constant up to rounding (the subtraction loses about dim * eps of it).
ZERO_NORM_FRACTION = 1e-10


def _normalise_inner(inner, raw_sq_norm):
    """Cosine matrix of an inner-product matrix; zero-norm windows get cos = 0."""
    sq_norm = np.diag(inner).copy()
    # Zero-norm windows (constant frames after centring, or all-zero frames) have
    # no direction: treat them as orthogonal to every window, distance sqrt(2).
    tiny = (sq_norm <= ZERO_NORM_FRACTION * raw_sq_norm) | (sq_norm <= 0.0)
    inv = np.where(tiny, 0.0, 1.0 / np.sqrt(np.where(tiny, 1.0, sq_norm)))
    cos = inner * inv[:, None] * inv[None, :]
    np.fill_diagonal(cos, np.where(tiny, 0.0, 1.0))
    return np.clip(cos, -1.0, 1.0), tiny


def sliding_window_sqdist(gram, *, dim, tau, center=True, normalize=True):
    """Squared distances between the sliding-window points of a video, from its Gram matrix.

    Parameters
    ----------
    gram : (T, T) array_like
        Frame Gram matrix ``G = X @ X.T`` of a ``(T, P)`` data matrix ``X`` (T frames
        of P preprocessed pixels), in squared intensity units. Converted to float64.
    dim : int
        Number of frames per window (``M + 1`` for ``M`` delays), ``dim >= 2``.
    tau : int
        Delay between stacked frames, in frames, ``tau >= 1``.
    center : bool, optional
        Subtract from each window its per-pixel mean over its ``dim`` frames
        (Perea & Harer's pointwise centring). Default True.
    normalize : bool, optional
        Scale every (centred) window to unit norm. Default True.

    Returns
    -------
    sqdist : (N, N) ndarray of float64
        ``sqdist[i, j]`` is the squared Euclidean distance between windows ``i``
        and ``j``, ``N = T - (dim - 1) * tau``. Symmetric, zero diagonal, no
        negative entries (rounding negatives are clipped to 0). Unitless
        (``0 .. 4``) when ``normalize`` is True, else squared intensity units.

    Raises
    ------
    tempofield.errors.InputError
        If ``gram`` is not a finite square matrix, ``dim``/``tau`` are not
        integers in range, or the window is longer than the recording.

    Notes
    -----
    With ``S(i, j) = sum_k G[i + k tau, j + k tau]`` (a sum of ``dim`` shifted
    diagonal blocks of ``G``) the window inner product is ``C = S`` without
    centring, and with pointwise centring

    .. math:: C(i, j) = S(i, j) - \\frac{1}{dim} (A G A^T)_{ij},

    where ``A`` is the ``(N, T)`` window indicator (``A[i, i + k tau] = 1``);
    ``A G A^T`` is formed by shifted row sums then shifted column sums.
    Then ``D^2 = C(i,i) + C(j,j) - 2 C(i,j)``, or after unit normalisation
    ``D^2 = 2 - 2 C(i,j) / sqrt(C(i,i) C(j,j))``. A window whose centred norm is
    zero (constant frames: ``C(i,i) <= 1e-10 S(i,i)``, the rounding level of the
    centring) has no direction; it is given cosine 0 with every other window,
    i.e. ``D^2 = 2``. The cost is ``O(dim * N * T)``, independent of P.
    Rounding in ``G`` limits the relative accuracy of small distances between
    windows far from the origin; centre or detrend the pixels before forming ``G``.

    References
    ----------
    .. [1] J. A. Perea and J. Harer, "Sliding windows and persistence: an application
       of topological methods to signal analysis", Found. Comput. Math. 15:799-838
       (2015), doi:10.1007/s10208-014-9206-z.
    .. [2] F. Takens, "Detecting strange attractors in turbulence", Lecture Notes in
       Mathematics 898:366-381 (1981).

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(40)
    >>> X = np.cos(2 * np.pi * t / 10)[:, None] * np.ones((1, 3))
    >>> d2 = sliding_window_sqdist(X @ X.T, dim=5, tau=2)
    >>> d2.shape
    (32, 32)
    >>> bool(np.isclose(d2[0, 10], 0.0, atol=1e-9))  # one period apart: same window
    True
    """
    g = _check_gram(gram)
    _check_window(g.shape[0], dim, tau)
    inner, raw_sq_norm = _window_inner_products(g, int(dim), int(tau), bool(center))
    if normalize:
        cos, _ = _normalise_inner(inner, raw_sq_norm)
        sqdist = 2.0 - 2.0 * cos
    else:
        diag = np.diag(inner)
        sqdist = diag[:, None] + diag[None, :] - 2.0 * inner
    sqdist = 0.5 * (sqdist + sqdist.T)  # exactly symmetric, as ripser expects
    np.fill_diagonal(sqdist, 0.0)
    return np.clip(sqdist, 0.0, None)


def sliding_window_points(X, *, dim, tau, center=True, normalize=True):
    """Explicit sliding-window embedding of a ``(T, P)`` data matrix (for tests and docs).

    Parameters
    ----------
    X : (T, P) or (T,) array_like
        T frames of P pixels (a 1-D signal is treated as ``P = 1``). Converted to float64.
    dim : int
        Number of frames per window, ``dim >= 2``.
    tau : int
        Delay between stacked frames, in frames, ``tau >= 1``.
    center : bool, optional
        Subtract each window's per-pixel mean over its ``dim`` frames. Default True.
    normalize : bool, optional
        Scale each window to unit norm (zero-norm windows stay zero). Default True.

    Returns
    -------
    points : (N, dim * P) ndarray of float64
        Row ``i`` is ``[X[i], X[i + tau], ..., X[i + (dim-1) tau]]`` flattened
        frame by frame, ``N = T - (dim - 1) * tau``.

    Raises
    ------
    tempofield.errors.InputError
        If ``X`` is not 1-D or 2-D, or the window does not fit in the recording.

    Notes
    -----
    ``SW(i) = [x_i, x_{i+tau}, ..., x_{i+(dim-1)tau}]``; centring replaces each
    ``x_{i+k tau}`` by ``x_{i+k tau} - (1/dim) sum_l x_{i+l tau}``. Memory is
    ``N * dim * P`` values: use :func:`sliding_window_sqdist` for real videos.

    References
    ----------
    .. [1] J. A. Perea and J. Harer, Found. Comput. Math. 15:799-838 (2015).

    Examples
    --------
    >>> import numpy as np
    >>> sliding_window_points(np.arange(6.0), dim=3, tau=2, center=False, normalize=False)
    array([[0., 2., 4.],
           [1., 3., 5.]])
    """
    x = as_float(X, np.float64)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise InputError(
            f"X must be a (T, P) matrix of frames or a (T,) signal, got shape {x.shape}. "
            "Reshape a (T, Y, X) stack with X.reshape(T, -1)."
        )
    n_windows = _check_window(x.shape[0], dim, tau)
    windows = np.stack([x[k * tau : k * tau + n_windows] for k in range(dim)], axis=1)
    if center:
        windows = windows - windows.mean(axis=1, keepdims=True)
    points = windows.reshape(n_windows, -1)
    if normalize:
        norm = np.linalg.norm(points, axis=1, keepdims=True)
        points = points / np.where(norm > 0, norm, 1.0)
    return points


# ------------------------------------------------------------------ window choice
class WindowChoice(NamedTuple):
    """A sliding window: ``dim`` frames ``tau`` apart, spanning ``window_frames``."""

    dim: int
    tau: int
    window_frames: int


def window_for_period(period_frames, *, dim=None, max_dim=21, min_dim=3,
                      tolerance=WINDOW_LENGTH_TOLERANCE):
    """Choose ``(dim, tau)`` so that the window fits the period (Perea & Harer's best window).

    Parameters
    ----------
    period_frames : float
        Expected period of the rhythm, in frames; must exceed 2 (Nyquist).
    dim : int, optional
        Fix the number of coordinates ``M + 1``; only ``tau`` is then chosen.
    max_dim : int, optional
        Largest number of coordinates tried (default 21, i.e. ``M = 20`` delays).
    min_dim : int, optional
        Smallest number of coordinates (default 3, i.e. ``M = 2``).
    tolerance : float, optional
        Accepted relative error of the window length against the best window
        (default 0.05).

    Returns
    -------
    choice : WindowChoice
        ``(dim, tau, window_frames)`` with ``window_frames = (dim - 1) * tau``
        the window length ``M tau`` in frames (the window touches
        ``window_frames + 1`` frames).

    Raises
    ------
    tempofield.errors.InputError
        If the period is not a finite number above 2 frames, or the dim limits
        are inconsistent.

    Notes
    -----
    The best window of Perea & Harer (2015) for ``M`` delays is
    ``M tau = period * M / (M + 1)``, i.e. ``tau = period / (M + 1)``: the
    ``M + 1`` samples of a window then sit equally spaced over one period and a
    sinusoid's windows trace a round circle. ``tau`` must be a whole number of
    frames, so for each ``M`` in ``[min_dim - 1, max_dim - 1]`` we take
    ``tau = max(1, round(period / (M + 1)))`` and keep the largest ``M`` whose
    window length is within ``tolerance`` of the best one (many delays resolve
    harmonics: aim at M of about 10-20 when the period spans 20 frames or
    more); if none is, the ``M`` with the smallest relative error. Short periods
    therefore get few delays with ``tau = 1``.

    References
    ----------
    .. [1] J. A. Perea and J. Harer, Found. Comput. Math. 15:799-838 (2015).

    Examples
    --------
    >>> window_for_period(42.0)
    WindowChoice(dim=21, tau=2, window_frames=40)
    >>> window_for_period(4.0)
    WindowChoice(dim=4, tau=1, window_frames=3)
    >>> window_for_period(30.0, dim=6)
    WindowChoice(dim=6, tau=5, window_frames=25)
    """
    try:
        period = float(period_frames)
    except (TypeError, ValueError):
        period = float("nan")
    if not np.isfinite(period) or period <= 2.0:
        raise InputError(
            f"period_frames must be a finite number of frames above 2, got {period_frames!r}. "
            "A rhythm is only measurable when the frame rate exceeds twice its frequency; "
            "pass the expected period in frames (period_s / frame_interval_s)."
        )
    if dim is not None:
        dim = _check_int("dim", dim, minimum=2, hint="Pass dim=None to let the period choose it.")
        tau = max(1, int(round(period / dim)))
        return WindowChoice(dim, tau, (dim - 1) * tau)
    min_dim = _check_int("min_dim", min_dim, minimum=2, hint="Use min_dim=3 (the default).")
    max_dim = _check_int("max_dim", max_dim, minimum=min_dim,
                         hint=f"max_dim must be at least min_dim={min_dim}.")
    best = None
    for n_delays in range(max_dim - 1, min_dim - 2, -1):
        tau = max(1, int(round(period / (n_delays + 1))))
        ideal = period * n_delays / (n_delays + 1)
        error = abs(n_delays * tau - ideal) / ideal
        if error <= tolerance:
            return WindowChoice(n_delays + 1, tau, n_delays * tau)
        if best is None or error < best[0]:
            best = (error, n_delays + 1, tau)
    _, dim, tau = best
    return WindowChoice(dim, tau, (dim - 1) * tau)


# ------------------------------------------------------------------ PCA and modes
def _cloud_spectrum(gram, dim, tau, center, normalize):
    """Eigenpairs (descending) of the double-centred window inner-product matrix."""
    inner, raw_sq_norm = _window_inner_products(gram, dim, tau, center)
    if normalize:
        inner, _ = _normalise_inner(inner, raw_sq_norm)
    n = inner.shape[0]
    # Double centring subtracts the mean window of the cloud (ordinary PCA).
    row_mean = inner.mean(axis=0)
    k = inner - row_mean[None, :] - row_mean[:, None] + row_mean.mean()
    eigval, eigvec = np.linalg.eigh(0.5 * (k + k.T))
    order = np.argsort(eigval)[::-1]
    eigval = np.clip(eigval[order], 0.0, None)
    return eigval, eigvec[:, order], n


def window_pca(gram, *, dim, tau, center=True, normalize=False, n_components=None):
    """Explained-variance ratios of the sliding-window cloud, from the Gram matrix.

    Parameters
    ----------
    gram : (T, T) array_like
        Frame Gram matrix ``X @ X.T`` of a ``(T, P)`` data matrix.
    dim : int
        Frames per window, ``dim >= 2``.
    tau : int
        Delay in frames, ``tau >= 1``.
    center : bool, optional
        Pointwise-centre each window first (default True).
    normalize : bool, optional
        Unit-normalise each window first (default False).
    n_components : int, optional
        Number of leading ratios returned (default: all ``N``).

    Returns
    -------
    ratios : (n_components,) ndarray of float64
        Fraction of the cloud's total variance along each principal axis, in
        decreasing order; they sum to 1 over all ``N`` components.

    Raises
    ------
    tempofield.errors.InputError
        For a bad ``gram``, window or ``n_components``, or a cloud with no variance.

    Notes
    -----
    With ``C`` the ``(N, N)`` window inner-product matrix and ``J = I - 11^T/N``
    the centring matrix, the PCA variances of the window cloud are the
    eigenvalues of ``J C J / N`` (the Gram-matrix form of PCA); no ``P``-sized
    array is formed. A sinusoid's windows lie on an ellipse (2 components), a
    signal with ``n`` incommensurate or harmonic sinusoids needs ``2 n``.

    References
    ----------
    .. [1] F. Takens, Lecture Notes in Mathematics 898:366-381 (1981).
    .. [2] J. A. Perea and J. Harer, Found. Comput. Math. 15:799-838 (2015).

    Examples
    --------
    >>> import numpy as np
    >>> x = np.cos(2 * np.pi * np.arange(200) / 25)[:, None]
    >>> r = window_pca(x @ x.T, dim=10, tau=2, n_components=3)
    >>> bool(r[:2].sum() > 0.999)
    True
    """
    g = _check_gram(gram)
    n_windows = _check_window(g.shape[0], dim, tau)
    if n_components is not None:
        n_components = _check_int("n_components", n_components, minimum=1,
                                  hint="Pass None for all components.")
        if n_components > n_windows:
            raise InputError(
                f"n_components={n_components} exceeds the number of windows N={n_windows}. "
                f"Ask for at most {n_windows} components."
            )
    eigval, _, _ = _cloud_spectrum(g, int(dim), int(tau), bool(center), bool(normalize))
    total = eigval.sum()
    if total <= 0:
        raise InputError(
            "the sliding-window cloud has no variance (all windows equal); there is no "
            "rhythm to analyse. Check that the frames change over time."
        )
    return (eigval / total)[: n_components or n_windows]


def motion_modes(X, gram, *, dim, tau, n_modes=2, center=True):
    """Principal axes of the sliding-window cloud read back as per-frame pixel patterns.

    Parameters
    ----------
    X : (T, P) array_like
        The data matrix whose Gram matrix is ``gram`` (reshape ``(T, Y, X)`` to
        ``(T, Y*X)``; reshape the result's last axis back to ``(Y, X)``).
    gram : (T, T) array_like
        ``X @ X.T``.
    dim : int
        Frames per window.
    tau : int
        Delay in frames.
    n_modes : int, optional
        Number of leading principal axes (default 2: the plane of a rhythm's loop).
    center : bool, optional
        Pointwise-centre the windows (default True), as in :func:`window_pca`.

    Returns
    -------
    modes : (n_modes, dim, P) ndarray of float64
        Unit-norm principal axes (over the flattened ``dim * P`` window); mode
        ``m`` at delay ``k`` is the pixel pattern of frame ``k`` of that axis.
        The sign of each mode is fixed so its largest-magnitude entry is positive.

    Raises
    ------
    tempofield.errors.InputError
        If shapes disagree or ``n_modes`` exceeds the number of non-zero
        principal variances.

    Notes
    -----
    With ``u_m`` the unit eigenvectors of the double-centred window
    inner-product matrix and ``lambda_m`` its eigenvalues,
    ``axis_m = sum_i u_m[i] (W_i - mean W) / sqrt(lambda_m)``. Since
    ``sum_i u_m[i] = 0`` the mean drops out, and for centred windows
    ``axis_m[k] = v_k - (1/dim) sum_l v_l`` with ``v_k = u_m @ X[k tau : k tau + N]``,
    so no ``(N, dim * P)`` array is formed.

    References
    ----------
    .. [1] J. A. Perea and J. Harer, Found. Comput. Math. 15:799-838 (2015).

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(120)
    >>> X = np.outer(np.cos(2 * np.pi * t / 12), [1.0, -1.0, 0.5])
    >>> modes = motion_modes(X, X @ X.T, dim=4, tau=3)
    >>> modes.shape
    (2, 4, 3)
    >>> bool(np.isclose(np.linalg.norm(modes[0]), 1.0))
    True
    """
    x = as_float(X, np.float64)
    if x.ndim != 2:
        raise InputError(
            f"X must be a (T, P) matrix, got shape {x.shape}. Reshape a (T, Y, X) "
            "stack with X.reshape(T, -1)."
        )
    g = _check_gram(gram)
    if g.shape[0] != x.shape[0]:
        raise InputError(
            f"gram has {g.shape[0]} frames but X has {x.shape[0]}; pass gram = X @ X.T "
            "of the same X."
        )
    n_windows = _check_window(x.shape[0], dim, tau)
    n_modes = _check_int("n_modes", n_modes, minimum=1, hint="Ask for 1 or more modes.")
    eigval, eigvec, _ = _cloud_spectrum(g, int(dim), int(tau), bool(center), False)
    positive = eigval > eigval[0] * 1e-12 if eigval[0] > 0 else np.zeros_like(eigval, bool)
    if n_modes > int(positive.sum()):
        raise InputError(
            f"n_modes={n_modes} but the window cloud has only {int(positive.sum())} "
            f"non-zero principal variances. Ask for at most {int(positive.sum())} modes."
        )
    u = eigvec[:, :n_modes]  # (N, n_modes)
    modes = np.stack([u.T @ x[k * tau : k * tau + n_windows] for k in range(dim)], axis=1)
    if center:
        modes -= modes.mean(axis=1, keepdims=True)
    modes /= np.sqrt(eigval[:n_modes])[:, None, None]
    flat = modes.reshape(n_modes, -1)
    signs = np.sign(flat[np.arange(n_modes), np.argmax(np.abs(flat), axis=1)])
    return modes * np.where(signs == 0, 1.0, signs)[:, None, None]
