"""Per-pixel spectral kernels against scipy.signal and exact synthetic frequencies."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.fft
import scipy.signal

from tempofield.errors import InputError
from tempofield.kernels import spectral
from tempofield.kernels.preprocess import detrend, trend_basis

DT = 0.05
T = 400


def _plan(rate_range=(30, 180), n=T, dt=DT, **kw):
    return spectral.plan_spectrum(n, dt, rate_range, **kw)


def test_peak_matches_scipy_periodogram_within_one_bin(rng):
    """Reference: scipy.signal.periodogram (Hann window), same traces, peak inside the band."""
    t = np.arange(T) * DT
    f_true = rng.uniform(0.6, 2.8, 300)
    x = np.sin(2 * np.pi * f_true[None, :] * t[:, None] + rng.uniform(0, 6.28, 300)) \
        + 0.8 * rng.standard_normal((T, 300))
    plan = _plan()
    out = spectral.spectral_maps(x.astype(np.float32), plan)
    freqs, pxx = scipy.signal.periodogram(x, fs=1 / DT, window="hann", detrend=False, axis=0)
    k_lo, k_hi = plan.band_bins
    f_ref = freqs[k_lo + np.argmax(pxx[k_lo:k_hi + 1], axis=0)]
    f_ours = out["rate_bpm"] / 60
    assert np.all(out["detected"] == 1)
    assert np.max(np.abs(f_ours - f_ref)) <= plan.bin_hz + 1e-9
    # before refinement the peak is scipy's bin itself: refinement moves it by at most half a bin
    assert np.max(np.abs(f_ours - f_ref)) <= 0.5 * plan.bin_hz + 1e-9
    np.testing.assert_array_equal(np.rint(f_ours / plan.bin_hz), np.rint(f_ref / plan.bin_hz))


def test_peak_matches_scipy_welch_and_lombscargle(rng):
    """References: scipy.signal.welch (averaged) and scipy.signal.lombscargle (no FFT grid)."""
    t = np.arange(T) * DT
    f0 = 1.37
    x = np.sin(2 * np.pi * f0 * t) + 0.3 * rng.standard_normal(T)
    out = spectral.spectral_maps(x[:, None].astype(np.float32), _plan())
    fw, pw = scipy.signal.welch(x, fs=1 / DT, nperseg=T // 2)
    band = (fw >= 0.5) & (fw <= 3)
    assert abs(out["rate_bpm"][0] / 60 - fw[band][np.argmax(pw[band])]) <= 1 / (T // 2 * DT)
    grid = np.linspace(0.5, 3.0, 5001)
    pls = scipy.signal.lombscargle(t, x, 2 * np.pi * grid)
    assert abs(out["rate_bpm"][0] / 60 - grid[np.argmax(pls)]) <= 0.1 / (T * DT)


@pytest.mark.parametrize("offset", np.linspace(-0.5, 0.5, 11))
def test_refinement_error_below_bound(offset):
    """Hann + parabola on log magnitude, noise-free sine, error at most 0.02 bin (Quinn 1994,
    IEEE Trans. Signal Process. 42:1264-1268; Jacobsen & Kootsookos 2007, IEEE Signal Process.
    Mag. 24(3):123-125; errors computed). Bin width 1/(N dt), as numpy's rfftfreq spaces the bins."""
    bin_hz = 1 / (T * DT)
    f0 = (31 + offset) * bin_hz
    t = np.arange(T) * DT
    x = np.cos(2 * np.pi * f0 * t + 0.3)[:, None]
    out = spectral.spectral_maps(x, _plan())
    assert abs(out["rate_bpm"][0] / 60 - f0) <= 0.02 * bin_hz
    assert out["amplitude"][0] == pytest.approx(1.0, rel=0.02)


def test_amplitude_in_input_units(rng):
    t = np.arange(T) * DT
    x = 37.0 * np.sin(2 * np.pi * 1.1 * t) + rng.normal(0, 1, T)
    out = spectral.spectral_maps(x[:, None], _plan())
    assert out["amplitude"][0] == pytest.approx(37.0, rel=0.03)
    assert out["period_s"][0] == pytest.approx(1 / 1.1, rel=1e-3)


