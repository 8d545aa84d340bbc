"""Per-pixel phase against a reference rhythm: lock-in, coherence, activation delay.

Every pixel's detrended trace x(t) is projected on e^{-i theta(t)}, where
theta(t) is the phase of its region's reference (from the circular
coordinates, so it follows a drifting rate). The argument of the projection is
the pixel's phase lag behind the reference; splitting the record into segments
and measuring how steady that lag is (the resultant length of the segment
phases) gives the coherence. The lag, turned into time with the region's mean
period and counted from the region's earliest pixel, is the activation delay.
Also the circular statistics the rest of the package uses. Pure numpy.
"""

from __future__ import annotations

import numpy as np

from tempofield._dtypes import as_float
from tempofield.errors import InputError

TWO_PI = 2.0 * np.pi


# ------------------------------------------------------------------ circular statistics
def circular_mean(angles, axis=None) -> np.ndarray:
    """Mean direction of angles in radians, in [0, 2 pi).

    Examples
    --------
    >>> round(float(circular_mean([0.1, 2 * np.pi - 0.1])), 6)
    0.0
    """
    a = np.asarray(angles, float)
    return np.mod(np.arctan2(np.sin(a).mean(axis=axis), np.cos(a).mean(axis=axis)), TWO_PI)


def resultant_length(angles, axis=None) -> np.ndarray:
    """Mean resultant length R = |mean(e^{i angle})| in [0, 1] (Mardia & Jupp 2000).

    Examples
    --------
    >>> round(float(resultant_length([0.785, 1.570, 3.141, 0.839, 5.934])), 5)
    0.49723
    """
    a = np.asarray(angles, float)
    return np.hypot(np.cos(a).mean(axis=axis), np.sin(a).mean(axis=axis))


def rayleigh_test(angles) -> tuple[float, float]:
    """Rayleigh test of uniformity: (Z = n R^2, p-value).

    Notes
    -----
    p = exp(sqrt(1 + 4n + 4(n^2 - Z^2)) - (1 + 2n)), the approximation given by
    Zar (1999) and Fisher (1993), accurate for small n.

    References
    ----------
    Fisher, N. I. (1993). Statistical Analysis of Circular Data. Cambridge
    University Press. Mardia, K. V. & Jupp, P. E. (2000). Directional
    Statistics. Wiley.

    Examples
    --------
    >>> z, p = rayleigh_test([0.785, 1.570, 3.141, 0.839, 5.934])
    >>> round(z, 3), round(p, 4)
    (1.236, 0.3048)
    """
    a = np.asarray(angles, float).ravel()
    n = a.size
    if n < 2:
        raise InputError(f"rayleigh_test needs at least 2 angles; got {n}.")
    r = float(resultant_length(a))
    z = n * r * r
    p = float(np.exp(np.sqrt(1 + 4 * n + 4 * (n * n - (n * r) ** 2)) - (1 + 2 * n)))
    return z, min(1.0, max(0.0, p))


