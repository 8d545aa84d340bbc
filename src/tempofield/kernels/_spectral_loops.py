"""Compiled loops of the spectral kernel (:mod:`tempofield.kernels.spectral`).

The spectral maps cost, per pixel, one FFT plus a handful of cheap steps
(pooling, power, a median, a peak search). Written as numpy array expressions
each step is a separate pass over memory, and together they cost four times
the FFT; as one compiled call per band of rows (:func:`band_maps`) they cost
a fraction of it. Here: the mixed-radix real FFT along time with the trend
coefficients summed on the way, the windowed power, the noise median, the
peak search and refinement, the kept band of the spectrum and its 16-bit
packing. The arithmetic order of every output is fixed by the pixel alone
(chunk invariance).
"""

from __future__ import annotations

import math

import numba
import numpy as np

from tempofield.kernels._jit import JIT, JIT_INLINE, JIT_NOALIAS
from tempofield.kernels._preprocess_loops import _pool_row


@numba.jit(**JIT_NOALIAS)
def windowed_power(sr, si, w, n_frames, coef, coef_col0, trend_re, trend_im, power, dc, col0):
    """Hann-windowed, detrended periodogram of traces from their plain rFFT.

    ``sr, si`` (F, >= w) hold the real and imaginary parts of the rFFT along
    time (axis 0) of w traces without a window: columns ``col0 .. col0 + w - 1``
    of the outputs. The periodic Hann window w(t) = 1/2 - cos(2 pi t / T) / 2
    is applied here in the frequency domain, where it is exactly the
    three-tap filter X_w[k] = X[k] / 2 - (X[k-1] + X[k+1]) / 4 (with
    X[-k] = conj(X[k]) and X[T-k] = conj(X[k]) past the ends), which saves a
    pass over the traces. Then the trend components' windowed spectrum,
    ``(trend_re + i trend_im) @ coef`` ((F_trend, K) @ (K, n)), is subtracted
    from the lowest bins (the traces' coefficients are columns ``coef_col0 ..``
    of ``coef``). Writes ``power[:, col0:col0 + w]`` of (F, n) float32
    and ``dc[col0:col0 + w]``, the windowed sum of each trace before the
    trend was removed. Every loop runs over the traces innermost
    (contiguous), so it vectorises.
    """
    n_bins = power.shape[0]
    n_low = trend_re.shape[0]
    n_k = coef.shape[0]
    re = np.empty(w, np.float32)
    im = np.empty(w, np.float32)
    quarter = np.float32(0.25)
    for k in range(n_bins):
        here_r, here_i = sr[k], si[k]
        if k == 0:
            left_r, left_i, left_sign = sr[1], si[1], np.float32(-1.0)
        else:
            left_r, left_i, left_sign = sr[k - 1], si[k - 1], np.float32(1.0)
        if k + 1 < n_bins:
            right_r, right_i, right_sign = sr[k + 1], si[k + 1], np.float32(1.0)
        else:  # X[k + 1] = conj(X[T - k - 1])
            right_r, right_i, right_sign = sr[n_frames - k - 1], si[n_frames - k - 1], np.float32(-1.0)
        for j in range(w):
            re[j] = np.float32(0.5) * here_r[j] - quarter * (left_r[j] + right_r[j])
            im[j] = np.float32(0.5) * here_i[j] - quarter * (left_sign * left_i[j] + right_sign * right_i[j])
        if k == 0:
            d = dc[col0:col0 + w]
            for j in range(w):
                d[j] = re[j]
        if k < n_low:
            for i in range(n_k):
                a, b = trend_re[k, i], trend_im[k, i]
                cf = coef[i, coef_col0:coef_col0 + w]
                for j in range(w):
                    re[j] -= a * cf[j]
                    im[j] -= b * cf[j]
        out = power[k, col0:col0 + w]
        for j in range(w):
            out[j] = re[j] * re[j] + im[j] * im[j]


#: Traces whose noise ordinates :func:`noise_median` holds at once: a block of
#: about 150 x 64 float32 stays in the core's cache over all the passes.
MEDIAN_BLOCK = 64


