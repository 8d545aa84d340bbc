"""The phase stage from spectra kept by the maps pass: equal to a second read of the stack, with its fallbacks.

The lock-in sums are inner products of each pooled, detrended trace with a
few smooth rows; by Parseval they can be taken over a band of the trace's
spectrum. These tests hold the kept-spectra route to the time-domain route
(the definition), check that it cleans up after itself, and that it steps
aside (reading the stack again) when it cannot be exact.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import dask
import numpy as np
import pytest
import scipy.fft

import tempofield
from tempofield.engine import kept, processes, run, stages, tile_kernels, tiles
from tempofield.kernels import phase as phase_mod
from tempofield.kernels import preprocess, spectral
from tempofield.scenes import synthetic


@pytest.fixture(scope="module")
def wave():
    s = synthetic.plane_wave_scene((300, 40, 44), frame_interval_s=0.02, pixel_size_um=5.0, rate_bpm=90.0,
                                   speed_um_s=6000.0, direction_deg=30.0, noise_sd=20.0, rng=5)
    return tempofield.open_stack(s.frames, frame_interval_s=0.02, pixel_size_um=5.0)


@pytest.fixture(scope="module")
def second_read(wave):
    return tempofield.analyze(wave, (40, 200), phase_from_kept_spectra=False)


def _circ_diff(a, b):
    return np.abs(np.angle(np.exp(1j * (a - b))))


def test_kept_spectra_give_the_phase_of_a_second_read(wave, second_read):
    kept = tempofield.analyze(wave, (40, 200))
    assert kept.parameters["phase_source"].startswith("kept spectra")
    assert second_read.parameters["phase_source"].startswith("second read")
    ok = np.isfinite(second_read.phase_rad)
    assert ok.mean() > 0.9
    np.testing.assert_array_equal(np.isfinite(kept.phase_rad), ok)
    assert np.max(_circ_diff(kept.phase_rad[ok], second_read.phase_rad[ok])) < 1e-3
    np.testing.assert_allclose(kept.coherence, second_read.coherence, atol=5e-3)
    period = kept.references[1].mean_period_s
    assert np.nanmax(_circ_diff(2 * np.pi * kept.delay_s / period, 2 * np.pi * second_read.delay_s / period)) < 2e-3


def test_kept_spectra_of_tiles_cut_into_many_bands(wave, second_read, monkeypatch):
    """Each band of rows of a tile writes its own columns of the tile's kept block."""
    monkeypatch.setattr(spectral, "FFT_BLOCK_COLUMNS", 30)  # a band of one row (tiles are ~20 x 22 here)
    kept = tempofield.analyze(wave, (40, 200))
    ok = np.isfinite(second_read.phase_rad)
    np.testing.assert_array_equal(np.isfinite(kept.phase_rad), ok)
    assert np.max(_circ_diff(kept.phase_rad[ok], second_read.phase_rad[ok])) < 1e-3
    np.testing.assert_allclose(kept.coherence, second_read.coherence, atol=5e-3)


def test_band_weights_equal_the_time_domain_sums(rng):
    """Parseval on the rFFT bins (the definition: basis @ detrended traces)."""
    t, dt = 600, 0.02
    time_s = np.arange(t) * dt
    theta = 2 * np.pi * 1.1 * (time_s + 0.15 * time_s ** 2 / time_s[-1])  # a rate drifting up by 30 %
    basis = phase_mod.lockin_basis(theta)
    plan = spectral.plan_spectrum(t, dt, (30, 180))
    band = phase_mod.kept_band_bins((0.5, 3.0), plan.bin_hz, plan.n_bins)
    weights, leak = phase_mod.band_lockin_weights(basis, band)
    assert leak < phase_mod.MAX_BAND_LEAK
    x = (np.cos(theta[:, None] - rng.uniform(0, 6, 50)) + rng.normal(0, 1, (t, 50))).astype(np.float32)
    spec = scipy.fft.rfft(x.astype(np.float64), axis=0)[band[0]:band[1]]
    got = weights @ np.concatenate([spec.real, spec.imag]).astype(np.float32)
    want = basis.astype(np.float64) @ x
    np.testing.assert_allclose(got, want, atol=2e-3 * np.abs(want).max())
    # a band that cuts through the rows' spectra is reported, not used
    _, cut = phase_mod.band_lockin_weights(basis, (band[0], int(1.2 / plan.bin_hz)))
    assert cut > 100 * phase_mod.MAX_BAND_LEAK