# ------------------------------------------------------------------ reference on frames
def theta_on_frames(time_s, theta_rad, frame_times_s) -> np.ndarray:
    """The reference phase, unwrapped, at every frame time.

    Inside the reference's time span the unwrapped phase is interpolated
    linearly; beyond it (the first and last half window of a sliding-window
    reference) it is extended with the mean rate of the nearest cycle.

    Parameters
    ----------
    time_s, theta_rad : (n,) array_like
        The reference's sample times (increasing) and phase.
    frame_times_s : (T,) array_like
        Times to evaluate at.

    Returns
    -------
    (T,) ndarray of float64, unwrapped radians.

    Examples
    --------
    >>> t = np.arange(10, 20) * 0.1
    >>> th = theta_on_frames(t, np.mod(2 * np.pi * t, 2 * np.pi), np.arange(30) * 0.1)
    >>> bool(np.allclose(np.diff(th), 2 * np.pi * 0.1))
    True
    """
    t = np.asarray(time_s, float)
    u = np.unwrap(np.asarray(theta_rad, float))
    tf = np.asarray(frame_times_s, float)
    if t.size < 2:
        raise InputError("a reference needs at least 2 samples to be put on frames.")
    out = np.interp(tf, t, u)
    span = max(t[-1] - t[0], 1e-12)
    mean_rate = (u[-1] - u[0]) / span
    # slope near each end over about one cycle (or the whole span if shorter)
    cycle_s = TWO_PI / mean_rate if mean_rate > 0 else span
    head = t <= t[0] + cycle_s
    tail = t >= t[-1] - cycle_s
    slope0 = (u[head][-1] - u[0]) / max(t[head][-1] - t[0], 1e-12) if head.sum() > 1 else mean_rate
    slope1 = (u[-1] - u[tail][0]) / max(t[-1] - t[tail][0], 1e-12) if tail.sum() > 1 else mean_rate
    before, after = tf < t[0], tf > t[-1]
    out[before] = u[0] + slope0 * (tf[before] - t[0])
    out[after] = u[-1] + slope1 * (tf[after] - t[-1])
    return out


def smooth_over_period(theta_unwrapped, period_frames: float) -> np.ndarray:
    """Moving mean of an unwrapped phase over one period.

    The circular coordinate of a loop advances unevenly within each cycle (it
    follows the geometry of the loop, not the clock). A mean over exactly one
    period removes that periodic wobble and its harmonics while keeping a
    linear or slowly drifting phase; it is what makes per-pixel lags
    proportional to activation delays. The ends are extended by one period
    (the first and last period shifted by their own advance) before averaging.

    Examples
    --------
    >>> n = np.arange(200.0)
    >>> th = 2 * np.pi * n / 20 + 0.3 * np.sin(2 * np.pi * n / 20)
    >>> bool(np.allclose(smooth_over_period(th, 20.0), 2 * np.pi * n / 20, atol=1e-9))
    True
    """
    u = np.asarray(theta_unwrapped, float)
    w = int(round(period_frames))
    if w < 2 or u.size < 2 * w:
        return u.copy()
    # One period before the start looks like the first period shifted back by
    # its own advance (exact for a periodic wobble on a linear phase); same at the end.
    ext = np.concatenate([u[:w] - (u[w] - u[0]), u, u[-w:] + (u[-1] - u[-1 - w])])
    # weights of a mean over exactly `period_frames` samples (fractional ends)
    frac = period_frames - (w - 1)
    ker = np.ones(w + 1)
    ker[0] = ker[-1] = frac / 2 if w + 1 > 2 else 0.5
    ker /= ker.sum()
    sm = np.convolve(ext, ker, mode="same")
    return sm[w:w + u.size]


def even_phase(theta_unwrapped, smoothed, n_bins: int = 32) -> np.ndarray:
    """A phase with its average within-cycle unevenness removed, its cycle-to-cycle timing kept.

    A loop's circular coordinate advances unevenly within each cycle (it
    follows the loop's geometry), by about the same profile every cycle.
    :func:`smooth_over_period` removes that profile but also averages each
    cycle's timing with its neighbours' (a mean over one period halves an
    alternation of short and long beats). Here the profile itself is
    estimated, as the mean of ``theta - smoothed`` in ``n_bins`` bins of the
    phase over the whole record, and subtracted: what varies from one cycle
    to the next (the beat-to-beat intervals) is left as it was.

    Parameters
    ----------
    theta_unwrapped, smoothed : (T,) ndarray
        The phase at every frame and its :func:`smooth_over_period`.

    Examples
    --------
    >>> n = np.arange(400.0)
    >>> clock = 2 * np.pi * n / 20
    >>> th = clock + 0.3 * np.sin(clock)          # the same wobble every cycle
    >>> bool(np.abs(even_phase(th, smooth_over_period(th, 20.0)) - clock).max() < 0.02)
    True
    """
    u = np.asarray(theta_unwrapped, float)
    wobble = u - np.asarray(smoothed, float)
    at = np.mod(u, TWO_PI)
    which = np.minimum((at / TWO_PI * n_bins).astype(int), n_bins - 1)
    counts = np.bincount(which, minlength=n_bins)
    filled = counts > 0
    if not filled.any():
        return u.copy()
    # each filled bin: the mean wobble at the mean phase of its samples; linear in between (circularly)
    where = (np.bincount(which, weights=at, minlength=n_bins)[filled] / counts[filled])
    profile = np.bincount(which, weights=wobble, minlength=n_bins)[filled] / counts[filled]
    ext_x = np.concatenate([where[-1:] - TWO_PI, where, where[:1] + TWO_PI])
    ext_p = np.concatenate([profile[-1:], profile, profile[:1]])
    return u - np.interp(at, ext_x, ext_p)