@numba.jit(**JIT)
def noise_median(power, first, rank, out, n_cols):
    """``out[j]`` = the ``rank``-th smallest (from 0) of trace j's noise ordinates
    ``power[first + 2 i, j]``, i = 0, 1, ...: exactly the value numpy's partition puts there,
    for the first ``n_cols`` columns of ``power``.

    Non-negative float32 numbers order as their bit patterns read as int32,
    so the value is found by bisection on those integers, for a block of
    traces at once with the traces innermost (the counting vectorises; no
    sorting, no branch per ordinate). Each trace keeps a bracket (lo, hi]
    with at most ``rank`` ordinates <= lo and more than ``rank`` <= hi, and
    the counts at both ends. Its bisection stops as soon as one ordinate is
    left inside the bracket (about 16 steps for a block of white-noise
    traces, not the 27 it takes to shrink the bracket to one value): that ordinate, the smallest
    above lo, is the answer. ``power`` holds squared magnitudes:
    non-negative and finite.
    """
    n_bins = power.shape[0]
    n = n_cols
    m = (n_bins - first + 1) // 2
    step = MEDIAN_BLOCK
    block = np.empty((m, step), np.float32)
    bits = block.view(np.int32)
    lo = np.empty(step, np.int32)
    hi = np.empty(step, np.int32)
    mid = np.empty(step, np.int32)
    c_lo = np.empty(step, np.int32)
    c_hi = np.empty(step, np.int32)
    count = np.empty(step, np.int32)
    best = np.empty(step, np.int32)
    best_value = best.view(np.float32)
    big = np.int32(2147483647)
    for j0 in range(0, n, step):
        w = min(n, j0 + step) - j0
        for i in range(m):
            row = power[first + 2 * i, j0:j0 + w]  # a view: the copy's loop index stays plain
            dst = block[i]
            for jj in range(w):
                dst[jj] = row[jj]
            for jj in range(w, step):  # a short last block: copies of its first trace
                dst[jj] = row[0]
        for jj in range(step):
            lo[jj] = big
            hi[jj] = 0
        for i in range(m):
            for jj in range(step):
                lo[jj] = min(lo[jj], bits[i, jj])
                hi[jj] = max(hi[jj], bits[i, jj])
        for jj in range(step):
            lo[jj] -= 1
            c_lo[jj] = 0
            c_hi[jj] = m
        while True:
            busy = False
            for jj in range(step):
                if hi[jj] - lo[jj] > 1 and c_hi[jj] - c_lo[jj] > 1:
                    busy = True
            if not busy:
                break
            for jj in range(step):
                mid[jj] = lo[jj] + (hi[jj] - lo[jj]) // 2
                count[jj] = 0
            for i in range(m):
                for jj in range(step):
                    count[jj] += np.int32(bits[i, jj] <= mid[jj])
            for jj in range(step):
                if hi[jj] - lo[jj] <= 1 or c_hi[jj] - c_lo[jj] <= 1:
                    continue  # this trace is done: keep its bracket
                if count[jj] > rank:
                    hi[jj] = mid[jj]
                    c_hi[jj] = count[jj]
                else:
                    lo[jj] = mid[jj]
                    c_lo[jj] = count[jj]
        # One ordinate left in (lo, hi] (or hi = lo + 1): the smallest ordinate above lo.
        for jj in range(step):
            best[jj] = big
        for i in range(m):
            for jj in range(step):
                b = bits[i, jj]
                best[jj] = min(best[jj], b if b > lo[jj] else big)
        for jj in range(w):
            out[j0 + jj] = best_value[jj]


#: Relative half-width of the search for a pulse train's fundamental below a harmonic peak.
OCTAVE_SPREAD = 0.06