def test_the_maps_kernel_keeps_the_detrended_spectrum(rng):
    t, dt = 400, 0.03
    plan = spectral.plan_spectrum(t, dt, (40, 200))
    trend = preprocess.trend_basis(t, dt, 0.5 * 40 / 60)
    band = phase_mod.kept_band_bins((40 / 60, 200 / 60), plan.bin_hz, plan.n_bins)
    x = (500 + 30 * np.exp(-np.arange(t) / 150)[:, None] + rng.normal(0, 5, (t, 64))).astype(np.float32)
    kept = np.empty((2, band[1] - band[0], 64), np.float32)
    spectral.SpectralKernel(plan, trend, keep_band=band).maps(x, kept)
    want = np.fft.rfft(preprocess.detrend(x, trend).astype(np.float64), axis=0)[band[0]:band[1]]
    # float32 sums of ~500 x 400 leave ~1e-2 of rounding in the lowest bins: small against the noise bins
    scale = np.sqrt(np.mean(np.abs(want) ** 2))
    np.testing.assert_allclose(kept[0], want.real, atol=1e-3 * scale)
    np.testing.assert_allclose(kept[1], want.imag, atol=1e-3 * scale)


def test_a_leaking_reference_reads_the_stack_again(wave, second_read, monkeypatch):
    monkeypatch.setattr(phase_mod, "MAX_BAND_LEAK", -1.0)
    res = tempofield.analyze(wave, (40, 200))
    assert res.parameters["phase_source"].startswith("second read")
    assert "leave the kept band" in res.parameters["phase_source"]
    np.testing.assert_array_equal(res.phase_rad, second_read.phase_rad)
    np.testing.assert_array_equal(res.coherence, second_read.coherence)


def test_no_room_for_the_kept_spectra_reads_the_stack_again(wave, second_read, monkeypatch):
    monkeypatch.setattr(shutil, "disk_usage", lambda path: shutil._ntuple_diskusage(1, 1, 0))
    res = tempofield.analyze(wave, (40, 200))
    assert "would not fit" in res.parameters["phase_source"]
    np.testing.assert_array_equal(res.phase_rad, second_read.phase_rad)


def test_kept_spectra_are_removed_after_a_run_and_after_a_stop(wave, tmp_path):
    with dask.config.set({"temporary-directory": str(tmp_path)}):
        seen = []
        gen = run.iter_analyze(wave, (40, 200))
        for tick in gen:
            if tick.stage == "references":
                seen = [p for p in tmp_path.iterdir() if p.name.startswith("tempofield-spectra-")]
                sizes = [f.stat().st_size for p in seen for f in Path(p).iterdir()]
        assert len(seen) == 1 and sizes and sizes[0] > 0  # the pass really wrote them there
        assert list(tmp_path.iterdir()) == []
        gen = run.iter_analyze(wave, (40, 200))
        for tick in gen:
            if tick.stage == "phase":
                gen.close()  # a front end stopping the run
                break
        assert list(tmp_path.iterdir()) == []
    assert os.path.isdir(tmp_path)


def test_workers_on_other_machines_read_the_stack_again(tmp_path):
    """Kept spectra live on this machine's disk: a cluster with workers elsewhere cannot share them."""
    import contextlib

    class Remote:
        def __init__(self, hosts):
            self.hosts = hosts

        def nthreads(self):
            return {f"tcp://{h}:{9000 + i}": 1 for i, h in enumerate(self.hosts)}

    with dask.config.set({"temporary-directory": str(tmp_path)}), contextlib.ExitStack() as cleanup:
        keep, why = kept.keep_spectra((100, 10, 10), (0, 8), cleanup, Remote(["10.1.2.3", "127.0.0.1"]))
        assert keep is None and "not all on this machine" in why
        keep, why = kept.keep_spectra((100, 10, 10), (0, 8), cleanup, Remote(["127.0.0.1"]))
        assert keep is not None and why == ""
        assert keep.bytes_per_pixel == 2 * 8 * 2 + 4  # 16-bit real and imaginary parts, a float32 scale
        assert os.path.getsize(keep.path) == keep.bytes_per_pixel * 100  # reserved at once
    assert list(tmp_path.iterdir()) == []