#: Coherence segments are Hann windows (in the reference's phase) twice this many
#: cycles long, each starting this many cycles after the one before. Their spectra
#: lie within +-f/SEGMENT_HOP_CYCLES of the rate f (main lobe), which is what
#: lets the lock-in be read from a band of each pixel's spectrum.
SEGMENT_HOP_CYCLES = 1


def lockin_basis(theta_frames, max_segments: int = 32) -> np.ndarray:
    """Real (2 + 2K, T) matrix whose product with (T, n) traces gives the lock-in sums.

    Rows 0-1: cos and sin of theta weighted by a Hann taper over the whole
    record (the phase estimate). Rows 2k+2, 2k+3: cos and sin of theta under
    the k-th of K overlapping segment windows (the coherence estimate).

    A segment window is a Hann window of the reference's phase: it spans
    2g whole cycles of theta (g = ``SEGMENT_HOP_CYCLES``, more when a long
    record would give more than ``max_segments``) and starts g cycles after
    the one before, so the windows follow a drifting rate and add up to one
    between the first and last hop. (A record of fewer than three cycles
    gets two overlapping halves in time.) Because each window (and
    the whole-record taper) is smooth and spans whole cycles, the
    double-frequency term of cos(theta - phi) e^{-i theta} cancels in each
    sum (without that, the leak would bend the lag by up to 1/(2 pi cycles)),
    and each row's spectrum stays within about +-f/g of the rate f, so the
    sums can also be read from a band of the traces' spectra
    (:func:`band_lockin_weights`).

    Parameters
    ----------
    theta_frames : (T,) array_like
        Unwrapped reference phase at every frame, increasing.
    max_segments : int
        At most about this many segments (g grows for long records).
    """
    th = np.asarray(theta_frames, float)
    t = th.size
    taper = 0.5 - 0.5 * np.cos(2 * np.pi * (np.arange(t) + 0.5) / t)
    cycles = (th - th[0]) / TWO_PI
    n_cycles = float(cycles[-1])
    hop = max(SEGMENT_HOP_CYCLES, int(np.ceil(n_cycles / (max_segments + 1))))
    n_seg = int(np.floor(n_cycles / hop)) - 1
    if n_seg < 2:  # too few cycles for two segments: two overlapping halves of the record, in time
        cycles = np.arange(t) / max(t - 1, 1)
        hop, n_seg = 1.0 / 3.0, 2
    basis = np.zeros((2 + 2 * n_seg, t), np.float32)
    basis[0] = taper * np.cos(th)
    basis[1] = taper * np.sin(th)
    for k in range(n_seg):
        v = (cycles - k * hop) / (2 * hop)
        w = np.where((v > 0) & (v < 1), np.sin(np.pi * np.clip(v, 0, 1)) ** 2, 0.0)
        basis[2 + 2 * k] = w * np.cos(th)
        basis[3 + 2 * k] = w * np.sin(th)
    return basis