@numba.jit(**JIT)
def spectral_block(power, noise_median, dc, k_lo, k_hi, trend_bins, threshold, bin_hz, window_sum,
                   n_harmonics, out, n_cols, col0):
    """Per-trace peak search, refinement and periodicity on a periodogram.

    ``power`` is (F, >= n) float32, one column per trace, trend already
    removed, of which the first n = ``n_cols`` are used; ``noise_median`` (n,)
    the median of its noise ordinates; ``dc`` (n,) each trace's windowed sum
    before the trend was removed. Writes ``out[:, col0:col0 + n]`` of
    (9, N) float32, in the order rate_bpm, period_s, amplitude, periodicity,
    peak_score, detected, constant, mean, noise_power (see
    :func:`tempofield.kernels.spectral.spectral_maps` for the method).
    """
    n_bins = power.shape[0]
    n = n_cols
    ln2 = math.log(2.0)
    tiny = np.finfo(np.float32).tiny
    # sums and band maxima with the traces innermost (vectorised), then each trace on its own
    total = np.zeros(n, np.float64)
    for k in range(trend_bins + 1, n_bins):
        row = power[k]
        for j in range(n):
            total[j] += row[j]
    band_peak = np.empty(n, np.int64)
    best_val = np.empty(n, np.float32)
    for j in range(n):
        band_peak[j] = k_lo
        best_val[j] = power[k_lo, j]
    for kk in range(k_lo + 1, k_hi + 1):
        row = power[kk]
        for j in range(n):
            if row[j] > best_val[j]:  # strictly greater: the first maximum wins, as numpy's argmax
                best_val[j] = row[j]
                band_peak[j] = kk
    for j in range(n):
        p = power[:, j]
        noise = max(noise_median[j] / ln2, tiny)
        k = band_peak[j]
        peak = p[k]
        # Octave check: a pulse train has strong harmonics; take the lowest
        # divisor whose bin is itself significant and not much weaker. A rate
        # that varies from beat to beat spreads each line over a few percent
        # of its frequency (the h-th harmonic h times as wide), so the
        # divisor's peak is sought within OCTAVE_SPREAD of k / q, at least one bin.
        for q in (3, 2):
            kq = int(np.rint(k / q))
            kq_c = min(max(kq, 1), n_bins - 2)
            half = max(1, int(OCTAVE_SPREAD * kq))
            best = max(kq_c - half, 1)
            for kk in range(best + 1, min(kq_c + half, n_bins - 2) + 1):
                if p[kk] > p[best]:
                    best = kk
            pq = p[best]
            if kq >= k_lo and pq >= 0.2 * peak and pq / noise > threshold and best >= k_lo:
                k = best
                peak = pq
        k = min(max(k, 1), n_bins - 2)
        peak = p[k]
        score = peak / noise

        lm = 0.5 * math.log(p[k - 1] + 1e-30)
        l0 = 0.5 * math.log(p[k] + 1e-30)
        lp = 0.5 * math.log(p[k + 1] + 1e-30)
        denom = 2.0 * l0 - lm - lp
        delta = 0.5 * (lp - lm) / denom if denom > 0 else 0.0
        delta = min(max(delta, -0.5), 0.5)
        freq_hz = (k + delta) * bin_hz
        # Undo the Hann window's scalloping at the refined offset: its
        # transform falls as sinc(d) / (1 - d^2) away from the true frequency.
        sinc = math.sin(math.pi * delta) / (math.pi * delta) if delta != 0.0 else 1.0
        amplitude = 2.0 * math.exp(l0) / (window_sum * sinc / (1.0 - delta * delta))

        harm = 0.0
        f_bins = k + delta
        for h in range(1, n_harmonics + 1):
            kh = int(np.rint(h * f_bins))
            for kk in (kh - 1, kh, kh + 1):
                if trend_bins < kk < n_bins:
                    harm += p[kk]
        periodicity = harm / total[j] if total[j] > 0 else 0.0

        constant = total[j] <= 1e-12 * dc[j] * dc[j] + 1e-30  # nothing but rounding beside the mean
        detected = score > threshold and not constant
        out[0, col0 + j] = freq_hz * 60.0 if detected else np.nan
        out[1, col0 + j] = 1.0 / freq_hz if detected else np.nan
        out[2, col0 + j] = amplitude if detected else np.nan
        if constant:  # its spectrum is rounding noise: no peak, no harmonics
            score = 0.0
            periodicity = 0.0
        out[3, col0 + j] = min(max(periodicity, 0.0), 1.0)
        out[4, col0 + j] = score
        out[5, col0 + j] = 1.0 if detected else 0.0
        out[6, col0 + j] = 1.0 if constant else 0.0
        out[7, col0 + j] = dc[j] / window_sum
        out[8, col0 + j] = 0.0 if constant else noise


#: Traces that :func:`rfft_columns` transforms together: its two scratch
#: buffers, 4 x (T/2) x 128 float32, stay in the core's second-level cache
#: through every stage, and the butterflies' inner loops are 16 vectors long.
FFT_TRACE_BLOCK = 128


@numba.jit(**JIT_INLINE)
def _rotate_store(yr, yi, row, b, ur, ui, wr, wi):
    """``y[row, b] = (ur + i ui) (wr + i wi)``: a butterfly output times its twiddle."""
    yr[row, b] = ur * wr - ui * wi
    yi[row, b] = ur * wi + ui * wr


