"""Per-pixel spectral kernels on (T, n) blocks of traces.

For each trace: a Hann-windowed periodogram with the slow trend removed, its highest peak inside the
user's rate band (with an octave check so a spiky beat is not reported at a
harmonic), the peak refined below one bin by a parabola through the log
magnitudes, the amplitude of that component in input units, a periodicity
score, and a detection decision with a stated false-alarm probability on white
noise. One scipy rFFT per block; the window, the trend removal and the
per-trace search run in compiled loops (:mod:`tempofield.kernels._spectral_loops`). The engine
feeds it tiles, one band of rows at a time.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
import scipy.fft

from tempofield._dtypes import as_float
from tempofield.errors import InputError
from tempofield.kernels import _preprocess_loops, _spectral_loops

# The kept spectra's 16-bit storage (block floating point), for the engine's temporary file.
from tempofield.kernels._spectral_loops import pack_fixed, unpack_fixed  # noqa: E402,F401

#: Columns of a tile handed to one FFT call: about a thousand traces keep the
#: working set in cache. Power-of-two widths (1024, 4096) were measured about
#: 1.6x slower (cache aliasing, 2-core machines, 600-frame stack); narrower
#: bands of 260-640 traces 1-13 % slower (DEVELOPERS.md, "Benchmarks").
FFT_BLOCK_COLUMNS = 1000

#: Effective number of independent noise ordinates = (ordinates used for the
#: median: every other one above the trend bins) / this divisor, for the
#: median's efficiency (0.48); see :func:`plan_spectrum`.
NOISE_DOF_DIVISOR = 2.1

#: Bins past the trend bins (and the band's lowest bin) in which the windowed
#: trend components are subtracted, see :func:`spectral_maps`.
TREND_LEAK_BINS = 12

#: Harmonics (including the fundamental) counted by the periodicity score.
N_HARMONICS = 5

#: Outputs of :func:`spectral_maps`, in the order the compiled kernel fills them.
MAP_KEYS = ("rate_bpm", "period_s", "amplitude", "periodicity", "peak_score", "detected", "constant", "mean",
            "noise_power")


@dataclass(frozen=True)
class SpectralPlan:
    """Frequencies and band limits shared by every trace of one recording.

    Build it with :func:`plan_spectrum`, which checks the band against the
    Nyquist frequency and the recording length.
    """

    n_frames: int
    frame_interval_s: float
    band_bins: tuple[int, int]
    trend_bins: int
    false_alarm: float
    threshold: float

    @property
    def bin_hz(self) -> float:
        """Frequency resolution 1 / (T dt) in Hz."""
        return 1.0 / (self.n_frames * self.frame_interval_s)

    @property
    def n_bins(self) -> int:
        return self.n_frames // 2 + 1


def plan_spectrum(n_frames: int, frame_interval_s: float, rate_range_bpm, *,
                  false_alarm: float = 1e-3, min_cycles: float = 3.0,
                  trend_cutoff_fraction: float = 0.5) -> SpectralPlan:
    """Check a rate band against a recording and fix the bins to search.

    Parameters
    ----------
    n_frames : int
        Number of frames T.
    frame_interval_s : float
        Seconds between frames.
    rate_range_bpm : (float, float)
        Lowest and highest rate to look for, beats per minute.
    false_alarm : float, keyword-only
        Probability that a trace of white noise is declared rhythmic.
    min_cycles : float, keyword-only
        The recording must last this many periods of the lowest rate.
    trend_cutoff_fraction : float, keyword-only
        Trends below this fraction of the lowest rate are not signal.

    Returns
    -------
    SpectralPlan

    Raises
    ------
    InputError
        If the band reaches the Nyquist frequency 1/(2 dt) (the rhythm would
        alias, Shannon 1949), if the recording is shorter than ``min_cycles``
        periods of the lowest rate, or if the band holds no frequency bin.

    Notes
    -----
    The detection threshold comes from the periodogram of white noise, whose
    ordinates divided by their mean are exponential. The mean is not known:
    it is estimated from the median of every other ordinate above the trend
    bins (n of them; skipping neighbours avoids the Hann window's correlation),
    so the ratio of a bin to the estimate follows (nearly) an F(2, 2 n_eff)
    law, with tail P(ratio > x) = (1 + x / n_eff)^(-n_eff), where
    n_eff = n / 2.1 because the median has 48 % of the mean's efficiency for
    an exponential law. The largest of the m band bins exceeds x with
    probability 1 - (1 - P)^m, which is set to ``alpha`` (tested on white
    noise in the suite).

    Examples
    --------
    >>> p = plan_spectrum(600, 0.05, (30, 180))
    >>> round(p.bin_hz, 4), p.band_bins
    (0.0333, (15, 90))
    """
    lo_bpm, hi_bpm = rate_range_bpm
    dt = float(frame_interval_s)
    nyquist_hz = 0.5 / dt
    if hi_bpm / 60.0 >= nyquist_hz:
        raise InputError(
            f"rate_range_bpm upper limit {hi_bpm:g} bpm ({hi_bpm / 60:.3g} Hz) is at or above the "
            f"Nyquist frequency {nyquist_hz:.3g} Hz ({nyquist_hz * 60:.4g} bpm) of a recording with "
            f"frame interval {dt:g} s: such a rhythm cannot be measured. Lower the upper rate below "
            f"{nyquist_hz * 60:.4g} bpm, or record faster (at least twice the beat frequency).")
    duration = n_frames * dt
    if duration * lo_bpm / 60.0 < min_cycles:
        raise InputError(
            f"the recording lasts {duration:.3g} s ({n_frames} frames), fewer than {min_cycles:g} cycles "
            f"of the lowest rate {lo_bpm:g} bpm. Raise the lower rate to at least "
            f"{min_cycles * 60.0 / duration:.3g} bpm, or analyse a longer recording.")
    df = 1.0 / duration
    k_lo = max(1, int(np.ceil(lo_bpm / 60.0 / df - 1e-9)))
    k_hi = min(n_frames // 2 - 1, int(np.floor(hi_bpm / 60.0 / df + 1e-9)))
    if k_hi < k_lo:
        raise InputError(
            f"the rate band {lo_bpm:g}-{hi_bpm:g} bpm is narrower than the frequency resolution "
            f"{df * 60:.3g} bpm of a {duration:.3g} s recording; widen the band.")
    trend_bins = int(np.floor(2 * n_frames * dt * trend_cutoff_fraction * lo_bpm / 60.0))
    m = k_hi - k_lo + 1
    p_bin = -np.expm1(np.log1p(-false_alarm) / m)  # per-bin level so that max over m bins has level alpha
    n_eff = max(4.0, (n_frames // 2 - trend_bins) / 2 / NOISE_DOF_DIVISOR)
    threshold = float(n_eff * (p_bin ** (-1.0 / n_eff) - 1.0))
    return SpectralPlan(n_frames, dt, (k_lo, k_hi), trend_bins, float(false_alarm), threshold)


@functools.lru_cache(maxsize=16)
def fft_tables(n_frames: int):
    """Radices and twiddle tables of :func:`tempofield.kernels._spectral_loops.rfft_columns` for T = ``n_frames``,
    or None when T is odd or T/2 has a prime factor above 5 (those go to scipy).

    Each stage's twiddles exp(-2 pi i p k / n) are computed in float64 from
    the exact integer p k mod n and rounded once to float32.

    Examples
    --------
    >>> fft_tables(600)[0].tolist()
    [4, 3, 5, 5]
    >>> fft_tables(602) is None
    True
    """
    if n_frames % 2 or n_frames < 4:
        return None
    half, left, radices = n_frames // 2, n_frames // 2, []
    for r in (4, 2, 3, 5):
        while left % r == 0:
            radices.append(r)
            left //= r
    if left != 1:
        return None
    firsts, re, im, n = [], [], [], half
    for r in radices:
        m = n // r
        pk = (np.arange(m)[:, None] * np.arange(r)[None, :]) % n
        firsts.append(sum(a.size for a in re))
        re.append(np.cos(2 * np.pi * pk / n).ravel())
        im.append(-np.sin(2 * np.pi * pk / n).ravel())
        n = m
    k = np.arange(half + 1)
    return (np.array(radices, np.int64), np.array(firsts, np.int64),
            np.concatenate(re).astype(np.float32), np.concatenate(im).astype(np.float32),
            np.cos(np.pi * k / half).astype(np.float32), (-np.sin(np.pi * k / half)).astype(np.float32))


def rfft_time(x: np.ndarray, basis_t=None, coef=None) -> np.ndarray:
    """rFFT along axis 0 of (T, n) float32 traces (C order): (T//2 + 1, n) complex64.

    A compiled mixed-radix transform (:func:`tempofield.kernels._spectral_loops.rfft_columns`)
    where T allows it; otherwise scipy's. With ``basis_t`` (K, T) float32,
    also fills ``coef`` (K, n) with ``basis_t @ x`` in an order that does
    not depend on the other traces (:func:`tempofield.kernels._spectral_loops.trend_coefficients`).

    Examples
    --------
    >>> x = np.random.default_rng(0).normal(size=(600, 5)).astype(np.float32)
    >>> bool(np.allclose(rfft_time(x), scipy.fft.rfft(x, axis=0), atol=1e-4))
    True
    """
    x = np.ascontiguousarray(x, np.float32)
    if basis_t is None:
        basis_t, coef = np.zeros((0, x.shape[0]), np.float32), np.zeros((0, x.shape[1]), np.float32)
    tables = fft_tables(x.shape[0])
    if tables is None:
        _spectral_loops.trend_coefficients(x, basis_t, coef)
        return scipy.fft.rfft(x, axis=0)
    spec = np.empty((x.shape[0] // 2 + 1, x.shape[1]), np.complex64)
    _spectral_loops.rfft_columns(x, *tables, spec.view(np.float32), basis_t, coef)
    return spec


def hann_window(n: int) -> np.ndarray:
    """Periodic Hann window of length n, float32."""
    return (0.5 - 0.5 * np.cos(2 * np.pi * np.arange(n) / n)).astype(np.float32)


def spectral_maps(traces, plan: SpectralPlan, trend_basis=None) -> dict[str, np.ndarray]:
    """Rate, period, amplitude, periodicity and detection for each trace.

    Parameters
    ----------
    traces : (T, n) ndarray
        Traces, one per column (float32 kept; integers become float32).
    trend_basis : (T, K) ndarray, optional
        Orthonormal slow-trend basis (:func:`tempofield.kernels.preprocess.trend_basis`).
        When given, the traces' trend components are removed in the frequency
        domain: their windowed spectrum, ``FFT(w Q) (Q^T x)``, is subtracted
        from the lowest bins, where it lies (the Hann window's side lobes fall
        by 18 dB per octave, so beyond ``TREND_LEAK_BINS`` past the trend bins
        the remainder is below 1e-4 of the trend). This equals detrending in
        time there, for a fraction of the cost.
    plan : SpectralPlan
        From :func:`plan_spectrum` for the same T and frame interval.

    Returns
    -------
    dict of (n,) float32 arrays
        ``rate_bpm``, ``period_s``, ``amplitude`` (in input units, of the
        rhythm's fundamental; NaN where not detected), ``periodicity`` in
        [0, 1] (defined for every trace), ``peak_score`` (peak power over the
        white-noise level), ``detected`` (0/1) and ``constant`` (1 where the
        trace does not change at all; never detected), ``mean`` (the
        Hann-weighted mean intensity, for display) and ``noise_power`` (the
        white-noise level: the mean power of a bin of the Hann-windowed
        spectrum without a rhythm, from the median over the band, for any
        trace; the level a lock-in against a known reference is tested at).

    Notes
    -----
    Peak refinement (Hann window, parabola through the natural logs of the
    three magnitudes around the peak bin k):
    delta = (ln|X[k+1]| - ln|X[k-1]|) / (2 (2 ln|X[k]| - ln|X[k-1]| - ln|X[k+1]|)),
    f = (k + delta) / (T dt), and amplitude = 2 |X[k]| / (sum(w) W(delta)) with
    the Hann response W(d) = sinc(d) / (1 - d^2). Periodicity is the share of the
    detrended power within one bin of the first five harmonics.

    References
    ----------
    Quinn, B. G. (1994). Estimating frequency by interpolation using Fourier
    coefficients. IEEE Trans. Signal Process. 42, 1264-1268.
    Jacobsen, E. & Kootsookos, P. (2007). Fast, accurate frequency estimators.
    IEEE Signal Process. Mag. 24(3), 123-125.

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(400) * 0.05
    >>> x = np.sin(2 * np.pi * 1.3 * t)[:, None]
    >>> out = spectral_maps(x, plan_spectrum(400, 0.05, (30, 180)))
    >>> round(float(out["rate_bpm"][0]), 2), round(float(out["amplitude"][0]), 2)
    (78.0, 1.0)
    """
    x = as_float(traces)
    if x.ndim != 2 or x.shape[0] != plan.n_frames:
        raise InputError(f"traces must be (T={plan.n_frames}, n); got shape {x.shape}.")
    n = x.shape[1]
    out = {k: np.empty(n, np.float32) for k in MAP_KEYS}
    kernel = SpectralKernel(plan, trend_basis)
    for start in range(0, n, FFT_BLOCK_COLUMNS):
        sl = slice(start, min(n, start + FFT_BLOCK_COLUMNS))
        block = kernel.maps(x[:, sl])
        for i, key in enumerate(MAP_KEYS):
            out[key][sl] = block[i]
    return out


class SpectralKernel:
    """:func:`spectral_maps` on one block of traces, with the trend spectrum made once.

    The engine hands it each band of a tile's rows (:meth:`pooled_maps`),
    which one compiled call pools and analyses (:mod:`tempofield.kernels._spectral_loops`).

    Examples
    --------
    >>> t = np.arange(400) * 0.05
    >>> x = np.sin(2 * np.pi * 1.3 * t)[:, None].astype(np.float32)
    >>> out = SpectralKernel(plan_spectrum(400, 0.05, (30, 180))).maps(x)
    >>> round(float(out[MAP_KEYS.index("rate_bpm"), 0]), 2)
    78.0
    """

    def __init__(self, plan: SpectralPlan, trend_basis=None, n_bins_trend=None, keep_band=None):
        self.plan = plan
        self.keep_band = keep_band
        window = hann_window(plan.n_frames)
        self.window_sum = float(window.sum())
        k_cut = 0
        q = np.zeros((plan.n_frames, 0), np.float32)
        if trend_basis is not None:
            k_cut = n_bins_trend or min(plan.n_bins, plan.band_bins[0] + plan.trend_bins + TREND_LEAK_BINS)
            q = as_float(trend_basis)
        q_spec = scipy.fft.rfft(q * window[:, None], axis=0)[:k_cut]
        self.trend_basis_t = np.ascontiguousarray(q.T)
        self.trend_re = np.ascontiguousarray(q_spec.real, np.float32)
        self.trend_im = np.ascontiguousarray(q_spec.imag, np.float32)
        if keep_band is not None:  # the trend components' plain spectrum in the kept bins
            q_plain = scipy.fft.rfft(q, axis=0)[keep_band[0]:keep_band[1]]
            self.keep_re = np.ascontiguousarray(q_plain.real, np.float32)
            self.keep_im = np.ascontiguousarray(q_plain.imag, np.float32)

    def _spectrum_power(self, traces, kept=None):
        """Windowed, detrended power ((F, n) float32) and windowed sums ((n,)) of (T, n) traces;
        with ``kept``, also the kept band (see :meth:`maps`). A step at a time over all traces
        (:meth:`pooled_maps` does the same per block of traces)."""
        x = np.ascontiguousarray(traces, np.float32)  # a strided column block makes the FFT 2x slower
        t, n = x.shape
        power = np.empty((t // 2 + 1, n), np.float32)
        dc = np.empty(n, np.float32)
        coef = np.empty((self.trend_basis_t.shape[0], n), np.float32)
        spec = rfft_time(x, basis_t=self.trend_basis_t, coef=coef)
        sr, si = np.ascontiguousarray(spec.real, np.float32), np.ascontiguousarray(spec.imag, np.float32)
        if kept is not None:
            _spectral_loops.kept_band(sr, si, n, self.keep_band[0], coef, self.keep_re, self.keep_im, kept, 0)
        _spectral_loops.windowed_power(sr, si, n, t, coef, 0, self.trend_re, self.trend_im, power, dc, 0)
        return power, dc

    def power(self, traces):
        """Hann-windowed, detrended periodogram of (T, n) traces: ((F, n) float32, each trace's windowed sum).

        One plain rFFT along time; the window and the trend removal are applied
        to the spectrum in one compiled loop (:func:`tempofield.kernels._spectral_loops.windowed_power`),
        which equals windowing and detrending in time.
        """
        return self._spectrum_power(traces)

    def maps(self, traces, kept=None) -> np.ndarray:
        """The maps of (T, n) traces: an (len(MAP_KEYS), n) float32 array, rows in MAP_KEYS order.

        With ``kept`` ((2, b - a, n) float32, C order) and the kernel's
        ``keep_band`` (a, b), also writes the real and imaginary parts of the
        detrended traces' plain spectrum in bins a..b-1 (for the lock-in, see
        :func:`tempofield.kernels.phase.band_lockin_weights`).
        """
        x = np.asarray(traces)
        if x.dtype not in (np.uint8, np.uint16, np.int16, np.float32, np.float64):
            x = x.astype(np.float32)
        t, n = x.shape
        middle = np.ascontiguousarray(x).reshape(t, 1, n)
        empty = np.empty((t, 1, 0), middle.dtype)
        return self.pooled_maps(empty, middle, empty, 0, 0, 1, np.empty((t, 1, n), np.float32), kept)

    def pooled_maps(self, left, middle, right, radius, y_start, y_stop, pooled, kept=None) -> np.ndarray:
        """The maps of box-pooled rows y_start .. y_stop - 1 of a block held as three column pieces.

        ``left``, ``middle``, ``right`` (T, Y, r), (T, Y, X), (T, Y, r), C
        order, one number type: output row y pools rows y .. y + 2r of the
        pieces (:func:`tempofield.kernels.preprocess.box_pool_rows`). The pooled traces
        are written to ``pooled`` ((T, rows, X) float32) for the caller. Returns
        (len(MAP_KEYS), rows * X) float32; ``kept`` as in :meth:`maps`. One
        compiled call (:func:`tempofield.kernels._spectral_loops.band_maps`) takes each block of
        traces from pooling to peak search while it is in cache.
        """
        plan = self.plan
        t = middle.shape[0]
        n = (y_stop - y_start) * middle.shape[2]
        first = plan.trend_bins + 1
        # White-noise level: the median ordinate above the trend bins is ln 2
        # times the mean of an exponential distribution, and hardly moved by a
        # few peaks. Every other ordinate: neighbouring Hann bins are correlated.
        rank = ((plan.n_bins - first + 1) // 2) // 2
        peak = (first, rank, plan.band_bins[0], plan.band_bins[1], plan.trend_bins, float(plan.threshold),
                float(plan.bin_hz), float(self.window_sum), N_HARMONICS)
        if kept is None:
            keep = (0, self.trend_re[:0], self.trend_im[:0])
            kept = np.empty((2, 0, n), np.float32)
        else:
            keep = (self.keep_band[0], self.keep_re, self.keep_im)
        out = np.empty((len(MAP_KEYS), n), np.float32)
        tables = fft_tables(t)
        if tables is not None:
            _spectral_loops.band_maps(left, middle, right, radius, y_start, y_stop, pooled, tables, self.trend_basis_t,
                             self.trend_re, self.trend_im, keep, kept, peak, out)
            return out
        # scipy's FFT: the same loops, a step at a time over the whole band
        _preprocess_loops.box_pool_rows_split(left, middle, right, radius, y_start, y_stop, pooled)
        power, dc = self._spectrum_power(pooled.reshape(t, n), kept if kept.shape[1] else None)
        median = np.empty(n, np.float32)
        _spectral_loops.noise_median(power, first, rank, median, n)
        _spectral_loops.spectral_block(power, median, dc, *peak[2:], out, n, 0)
        return out


def periodogram(traces, plan: SpectralPlan, trend_basis=None) -> tuple[np.ndarray, np.ndarray]:
    """The Hann-windowed periodogram the maps are read from: (freq_hz (F,), power (F, n)).

    Same window and (with ``trend_basis``) the same trend removal as
    :func:`spectral_maps`; power in squared input units (arbitrary scale).

    Examples
    --------
    >>> t = np.arange(400) * 0.05
    >>> f, p = periodogram(np.sin(2 * np.pi * 1.5 * t)[:, None], plan_spectrum(400, 0.05, (30, 180)))
    >>> float(f[np.argmax(p[:, 0])])
    1.5
    """
    x = as_float(traces)
    if x.ndim == 1:
        x = x[:, None]
    kernel = SpectralKernel(plan, trend_basis, n_bins_trend=plan.n_bins if trend_basis is not None else None)
    power, _ = kernel.power(x)
    return np.arange(power.shape[0]) * plan.bin_hz, power


def subharmonic_below_band(traces, frame_interval_s: float, rate_bpm: float, band_low_bpm: float, *,
                           min_ratio: float = 0.2, min_snr: float = 10.0):
    """Is a rate reported in the band the harmonic of a slower rhythm below the band?

    A pulse train at rate f has harmonics at 2f, 3f, ...; when the band
    starts above f, the search finds 2f (or 3f) and nothing in the band can
    tell. Here the spectrum of a region's traces (each trace's Hann-windowed
    periodogram after removing its mean and linear trend, summed over the
    traces so that a travelling wave does not cancel) is searched near
    rate / 2 and rate / 3 (within 6 % of them, the spread of a varying rate);
    a subharmonic below ``band_low_bpm`` counts when its peak is at least
    ``min_ratio`` of the peak at the rate and ``min_snr`` times the median
    power of the spectrum.

    Parameters
    ----------
    traces : (T, P) ndarray
        A region's traces (raw: not detrended below the band).
    frame_interval_s, rate_bpm, band_low_bpm : float

    Returns
    -------
    float or None
        The likely true rate in bpm (the slowest subharmonic that counts), or None.

    Examples
    --------
    >>> t = np.arange(600) * 0.05
    >>> pulses = (np.mod(t, 1.0) < 0.15).astype(float)[:, None]       # 60 bpm, strong harmonics
    >>> round(subharmonic_below_band(pulses, 0.05, 120.0, 90.0))
    60
    >>> subharmonic_below_band(np.cos(2 * np.pi * 2.0 * t)[:, None], 0.05, 120.0, 90.0) is None
    True
    """
    x = np.asarray(traces, np.float64)
    t = x.shape[0]
    ramp = np.column_stack([np.ones(t), np.linspace(-1.0, 1.0, t)])
    x = x - ramp @ np.linalg.lstsq(ramp, x, rcond=None)[0]
    power = (np.abs(scipy.fft.rfft(x * hann_window(t)[:, None].astype(np.float64), axis=0)) ** 2).sum(axis=1)
    freqs_bpm = np.fft.rfftfreq(t, frame_interval_s) * 60.0

    def peak_near(rate):
        near = np.abs(freqs_bpm - rate) <= max(0.06 * rate, 1.5 * freqs_bpm[1])
        return float(power[near].max()) if near.any() else 0.0

    at_rate = peak_near(rate_bpm)
    floor = float(np.median(power[freqs_bpm >= 0.2 * rate_bpm])) if t > 8 else 0.0
    found = None
    for q in (2, 3):
        sub = rate_bpm / q
        if sub >= band_low_bpm or sub < 2 * freqs_bpm[1]:
            continue
        p = peak_near(sub)
        if p >= min_ratio * at_rate and p >= min_snr * floor:
            found = sub
    return found