def kept_band_bins(rate_range_hz, bin_hz: float, n_bins: int) -> tuple[int, int]:
    """The rFFT bins [a, b) of each pixel's spectrum the maps pass keeps for the lock-in.

    A reference's rate lies in the rate band [f_lo, f_hi]; the lock-in rows
    of :func:`lockin_basis` spread their spectra over about +-f/g around it
    (g = ``SEGMENT_HOP_CYCLES``), with sidelobes that fall off fast. The kept
    band is [f_lo (1 - 1/g), f_hi (1 + 1/g)] widened by ``KEPT_MARGIN_BINS``
    on each side (with g = 1: from 0 to twice the top of the band). Whether
    a particular reference's rows really lie inside is checked when they are
    known (:func:`band_lockin_weights`).

    Examples
    --------
    >>> kept_band_bins((0.5, 3.0), 1 / 12, 301)
    (0, 78)
    """
    lo, hi = rate_range_hz
    g = SEGMENT_HOP_CYCLES
    a = int(np.floor(lo * (1 - 1 / g) / bin_hz)) - KEPT_MARGIN_BINS
    b = int(np.ceil(hi * (1 + 1 / g) / bin_hz)) + KEPT_MARGIN_BINS + 1
    return max(0, a), min(n_bins, b)


#: Bins kept beyond the band the lock-in rows' main lobes can reach.
KEPT_MARGIN_BINS = 5

#: Largest fraction of a lock-in row's energy allowed outside the kept band
#: (its amplitude share is the square root: 1 %). Beyond it the engine reads
#: the stack a second time instead.
MAX_BAND_LEAK = 1e-4


def _row_spectra(basis) -> tuple[np.ndarray, np.ndarray]:
    """rFFT of each row of a (R, T) matrix and the Parseval weight of each bin
    (1 at 0 and at Nyquist, 2 elsewhere)."""
    b = np.asarray(basis, float)
    spec = np.fft.rfft(b, axis=1)
    c = np.full(spec.shape[1], 2.0)
    c[0] = 1.0
    if b.shape[1] % 2 == 0:
        c[-1] = 1.0
    return spec, c


def narrowest_band(bases, band: tuple[int, int], max_leak: float) -> tuple[int, int]:
    """The narrowest bins [lo, hi) inside ``band`` that hold all but ``max_leak`` of every row's energy.

    ``bases`` is a list of (R, T) lock-in matrices. The phase stage reads and
    multiplies only these bins of the kept spectra: a reference at rate f
    needs about 0 .. 2f, not the whole kept band up to twice the top of the
    rate band. Half of the allowance goes to each side.

    Examples
    --------
    >>> th = 2 * np.pi * 1.2 * np.arange(600) * 0.02
    >>> narrowest_band([lockin_basis(th)], (0, 78), 1e-4)
    (1, 35)
    """
    energy = []
    for b in bases:
        spec, c = _row_spectra(b)
        e = c * np.abs(spec) ** 2
        energy.append(e / np.maximum(e.sum(axis=1, keepdims=True), 1e-300))
    e = np.concatenate(energy)  # (rows, bins), each row sums to 1
    lo, hi = band
    below = np.cumsum(e, axis=1)  # energy of bins < k+1
    while lo + 1 < hi and np.all(below[:, lo] <= max_leak / 2):
        lo += 1
    above = np.cumsum(e[:, ::-1], axis=1)[:, ::-1]  # energy of bins >= k
    while hi - 1 > lo and np.all(above[:, hi - 1] <= max_leak / 2):
        hi -= 1
    return lo, hi