@numba.jit(**JIT_NOALIAS)
def _fft_stage(xr, xi, yr, yi, n, s, radix, tw_re, tw_im, tw_first, width):
    """One radix-``radix`` stage of a Stockham autosort FFT (decimation in frequency), traces innermost.

    ``xr, xi`` hold (s * n) complex rows of ``width`` traces: s interleaved
    transforms of length n still to do. Row q + s (p + j m) (m = n / radix,
    j < radix) is input j of butterfly (p, q); output k goes, times the
    twiddle w_n^(p k) = exp(-2 pi i p k / n) (table ``tw_*[tw_first + p * radix + k]``),
    to row q + s (radix p + k) of ``yr, yi``. After the last stage the
    transform is in natural order (Van Loan 1992, section 1.7).
    """
    m = n // radix
    for p in range(m):
        t0 = tw_first + p * radix
        for q in range(s):
            i0 = q + s * p
            o0 = q + s * radix * p
            if radix == 4:
                i1, i2, i3 = i0 + s * m, i0 + 2 * s * m, i0 + 3 * s * m
                o1, o2, o3 = o0 + s, o0 + 2 * s, o0 + 3 * s
                w1r, w1i = tw_re[t0 + 1], tw_im[t0 + 1]
                w2r, w2i = tw_re[t0 + 2], tw_im[t0 + 2]
                w3r, w3i = tw_re[t0 + 3], tw_im[t0 + 3]
                for b in range(width):
                    s02r = xr[i0, b] + xr[i2, b]
                    s02i = xi[i0, b] + xi[i2, b]
                    d02r = xr[i0, b] - xr[i2, b]
                    d02i = xi[i0, b] - xi[i2, b]
                    s13r = xr[i1, b] + xr[i3, b]
                    s13i = xi[i1, b] + xi[i3, b]
                    d13r = xr[i1, b] - xr[i3, b]
                    d13i = xi[i1, b] - xi[i3, b]
                    yr[o0, b] = s02r + s13r
                    yi[o0, b] = s02i + s13i
                    _rotate_store(yr, yi, o1, b, d02r + d13i, d02i - d13r, w1r, w1i)  # k = 1: d02 - i d13
                    _rotate_store(yr, yi, o2, b, s02r - s13r, s02i - s13i, w2r, w2i)
                    _rotate_store(yr, yi, o3, b, d02r - d13i, d02i + d13r, w3r, w3i)  # k = 3: d02 + i d13
            elif radix == 2:
                i1 = i0 + s * m
                o1 = o0 + s
                w1r, w1i = tw_re[t0 + 1], tw_im[t0 + 1]
                for b in range(width):
                    yr[o0, b] = xr[i0, b] + xr[i1, b]
                    yi[o0, b] = xi[i0, b] + xi[i1, b]
                    _rotate_store(yr, yi, o1, b, xr[i0, b] - xr[i1, b], xi[i0, b] - xi[i1, b], w1r, w1i)
            elif radix == 3:
                c1 = np.float32(-0.5)  # cos(2 pi / 3)
                s1 = np.float32(-0.8660254037844386)  # -sin(2 pi / 3)
                i1, i2 = i0 + s * m, i0 + 2 * s * m
                o1, o2 = o0 + s, o0 + 2 * s
                w1r, w1i = tw_re[t0 + 1], tw_im[t0 + 1]
                w2r, w2i = tw_re[t0 + 2], tw_im[t0 + 2]
                for b in range(width):
                    sr = xr[i1, b] + xr[i2, b]
                    si = xi[i1, b] + xi[i2, b]
                    dr = xr[i1, b] - xr[i2, b]
                    di = xi[i1, b] - xi[i2, b]
                    yr[o0, b] = xr[i0, b] + sr
                    yi[o0, b] = xi[i0, b] + si
                    mr = xr[i0, b] + c1 * sr
                    mi = xi[i0, b] + c1 * si
                    _rotate_store(yr, yi, o1, b, mr - s1 * di, mi + s1 * dr, w1r, w1i)  # k = 1: m + i s1 d
                    _rotate_store(yr, yi, o2, b, mr + s1 * di, mi - s1 * dr, w2r, w2i)  # k = 2: m - i s1 d
            else:  # radix == 5
                c1 = np.float32(0.30901699437494745)  # cos(2 pi / 5)
                c2 = np.float32(-0.8090169943749475)  # cos(4 pi / 5)
                s1 = np.float32(-0.9510565162951535)  # -sin(2 pi / 5)
                s2 = np.float32(-0.5877852522924731)  # -sin(4 pi / 5)
                i1, i2, i3, i4 = i0 + s * m, i0 + 2 * s * m, i0 + 3 * s * m, i0 + 4 * s * m
                o1, o2, o3, o4 = o0 + s, o0 + 2 * s, o0 + 3 * s, o0 + 4 * s
                w1r, w1i = tw_re[t0 + 1], tw_im[t0 + 1]
                w2r, w2i = tw_re[t0 + 2], tw_im[t0 + 2]
                w3r, w3i = tw_re[t0 + 3], tw_im[t0 + 3]
                w4r, w4i = tw_re[t0 + 4], tw_im[t0 + 4]
                for b in range(width):
                    s14r = xr[i1, b] + xr[i4, b]
                    s14i = xi[i1, b] + xi[i4, b]
                    d14r = xr[i1, b] - xr[i4, b]
                    d14i = xi[i1, b] - xi[i4, b]
                    s23r = xr[i2, b] + xr[i3, b]
                    s23i = xi[i2, b] + xi[i3, b]
                    d23r = xr[i2, b] - xr[i3, b]
                    d23i = xi[i2, b] - xi[i3, b]
                    yr[o0, b] = xr[i0, b] + s14r + s23r
                    yi[o0, b] = xi[i0, b] + s14i + s23i
                    m1r = xr[i0, b] + c1 * s14r + c2 * s23r
                    m1i = xi[i0, b] + c1 * s14i + c2 * s23i
                    m2r = xr[i0, b] + c2 * s14r + c1 * s23r
                    m2i = xi[i0, b] + c2 * s14i + c1 * s23i
                    n1r = -(s1 * d14i + s2 * d23i)  # i (s1 d14 + s2 d23)
                    n1i = s1 * d14r + s2 * d23r
                    n2r = -(s2 * d14i - s1 * d23i)  # i (s2 d14 - s1 d23)
                    n2i = s2 * d14r - s1 * d23r
                    _rotate_store(yr, yi, o1, b, m1r + n1r, m1i + n1i, w1r, w1i)
                    _rotate_store(yr, yi, o2, b, m2r + n2r, m2i + n2i, w2r, w2i)
                    _rotate_store(yr, yi, o3, b, m2r - n2r, m2i - n2i, w3r, w3i)
                    _rotate_store(yr, yi, o4, b, m1r - n1r, m1i - n1i, w4r, w4i)


