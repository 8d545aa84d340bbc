"""Thin glue for the region inspector: calls into the engine's kernels.

A region's mean trace comes from :func:`tempofield.kernels.regions.region_mean_trace`,
its periodogram and peak from :mod:`tempofield.kernels.spectral` with the analysis's own
plan and trend basis, so the inspector shows what the engine computed.
"""

from __future__ import annotations

import numpy as np

from tempofield.engine.options import validate_options, validate_rate_range
from tempofield.errors import InputError
from tempofield.kernels import preprocess, spectral
from tempofield.kernels import regions as regions_mod


def region_mean_trace(frames, regions, label: int) -> np.ndarray:
    """(T,) mean trace of one region (see :func:`tempofield.kernels.regions.region_mean_trace`)."""
    try:
        return regions_mod.region_mean_trace(frames, regions, label)
    except InputError as exc:
        raise ValueError(str(exc)) from None


def region_spectrum(trace, frame_interval_s: float, rate_range_bpm, options: dict | None = None) -> dict:
    """Periodogram of a region's trace as the engine sees it, and the peak it picks.

    The trace is detrended with the engine's slow-trend basis, windowed with
    its Hann window, and the peak is found by :func:`tempofield.kernels.spectral.spectral_maps`
    with the same plan (band, false alarm) as the analysis.

    Returns
    -------
    dict
        ``rate_bpm_axis`` (F,), ``power`` (F,) (arbitrary units), ``band_bpm``
        (lo, hi), ``peak_rate_bpm`` (NaN if not detected), ``peak_score``,
        ``detected`` (bool).
    """
    opts = validate_options(options or {})
    lo, hi = validate_rate_range(rate_range_bpm)
    x = np.asarray(trace, np.float32)[:, None]
    n = x.shape[0]
    plan = spectral.plan_spectrum(n, frame_interval_s, (lo, hi), false_alarm=opts["false_alarm"],
                                  min_cycles=opts["min_cycles"],
                                  trend_cutoff_fraction=opts["trend_cutoff_fraction"])
    basis = preprocess.trend_basis(n, frame_interval_s, opts["trend_cutoff_fraction"] * lo / 60.0)
    peak = spectral.spectral_maps(x, plan, trend_basis=basis)
    freqs, power = spectral.periodogram(x, plan, trend_basis=basis)
    return {"rate_bpm_axis": freqs * 60.0, "power": power[:, 0],
            "band_bpm": (lo, hi), "peak_rate_bpm": float(peak["rate_bpm"][0]),
            "peak_score": float(peak["peak_score"][0]), "detected": bool(peak["detected"][0])}