def band_lockin_weights(basis, band: tuple[int, int]) -> tuple[np.ndarray, float]:
    """Weights that give ``basis @ x`` from bins ``band`` of rfft(x): ((R, 2 (b - a)) float32, leak).

    By Parseval, for real b and x of length T,
    sum_t b(t) x(t) = (1/T) sum_k c_k Re(B_k conj(X_k)) over the rFFT bins,
    with c_k = 1 at 0 and at Nyquist and 2 elsewhere. Keeping only bins
    a..b-1 gives the product for any x when every row's spectrum lies in
    those bins; ``leak`` is the largest fraction of a row's energy outside
    them, and the error of each sum is at most sqrt(leak) times the norms of
    the row and of the trace's out-of-band part (Cauchy-Schwarz).

    The returned matrix multiplies the stacked real and imaginary parts
    [Re X[a:b]; Im X[a:b]] (2 (b - a), n).

    Examples
    --------
    >>> th = 2 * np.pi * 1.2 * np.arange(600) * 0.02
    >>> b = lockin_basis(th)
    >>> w, leak = band_lockin_weights(b, kept_band_bins((0.5, 3.0), 1 / 12, 301))
    >>> x = np.cos(th - 0.7) + 0.3 * np.cos(3 * th)
    >>> spec = np.fft.rfft(x)[slice(*kept_band_bins((0.5, 3.0), 1 / 12, 301))]
    >>> bool(np.allclose(w @ np.concatenate([spec.real, spec.imag]), b @ x, atol=1e-3)), leak < 1e-4
    (True, True)
    """
    t = np.shape(basis)[1]
    spec, c = _row_spectra(basis)
    energy = (c * np.abs(spec) ** 2).sum(axis=1)
    a, z = band
    inside = (c[a:z] * np.abs(spec[:, a:z]) ** 2).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        leak = float(np.max(np.where(energy > 0, 1.0 - inside / energy, 0.0)))
    part = spec[:, a:z] * (c[a:z] / t)
    weights = np.concatenate([part.real, part.imag], axis=1).astype(np.float32)
    return weights, max(0.0, leak)


def lockin(traces, basis) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Phase lag, coherence and lock-in amplitude of each trace against a reference.

    Parameters
    ----------
    traces : (T, n) ndarray
        Detrended traces (integers become float32).
    basis : (2 + 2K, T) ndarray
        From :func:`lockin_basis` for the reference's phase on the frames.

    Returns
    -------
    phase_rad : (n,) float32 in [0, 2 pi)
        Lag of the trace behind the reference: x(t) ~ A cos(theta(t) - phase).
    coherence : (n,) float32 in [0, 1]
        Resultant length of the K segment phases: 1 when the lag is the same in
        every segment, about sqrt(pi / 4K) for noise.
    amplitude : (n,) float32
        A estimated from the tapered whole-record projection: 2 |z| / sum(taper).

    Notes
    -----
    For x = A cos(theta - phi): sum w x e^{-i theta} ~ (A / 2) sum(w) e^{-i phi},
    so phi = -arg(z). Per segment k the same gives z_k; coherence is
    |sum_k z_k / |z_k|| / K (Mardia & Jupp 2000).

    Examples
    --------
    >>> th = 2 * np.pi * 1.3 * np.arange(300) * 0.05
    >>> x = np.cos(th - 1.0)[:, None]
    >>> ph, coh, amp = lockin(x, lockin_basis(th))
    >>> round(float(ph[0]), 4), round(float(coh[0]), 3), round(float(amp[0]), 3)
    (1.0, 1.0, 1.0)
    """
    x = as_float(traces)
    b = as_float(basis)
    if b.shape[1] != x.shape[0]:
        raise InputError(f"lock-in basis has {b.shape[1]} frames but traces have {x.shape[0]}.")
    return lockin_from_projection(b @ x, basis)


def lockin_from_projection(proj, basis) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`lockin` from the products ``basis @ traces`` (2 + 2K, n) already made.

    The products are linear in the traces, so the lock-in of a spatially
    pooled trace is the pooled products: the engine pools these few rows
    instead of every frame.
    """
    from tempofield.kernels import _phase_loops

    b = as_float(basis)
    proj = np.ascontiguousarray(proj, np.float32)
    z_re, z_im = proj[0], -proj[1]
    phase = np.mod(-np.arctan2(z_im, z_re), TWO_PI).astype(np.float32)
    coherence = np.empty(proj.shape[1], np.float32)
    _phase_loops.segment_resultant(proj, coherence)  # one compiled pass over the segment rows
    taper_sum = float(np.hypot(b[0], b[1]).sum())
    amplitude = 2.0 * np.hypot(z_re, z_im) / taper_sum
    return phase, coherence, amplitude.astype(np.float32)