#: Samples summed into a partial sum before it joins a trend coefficient's
#: total: float32 rounding then grows with 16 + T / 16 terms instead of T.
TREND_SUM_BLOCK = 16


@numba.jit(**JIT_NOALIAS)
def trend_coefficients(x, basis_t, coef):
    """``coef`` (K, n) = ``basis_t`` (K, T) @ ``x`` (T, n), in a fixed order for each trace.

    A matrix product whose rounding does not depend on the other columns
    (BLAS's does: it blocks by the matrix's width), so a trace's trend, and
    everything after it, is the same whatever tile it is in. Per trace, on
    its samples less its first sample x0 (a bright, steady baseline would
    otherwise carry most of the rounding): the products of each run of
    ``TREND_SUM_BLOCK`` samples are summed in time order from zero, each
    run's sum is added to the total in turn, and x0 times the basis vector's
    sum comes last. The same sums as :func:`rfft_columns` makes on the way.
    """
    n_k, t = basis_t.shape
    n = x.shape[1]
    part = np.empty((n_k, n), np.float32)
    x0 = np.empty(n, np.float32)
    first = x[0]
    for j in range(n):
        x0[j] = first[j]
    for k in range(n_k):
        out = coef[k]
        for j in range(n):
            out[j] = np.float32(0.0)
    for i in range(t):
        row = x[i]
        for k in range(n_k):
            q = basis_t[k, i]
            acc = part[k]
            if i % TREND_SUM_BLOCK == 0:
                for j in range(n):
                    acc[j] = np.float32(0.0)
            for j in range(n):
                acc[j] = acc[j] + q * (row[j] - x0[j])
            if i % TREND_SUM_BLOCK == TREND_SUM_BLOCK - 1 or i == t - 1:
                out = coef[k]
                for j in range(n):
                    out[j] = out[j] + acc[j]
    for k in range(n_k):
        total = np.float32(basis_t[k].astype(np.float64).sum())
        out = coef[k]
        for j in range(n):
            out[j] = out[j] + x0[j] * total


@numba.jit(**JIT_NOALIAS)
def _rfft_block(x, c0, w, radices, tw_first, tw_re, tw_im, basis_t, totals, ar, ai, br, bi, acc, part, x0, coef):
    """The FFT of traces ``c0 .. c0 + w - 1`` of ``x`` (T, n) and their trend coefficients.

    Even and odd samples become the real and imaginary parts of T/2 complex
    values z (in ``ar, ai``), transformed in one Stockham stage per radix
    (:func:`_fft_stage`) between the pairs (ar, ai) and (br, bi). Returns
    the pair that holds Z = FFT(z) in natural order. On the way writes
    ``coef[:, c0:c0 + w]`` = ``basis_t`` @ x in the order of
    :func:`trend_coefficients` (``totals`` holds each basis vector's sum).
    """
    half = x.shape[0] // 2
    n_k = basis_t.shape[0]
    steps = TREND_SUM_BLOCK // 2  # pairs of samples per run
    first = x[0, c0:c0 + w]
    for b in range(w):
        x0[b] = first[b]
    for k in range(n_k):
        for b in range(w):
            acc[k, b] = np.float32(0.0)
    for i in range(half):
        even = x[2 * i, c0:c0 + w]  # views: the loop index stays plain (it vectorises)
        odd = x[2 * i + 1, c0:c0 + w]
        for b in range(w):
            ar[i, b] = even[b]
            ai[i, b] = odd[b]
        for k in range(n_k):
            qe, qo = basis_t[k, 2 * i], basis_t[k, 2 * i + 1]
            if i % steps == 0:
                for b in range(w):
                    part[k, b] = np.float32(0.0)
            for b in range(w):
                part[k, b] = part[k, b] + qe * (ar[i, b] - x0[b])
                part[k, b] = part[k, b] + qo * (ai[i, b] - x0[b])
            if i % steps == steps - 1 or i == half - 1:
                for b in range(w):
                    acc[k, b] = acc[k, b] + part[k, b]
    for k in range(n_k):
        dst = coef[k, c0:c0 + w]
        for b in range(w):
            dst[b] = acc[k, b] + x0[b] * totals[k]
    xr, xi, yr, yi = ar, ai, br, bi
    length = half
    stride = 1
    for st in range(radices.shape[0]):
        r = radices[st]
        _fft_stage(xr, xi, yr, yi, length, stride, r, tw_re, tw_im, tw_first[st], w)
        length //= r
        stride *= r
        xr, xi, yr, yi = yr, yi, xr, xi
    return xr, xi


