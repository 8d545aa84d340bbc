"""Thin glue for the region inspector over the engine's kernels.

The engine has no public helper yet for one region's mean trace and its
spectrum (see the plugin's report: ``rhythmap.engine.region_trace`` and
``rhythmap.spectral.periodogram`` are wanted). Until then these two functions
do it here, using only :mod:`rhythmap.preprocess` and :mod:`rhythmap.spectral`
for the signal processing, so the inspector shows what the engine computes.
"""

from __future__ import annotations

import numpy as np
import scipy.fft

from rhythmap import preprocess, spectral
from rhythmap.options import validate_options, validate_rate_range


def region_mean_trace(frames, regions, label: int) -> np.ndarray:
    """(T,) float32 mean of ``frames`` (T, Y, X; numpy or dask) over the pixels where ``regions == label``.

    Only the region's bounding box is read from a lazy stack.
    """
    mask = np.asarray(regions) == int(label)
    if not mask.any():
        raise ValueError(f"region {label} has no pixels in this result.")
    ys, xs = np.nonzero(mask)
    y0, y1, x0, x1 = ys.min(), ys.max() + 1, xs.min(), xs.max() + 1
    box = np.asarray(frames[:, y0:y1, x0:x1])
    return box[:, mask[y0:y1, x0:x1]].mean(axis=1, dtype=np.float32)


def region_spectrum(trace, frame_interval_s: float, rate_range_bpm, options: dict | None = None) -> dict:
    """Periodogram of a region's trace as the engine sees it, and the peak it picks.

    The trace is detrended with the engine's slow-trend basis, windowed with
    its Hann window, and the peak is found by :func:`rhythmap.spectral.spectral_maps`
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
    detrended = preprocess.detrend(x, basis)
    peak = spectral.spectral_maps(detrended, plan)
    spec = scipy.fft.rfft(detrended[:, 0] * spectral.hann_window(n))
    return {"rate_bpm_axis": np.arange(spec.size) * plan.bin_hz * 60.0,
            "power": (spec.real ** 2 + spec.imag ** 2).astype(np.float32),
            "band_bpm": (lo, hi), "peak_rate_bpm": float(peak["rate_bpm"][0]),
            "peak_score": float(peak["peak_score"][0]), "detected": bool(peak["detected"][0])}