def test_pulse_train_reported_at_fundamental_not_harmonic():
    """A calcium-like pulse train has strong harmonics; the octave check keeps the fundamental."""
    from tempofield.scenes.synthetic import calcium_wave

    t = np.arange(T) * DT
    x = calcium_wave(t * 40 / 60)[:, None]  # 40 bpm, harmonics at 80, 120, 160 inside the band
    out = spectral.spectral_maps(detrend(x, trend_basis(T, DT, 0.25)), _plan((30, 180)))
    assert out["rate_bpm"][0] == pytest.approx(40.0, abs=0.3)


def test_false_alarm_rate_on_white_noise():
    """The detection rule's false-positive rate on pure white noise stays at the requested level."""
    rng = np.random.default_rng(3)
    x = rng.standard_normal((T, 40000)).astype(np.float32)
    for alpha in (1e-2, 1e-3):
        out = spectral.spectral_maps(x, _plan(false_alarm=alpha))
        rate = out["detected"].mean()
        assert rate <= 1.3 * alpha + 3 * np.sqrt(alpha / x.shape[1])
        assert np.all(np.isnan(out["rate_bpm"][out["detected"] == 0]))


def test_periodicity_score(rng):
    t = np.arange(T) * DT
    sine = np.sin(2 * np.pi * 1.2 * t)[:, None]
    noise = rng.standard_normal((T, 200))
    p_sine = spectral.spectral_maps(sine, _plan())["periodicity"]
    p_noise = spectral.spectral_maps(noise, _plan())["periodicity"]
    assert p_sine[0] > 0.95
    assert np.median(p_noise) < 0.1
    assert np.all((p_noise >= 0) & (p_noise <= 1))


@pytest.mark.parametrize("kwargs, match", [
    (dict(n=400, dt=0.05, rate_range=(30, 600)), "Nyquist"),      # 10 Hz at 20 fps
    (dict(n=400, dt=0.1, rate_range=(30, 360)), "Nyquist"),       # 6 Hz at 10 fps aliases (Shannon 1949, Proc. IRE 37:10-21)
    (dict(n=40, dt=0.05, rate_range=(30, 180)), "fewer than"),     # 2 s: one cycle of 30 bpm
    (dict(n=400, dt=0.05, rate_range=(60.5, 61.0)), "narrower"),
])
def test_bad_bands_are_refused(kwargs, match):
    with pytest.raises(InputError, match=match):
        _plan(**kwargs)


def test_traces_of_wrong_length_are_refused():
    with pytest.raises(InputError, match="traces must be"):
        spectral.spectral_maps(np.zeros((10, 3)), _plan())


def test_frequency_domain_detrend_equals_time_domain(rng):
    """The trend removed in the frequency domain gives the maps of traces detrended in time."""
    t = np.arange(T) * DT
    x = (3000 * np.exp(-t / 6)[:, None] * (1 + 0.2 * rng.random(50))[None]
         + 20 * np.sin(2 * np.pi * 0.55 * t)[:, None] + rng.normal(0, 5, (T, 50))).astype(np.float32)
    q = trend_basis(T, DT, 0.25)
    plan = _plan((30, 180))
    a = spectral.spectral_maps(detrend(x, q), plan)
    b = spectral.spectral_maps(x, plan, trend_basis=q)
    np.testing.assert_allclose(b["rate_bpm"], a["rate_bpm"], rtol=1e-4)
    np.testing.assert_allclose(b["amplitude"], a["amplitude"], rtol=1e-3)
    np.testing.assert_allclose(b["periodicity"], a["periodicity"], atol=2e-3)
    # Bleaching alone is not a rhythm once the trend is removed.
    bleach_only = (3000 * np.exp(-t / 6)[:, None] + rng.normal(0, 5, (T, 2000))).astype(np.float32)
    assert spectral.spectral_maps(bleach_only, plan, trend_basis=q)["detected"].mean() < 0.005