@numba.jit(**JIT_NOALIAS)
def _unpack_real(zr, zi, w, post_re, post_im, sr, si):
    """The spectrum X[0 .. T/2] of the real traces from Z (T/2 rows), into ``sr, si`` (T/2 + 1 rows).

    X[k] = E[k] + exp(-2 pi i k / T) O[k] with E[k] = (Z[k] + conj Z[T/2 - k]) / 2
    and O[k] = (Z[k] - conj Z[T/2 - k]) / 2i (``post_re/im`` hold the exp(-2 pi i k / T)).
    """
    half = post_re.shape[0] - 1
    one_half = np.float32(0.5)
    for k in range(half + 1):
        k1 = k % half
        k2 = (half - k) % half
        wr, wi = post_re[k], post_im[k]
        for b in range(w):
            er = one_half * (zr[k1, b] + zr[k2, b])
            ei = one_half * (zi[k1, b] - zi[k2, b])
            orr = one_half * (zi[k1, b] + zi[k2, b])
            oi = one_half * (zr[k2, b] - zr[k1, b])
            sr[k, b] = er + (wr * orr - wi * oi)
            si[k, b] = ei + (wr * oi + wi * orr)


@numba.jit(**JIT)
def _fft_scratch(t, n_k):
    """Scratch of :func:`_rfft_block` for T = t and K = n_k: four (T/2 + 1, block) arrays, then
    acc, part (K, block), x0 (block,)."""
    width = FFT_TRACE_BLOCK
    rows = t // 2 + 1
    return (np.empty((rows, width), np.float32), np.empty((rows, width), np.float32),
            np.empty((rows, width), np.float32), np.empty((rows, width), np.float32),
            np.empty((n_k, width), np.float32), np.empty((n_k, width), np.float32),
            np.empty(width, np.float32))


@numba.jit(**JIT)
def _basis_totals(basis_t):
    totals = np.empty(basis_t.shape[0], np.float32)
    for k in range(basis_t.shape[0]):
        totals[k] = np.float32(basis_t[k].astype(np.float64).sum())
    return totals