def test_kept_blocks_round_trip_within_half_a_step(tmp_path, rng):
    """Each pixel is stored as 16-bit integers under its own scale: every value comes back within
    half a step (1/65534 of the pixel's largest value), whatever the pixel's magnitude, bands and tiles apart."""
    n_bins, ty, tx, width = 12, 6, 5, 10
    keep = kept.KeptSpectra(str(tmp_path / "k.bin"), (3, 3 + n_bins), width, band_columns=2 * tx)
    (tmp_path / "k.bin").write_bytes(b"\0" * keep.bytes_per_pixel * ty * width)
    magnitude = 10.0 ** rng.uniform(-3, 8, ty * width)  # pixels of very different brightness
    want = {}
    for x0 in (0, tx):  # two tiles side by side, each written band of rows by band of rows
        block = (rng.normal(0, 1, (2, n_bins, ty * tx)) * magnitude[None, None, x0 * ty:(x0 + tx) * ty])
        want[x0] = block.astype(np.float32)
        step = keep.band_rows(tx) * tx
        for p0 in range(0, ty * tx, step):
            band = np.array(want[x0][:, :, p0:p0 + step])
            keep.write(keep.offset(0, x0, ty) + keep.bytes_per_pixel * p0, band)
    for x0 in (0, tx):
        got = keep.read(keep.offset(0, x0, ty), ty, tx, bins=(2, 9))
        expect = want[x0][:, 2:9]
        assert got.dtype == np.float32 and got.shape == expect.shape
        peak = np.abs(want[x0]).max(axis=(0, 1))
        assert np.all(np.abs(got - expect) <= peak * (0.5 / 32767 + 1e-6))
        assert np.abs(got - expect).max() > 0  # stored at 16 bits, not 32


def test_coherence_of_noise_stays_low_with_smooth_segments(rng):
    """The segment windows overlap, so pure noise locks in a little more than with disjoint
    segments; it must stay well below the engine's COHERENT threshold for a record of 20 cycles
    (measured: mean 0.235, 2.2 % of traces at or above 0.5; disjoint one-cycle segments: 0.7 %)."""
    t = 400
    theta = 2 * np.pi * 20 * np.arange(t) / t
    _, coh, _ = phase_mod.lockin(rng.normal(0, 1, (t, 4000)), phase_mod.lockin_basis(theta))
    assert 0.18 < coh.mean() < 0.28
    assert (coh >= stages.COHERENT).mean() < 0.04
    locked = np.cos(theta[:, None] - rng.uniform(0, 6, 200)) + rng.normal(0, 0.3, (t, 200))
    assert np.median(phase_mod.lockin(locked, phase_mod.lockin_basis(theta))[1]) > 0.95


def test_compiled_resultant_equals_the_numpy_formula(rng):
    """Coherence = |sum_k z_k / |z_k|| / K (Mardia & Jupp 2000), segments with z_k = 0 counting as nothing."""
    from tempofield.kernels import _phase_loops

    proj = rng.normal(0, 1, (2 + 2 * 9, 500)).astype(np.float32)
    proj[2:4, :7] = 0.0
    proj[2:, 7] = np.tile([1.0, -1.0], 9)  # every segment at the same phase: 1
    got = np.empty(500, np.float32)
    _phase_loops.segment_resultant(proj, got)
    re, im = proj[2::2].astype(float), -proj[3::2].astype(float)
    mag = np.hypot(re, im)
    safe = np.where(mag > 0, mag, 1.0)
    want = np.hypot((re / safe).sum(axis=0), (im / safe).sum(axis=0)) / re.shape[0]
    np.testing.assert_allclose(got, want, atol=2e-6)
    assert got[7] == pytest.approx(1.0)