@pytest.mark.parametrize("n_frames", [400, 401])
def test_window_applied_in_frequency_domain_equals_windowing_in_time(rng, n_frames):
    """The kernel's periodogram (plain rFFT, then the Hann window and the trend removal as a
    three-tap filter on the spectrum) equals numpy's rFFT of Hann-windowed, time-detrended traces
    in every bin, for even and odd T."""
    t = np.arange(n_frames) * DT
    x = (800 + 300 * np.exp(-t / 5)[:, None] + 15 * np.sin(2 * np.pi * 1.1 * t)[:, None]
         + rng.normal(0, 4, (n_frames, 30))).astype(np.float32)
    q = trend_basis(n_frames, DT, 0.25)
    plan = _plan((30, 180), n=n_frames)
    _, power = spectral.periodogram(x, plan, trend_basis=q)
    w = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(n_frames) / n_frames)
    direct = np.abs(np.fft.rfft(detrend(x.astype(np.float64), q.astype(np.float64)) * w[:, None], axis=0)) ** 2
    assert power.shape == direct.shape
    np.testing.assert_allclose(power, direct, atol=2e-5 * direct.max())
    # the maps read from the same periodogram: peak at the beat
    maps = spectral.spectral_maps(x, plan, trend_basis=q)
    np.testing.assert_allclose(maps["rate_bpm"], 66.0, atol=0.3)


def test_constant_traces_have_no_peak_and_no_periodicity():
    x = np.full((T, 4), 123.0, np.float32)
    out = spectral.spectral_maps(x, _plan(), trend_basis=trend_basis(T, DT, 0.25))
    assert (out["constant"] == 1).all() and (out["detected"] == 0).all()
    assert (out["peak_score"] == 0).all() and (out["periodicity"] == 0).all()


@pytest.mark.parametrize("case", ["noise", "zeros", "ties", "peaks", "narrow"])
def test_noise_median_is_numpys_partition_exactly(case):
    """The compiled bisection returns the very ordinate numpy's partition puts at the median rank,
    for blocks of any width (a short last block included), zeros, ties and huge peaks."""
    from tempofield.kernels import _spectral_loops

    rng = np.random.default_rng(["noise", "zeros", "ties", "peaks", "narrow"].index(case))
    n_bins, first = 301, 7
    n = 3 if case == "narrow" else 200
    power = (rng.exponential(size=(n_bins, n)) * 10.0 ** rng.uniform(-4, 6, n)).astype(np.float32)
    if case == "zeros":
        power[:, ::3] = 0.0
        power[::2, 1::3] = 0.0
    elif case == "ties":
        power = np.round(power / power.max(axis=0) * 4).astype(np.float32)
    elif case == "peaks":
        power[first + 2 * rng.integers(0, 100, 40)] *= 1e8
    m = (n_bins - first + 1) // 2
    for rank in (m // 2, 0, m - 1):
        got = np.empty(n, np.float32)
        _spectral_loops.noise_median(power, first, rank, got, n)
        want = np.partition(np.ascontiguousarray(power[first::2][:m].T), rank, axis=1)[:, rank]
        np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("n_frames", [4, 6, 10, 16, 30, 128, 400, 600, 720, 1000, 1024, 1200, 2000])
def test_compiled_rfft_equals_scipy_float64(rng, n_frames):
    """The compiled mixed-radix rFFT along time (radices 2, 3, 4, 5) against scipy.fft.rfft in
    float64 (reference library), within float32 rounding, for widths that leave a short last block
    of traces; and the sizes it does not handle (odd T, other prime factors) go to scipy."""
    from tempofield.kernels import _spectral_loops

    n = _spectral_loops.FFT_TRACE_BLOCK * 2 + 37
    x = (rng.normal(0, 1, (n_frames, n)) + 50 * np.sin(np.arange(n_frames) / 3.0)[:, None]).astype(np.float32)
    assert spectral.fft_tables(n_frames) is not None
    got = spectral.rfft_time(x)
    want = scipy.fft.rfft(x.astype(np.float64), axis=0)
    assert got.dtype == np.complex64 and got.shape == want.shape
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-6 * np.abs(want).max())
    assert got[0].imag.max() == 0.0  # the mean bin is real
    # one trace's result does not depend on its neighbours or its place in a block
    np.testing.assert_array_equal(spectral.rfft_time(np.ascontiguousarray(x[:, 5:9]))[:, 0], got[:, 5])