@numba.jit(**JIT_NOALIAS)
def rfft_columns(x, radices, tw_first, tw_re, tw_im, post_re, post_im, spec, basis_t, coef):
    """The rFFT along axis 0 of (T, n) float32 traces, T even, T/2 a product of the ``radices`` (2, 3, 4, 5).

    Writes ``spec`` (T/2 + 1, 2 n) float32, the (T/2 + 1, n) complex64
    spectrum seen as float pairs, and ``coef`` (K, n) = ``basis_t`` (K, T) @ x
    in the order of :func:`trend_coefficients`, while the samples pass by
    (K may be 0). The traces go ``FFT_TRACE_BLOCK`` at a time through
    :func:`_rfft_block` and :func:`_unpack_real`. scipy's FFT runs along
    this axis four traces at a time with 4-wide vectors; here every
    butterfly runs over a whole block of traces, in the machine's widest
    vectors. Same rounding as scipy's float32 transform (about 1e-7 of the
    largest bin); the arithmetic of one trace never depends on its
    neighbours. The tables come from :func:`tempofield.kernels.spectral.fft_tables`.
    """
    t, n = x.shape
    ar, ai, br, bi, acc, part, x0 = _fft_scratch(t, basis_t.shape[0])
    totals = _basis_totals(basis_t)
    for c0 in range(0, n, FFT_TRACE_BLOCK):
        w = min(FFT_TRACE_BLOCK, n - c0)
        zr, zi = _rfft_block(x, c0, w, radices, tw_first, tw_re, tw_im, basis_t, totals,
                             ar, ai, br, bi, acc, part, x0, coef)
        sr, si = (br, bi) if radices.shape[0] % 2 == 0 else (ar, ai)  # the pair not holding Z
        _unpack_real(zr, zi, w, post_re, post_im, sr, si)
        for k in range(t // 2 + 1):
            out = spec[k, 2 * c0:2 * (c0 + w)]
            for b in range(w):
                out[2 * b] = sr[k, b]
                out[2 * b + 1] = si[k, b]


@numba.jit(**JIT_NOALIAS)
def band_maps(left, middle, right, radius, y_start, y_stop, pooled, tables, basis_t, trend_re, trend_im,
              keep, kept, peak, out):
    """The spectral maps of a band of pooled rows, each block of traces from pooling to peak in cache.

    Pools output rows ``y_start .. y_stop - 1`` of a block held as three
    column pieces (:func:`_pool_row`) into ``pooled`` ((T, rows, X) float32,
    kept for the caller), only as far as the next ``FFT_TRACE_BLOCK`` traces
    need; then per block: FFT and trend coefficients (:func:`_rfft_block`),
    spectrum (:func:`_unpack_real`), kept band (:func:`kept_band`, when
    ``kept`` (2, B, n) has rows), windowed power (:func:`windowed_power`),
    noise median (:func:`noise_median`) and peaks (:func:`spectral_block`)
    into ``out`` (9, rows * X). A block's power never leaves the core's
    cache. ``tables`` is :func:`tempofield.kernels.spectral.fft_tables`' tuple,
    ``keep`` = (first bin, trend re, trend im) of the kept band and ``peak``
    = (first noise ordinate, median rank, k_lo, k_hi, trend bins,
    threshold, bin width in Hz, window sum, harmonics). The numbers are
    those of the separate functions run one after the other.
    """
    radices, tw_first, tw_re, tw_im, post_re, post_im = tables
    keep_first, keep_re, keep_im = keep
    first, rank, k_lo, k_hi, trend_bins, threshold, bin_hz, window_sum, n_harmonics = peak
    t = middle.shape[0]
    nx = middle.shape[2]
    n = (y_stop - y_start) * nx
    x = pooled.reshape((t, n))
    n_k = basis_t.shape[0]
    ar, ai, br, bi, acc, part, x0 = _fft_scratch(t, n_k)
    totals = _basis_totals(basis_t)
    coef = np.empty((n_k, n), np.float32)
    width = FFT_TRACE_BLOCK
    power = np.empty((t // 2 + 1, width), np.float32)
    dc = np.empty(width, np.float32)
    median = np.empty(width, np.float32)
    colsum = np.empty(nx + 2 * radius, np.float32)
    rowsum = np.empty(nx, np.float32)
    done = 0  # rows pooled so far
    for c0 in range(0, n, width):
        w = min(width, n - c0)
        while done * nx < c0 + w:
            _pool_row(left, middle, right, radius, y_start + done, colsum, rowsum, pooled, done)
            done += 1
        zr, zi = _rfft_block(x, c0, w, radices, tw_first, tw_re, tw_im, basis_t, totals,
                             ar, ai, br, bi, acc, part, x0, coef)
        sr, si = (br, bi) if radices.shape[0] % 2 == 0 else (ar, ai)  # the pair not holding Z
        _unpack_real(zr, zi, w, post_re, post_im, sr, si)
        if kept.shape[1] > 0:
            kept_band(sr, si, w, keep_first, coef, keep_re, keep_im, kept, c0)
        windowed_power(sr, si, w, t, coef, c0, trend_re, trend_im, power, dc, 0)
        noise_median(power, first, rank, median, w)
        spectral_block(power, median, dc, k_lo, k_hi, trend_bins, threshold, bin_hz, window_sum, n_harmonics,
                       out, w, c0)


@numba.jit(**JIT_NOALIAS)
def kept_band(sr, si, w, first, coef, trend_re, trend_im, out, col0):
    """Bins ``first .. first + B - 1`` of the detrended traces' plain spectrum.

    ``sr, si`` (F, >= w) hold the real and imaginary parts of the rFFT of w
    traces (columns ``col0 .. col0 + w - 1`` of the outputs), ``coef``
    (K, n) their trend coefficients and ``trend_re/im`` (B, K) the trend
    components' plain spectrum in those bins. Writes ``out[:, :, col0:col0 + w]``
    of (2, B, n) float32: real parts, then imaginary parts, of
    spec - trend @ coef (a fixed order per trace).
    """
    n_out = out.shape[1]
    n_k = coef.shape[0]
    for b in range(n_out):
        re = out[0, b, col0:col0 + w]  # views: the loop index stays plain (it vectorises)
        im = out[1, b, col0:col0 + w]
        row_r = sr[first + b]
        row_i = si[first + b]
        for j in range(w):
            re[j] = row_r[j]
            im[j] = row_i[j]
        for i in range(n_k):
            a, c = trend_re[b, i], trend_im[b, i]
            cf = coef[i, col0:col0 + w]
            for j in range(w):
                re[j] -= a * cf[j]
                im[j] -= c * cf[j]


@numba.jit(**JIT)
def pack_fixed(block, packed, inverse):
    """Each column of a (2, B, n) float32 block as 16-bit integers under the column's own scale.

    ``packed[p, b, j] = round(block[p, b, j] * 32767 / peak_j)``, where peak_j
    is the largest |value| of column j (block floating point), and
    ``inverse[j] = peak_j / 32767``; ``packed * inverse`` gives the block back
    within half a step, 1.5e-5 of the column's peak. A column of zeros stays zero.
    """
    n = block.shape[2]
    peak = np.zeros(n, np.float32)
    for p in range(block.shape[0]):
        for b in range(block.shape[1]):
            row = block[p, b]
            for j in range(n):
                peak[j] = max(peak[j], abs(row[j]))
    scale = np.empty(n, np.float32)
    for j in range(n):
        scale[j] = np.float32(32767.0) / peak[j] if peak[j] > 0 else np.float32(0.0)
        inverse[j] = peak[j] / np.float32(32767.0)
    for p in range(block.shape[0]):
        for b in range(block.shape[1]):
            row = block[p, b]
            out = packed[p, b]
            for j in range(n):
                v = min(max(np.rint(row[j] * scale[j]), np.float32(-32767.0)), np.float32(32767.0))
                out[j] = np.int16(v)


@numba.jit(**JIT)
def unpack_fixed(packed, first, inverse, out, col0):
    """Undo :func:`pack_fixed` for rows ``first .. first + B - 1`` of a (2, B_all, q) block:
    ``out[p, b, col0 + j] = packed[p, first + b, j] * inverse[j]`` for out (2, B, N) float32."""
    q = packed.shape[2]
    for p in range(2):
        for b in range(out.shape[1]):
            src = packed[p, first + b]
            dst = out[p, b, col0:col0 + q]  # a view: the loop index stays plain (it vectorises)
            for j in range(q):
                dst[j] = np.float32(src[j]) * inverse[j]


def warm_up() -> None:
    """Compile (or load from the cache) this module's loops; :func:`band_maps` for uint16 and float32."""
    spec = np.zeros((5, 3), np.complex64)
    basis_t, coef = np.ones((1, 8), np.float32), np.empty((1, 3), np.float32)
    tables = (np.array([4]), np.array([0]), np.ones(4, np.float32), np.zeros(4, np.float32),
              np.ones(5, np.float32), np.zeros(5, np.float32))
    rfft_columns(np.ones((8, 3), np.float32), *tables, spec.view(np.float32), basis_t, coef)
    trend_coefficients(np.ones((8, 3), np.float32), basis_t, coef)
    power = np.empty((5, 3), np.float32)
    low = np.zeros((2, 1), np.float32)
    sr, si = np.zeros((5, 3), np.float32), np.zeros((5, 3), np.float32)
    sr[1] = 1.0
    windowed_power(sr, si, 3, 8, coef, 0, low, low, power, np.empty(3, np.float32), 0)
    kept_band(sr, si, 3, 1, coef, low, low, np.empty((2, 2, 3), np.float32), 0)
    noise_median(power, 1, 1, np.empty(3, np.float32), 3)
    pack_fixed(np.ones((2, 2, 3), np.float32), np.empty((2, 2, 3), np.int16), np.empty(3, np.float32))
    unpack_fixed(np.ones((2, 2, 3), np.int16), 1, np.ones(3, np.float32), np.empty((2, 1, 5), np.float32), 2)
    spectral_block(power, np.ones(3, np.float32), np.ones(3, np.float32), 1, 2, 0, 1.0, 1.0, 4.0, 2,
                   np.empty((9, 3), np.float32), 3, 0)
    peak = (1, 1, 1, 2, 0, 1.0, 1.0, 4.0, 2)
    # The stack's common number types; the others compile on first use, about 5 s each, once per install.
    for dtype in (np.uint16, np.float32):
        band_maps(np.zeros((8, 4, 1), dtype), np.zeros((8, 4, 2), dtype), np.zeros((8, 4, 1), dtype), 1, 0, 2,
                  np.empty((8, 2, 2), np.float32), tables, basis_t, low, low, (1, low, low),
                  np.empty((2, 2, 4), np.float32), peak, np.empty((9, 4), np.float32))