def locked_score(amplitude, noise_power, n_frames: int) -> np.ndarray:
    """The matched test of a known rhythm: lock-in power over the white-noise level of a spectrum bin.

    Parameters
    ----------
    amplitude : ndarray
        Lock-in amplitudes from :func:`lockin` (``2 |z| / sum(taper)``, with
        the whole-record Hann taper of :func:`lockin_basis`, whose sum is T / 2).
    noise_power : ndarray
        White-noise power of one bin of the Hann-windowed spectrum of the same
        traces (``noise_power`` of :func:`tempofield.kernels.spectral.spectral_maps`).
    n_frames : int
        T.

    Returns
    -------
    ndarray
        ``|z|^2 / noise_power``. For white noise E|z|^2 = sigma^2 sum(taper^2)
        equals the bin's noise power, and ``|z|^2 / noise_power`` is
        exponentially distributed with mean 1: ``score > -ln(p)`` has
        probability ``p`` on noise (Kay 1998, Fundamentals of Statistical Signal
        Processing: Detection Theory, the matched detector of a known signal
        of unknown phase).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> th = 2 * np.pi * 1.3 * np.arange(300) * 0.04
    >>> _, _, amp = lockin(rng.normal(size=(300, 20000)), lockin_basis(th))
    >>> score = locked_score(amp, np.full(20000, 3 * 300 / 8), 300)   # sigma = 1: sum(w^2) = 3T/8
    >>> round(float(score.mean()), 1), bool(abs(np.mean(score > -np.log(0.01)) - 0.01) < 0.003)
    (1.0, True)
    """
    amplitude = np.asarray(amplitude, np.float64)
    z = amplitude * (n_frames / 2.0) / 2.0
    with np.errstate(invalid="ignore", divide="ignore"):
        return z * z / np.asarray(noise_power, np.float64)


def earliest_phase(phase_rad, weights=None, *, quantile: float = 0.01) -> float:
    """The phase of a region's earliest pixels: the start of the arc its lags occupy.

    The lags of a travelling wave fill an arc of the circle; the arc starts
    after the largest empty gap. The lags are rotated so that gap is at 0 and
    a low quantile (robust to a few noisy pixels) is taken as the earliest.

    Examples
    --------
    >>> round(earliest_phase(np.array([6.0, 6.2, 0.1, 0.3]), quantile=0.0), 3)
    6.0
    """
    ph = np.mod(np.asarray(phase_rad, float).ravel(), TWO_PI)
    ph = ph[np.isfinite(ph)]
    if ph.size == 0:
        return float("nan")
    s = np.sort(ph)
    gaps = np.diff(np.concatenate([s, [s[0] + TWO_PI]]))
    start = s[(np.argmax(gaps) + 1) % s.size]
    rotated = np.mod(ph - start, TWO_PI)
    return float(np.mod(start + np.quantile(rotated, quantile), TWO_PI))


def activation_delay(phase_rad, period_s: float, phase0: float) -> np.ndarray:
    """Delay after the earliest pixel: ((phase - phase0) mod 2 pi) / 2 pi * period, in [0, period).

    Examples
    --------
    >>> [round(float(v), 3) for v in activation_delay(np.array([0.5, 0.1]), 2.0, 0.5)]
    [0.0, 1.873]
    """
    d = np.mod(np.asarray(phase_rad, float) - phase0, TWO_PI) / TWO_PI * period_s
    return np.where(d >= period_s, 0.0, d).astype(np.float32)