@pytest.mark.parametrize("n_frames", [600, 602])
def test_trend_coefficients_do_not_depend_on_the_other_traces(rng, n_frames):
    """The trend coefficients made on the way through the FFT (and by the loop used where scipy
    does the FFT) equal basis @ x within float32 rounding, and a trace gets the very same numbers
    in any block of traces: what keeps the maps identical for any tiling (BLAS's sgemm does not)."""
    from tempofield.kernels import _spectral_loops

    x = (1000 + rng.normal(0, 30, (n_frames, 300))).astype(np.float32)
    basis_t = np.ascontiguousarray(trend_basis(n_frames, DT, 0.25).T, np.float32)
    coef = np.empty((basis_t.shape[0], 300), np.float32)
    spectral.rfft_time(x, basis_t=basis_t, coef=coef)
    np.testing.assert_allclose(coef, basis_t.astype(np.float64) @ x, rtol=0, atol=1e-5 * np.abs(coef).max())
    for a, b in ((0, 5), (3, 200), (131, 300)):
        part = np.empty((basis_t.shape[0], b - a), np.float32)
        spectral.rfft_time(np.ascontiguousarray(x[:, a:b]), basis_t=basis_t, coef=part)
        np.testing.assert_array_equal(part, coef[:, a:b])
    loop = np.empty_like(coef)
    _spectral_loops.trend_coefficients(x, basis_t, loop)
    np.testing.assert_array_equal(loop, coef)


@pytest.mark.parametrize("n_frames", [3, 401, 602, 14])
def test_rfft_sizes_without_compiled_plan_use_scipy(rng, n_frames):
    x = rng.normal(0, 1, (n_frames, 9)).astype(np.float32)
    assert spectral.fft_tables(n_frames) is None
    np.testing.assert_allclose(spectral.rfft_time(x), scipy.fft.rfft(x, axis=0), rtol=0, atol=1e-5)


@pytest.mark.parametrize("n_frames", [240, 256, 600, 1000, 1024])
def test_the_scipy_route_gives_the_maps_of_the_compiled_route(rng, n_frames, monkeypatch):
    """Every length with a compiled plan (radices 2, 3, 4, 5; powers of two) gives the same maps
    through scipy.fft (the route of odd T and other prime factors) when its plan is hidden."""
    from tempofield.engine import tile_kernels

    t = np.arange(n_frames)[:, None, None] * DT
    beat = 40 * np.sin(2 * np.pi * 1.4 * t + rng.uniform(0, 6, (1, 12, 14)))
    block = (800 + beat + rng.normal(0, 6, (n_frames, 12, 14))).astype(np.float32)
    plan = _plan(n=n_frames)
    basis = trend_basis(n_frames, DT, 0.25 * 30 / 60)
    assert spectral.fft_tables(n_frames) is not None
    compiled = tile_kernels.maps_tile_kernel(block, 0, 0, halo=1, plan=plan, basis=basis, gram_bin=None)["maps"]
    monkeypatch.setattr(spectral, "fft_tables", lambda n: None)
    via_scipy = tile_kernels.maps_tile_kernel(block, 0, 0, halo=1, plan=plan, basis=basis, gram_bin=None)["maps"]
    keys = spectral.MAP_KEYS
    for i, key in enumerate(keys):
        if key in ("detected", "constant"):
            np.testing.assert_array_equal(via_scipy[i], compiled[i], err_msg=key)
        else:  # float32 rounding of the two FFTs; the noise level (and the peak score over it) feels it most
            np.testing.assert_allclose(via_scipy[i], compiled[i], rtol=1e-3 if key in ("peak_score", "noise_power") else 1e-4,
                                       atol=1e-5, equal_nan=True, err_msg=key)
