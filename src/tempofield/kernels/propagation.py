"""Propagation: activation delay unwrapped in space, conduction velocity, direction and origin.

Within a region the activation delay (known modulo the period) is unwrapped
outwards from the earliest pixel, ring by ring. The local conduction velocity
comes from the gradient of the activation time T(x, y), fitted as a plane over
a small neighbourhood of each pixel: speed = 1 / |grad T|, direction
grad T / |grad T| (Bayly et al. 1998). The same from a phase map phi at
angular frequency omega: speed = omega / |grad phi|. For the whole region a
plane wave and a point source (T = t0 + |r - r0| / v) are fitted and the
better one gives the region's speed, direction and origin. Pure numpy/scipy.
"""

from __future__ import annotations

import numpy as np
import scipy.ndimage as ndi
from scipy.optimize import least_squares

from tempofield.errors import InputError


def unwrap_delay(delay_s, mask, period_s: float, start=None) -> np.ndarray:
    """Unwrap an activation delay known modulo ``period_s`` across a region.

    Parameters
    ----------
    delay_s : (Y, X) ndarray
        Delays in [0, period).
    mask : (Y, X) bool ndarray
        The region.
    period_s : float
        The period.
    start : (y, x), optional
        The pixel whose delay is kept as it is (the others are shifted by whole
        periods relative to it); default the pixel with the smallest delay.

    Returns
    -------
    (Y, X) float64 ndarray, NaN outside the mask: delays that change smoothly
    across the region, without jumps of a period.

    Notes
    -----
    The delay is turned into a phase 2 pi d / period and unwrapped with the
    reliability-sorted path-following algorithm of scikit-image
    (``skimage.restoration.unwrap_phase``; Herraez et al. 2002), which
    unwraps the most reliable (smoothest) pixels first and so tolerates
    noisy pixels.

    Examples
    --------
    >>> d = np.mod(np.arange(12.0), 5.0)[None, :].repeat(3, 0)
    >>> [round(v, 6) for v in unwrap_delay(d, np.ones_like(d, bool), 5.0)[0].tolist()[:8]]
    [0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0]
    """
    from skimage.restoration import unwrap_phase

    d = np.asarray(delay_s, float)
    m = np.asarray(mask, bool) & np.isfinite(d)
    out = np.full(d.shape, np.nan)
    if not m.any():
        return out
    if start is None:
        start = np.unravel_index(np.argmin(np.where(m, d, np.inf)), d.shape)
    ys, xs = np.nonzero(m)
    y0, y1, x0, x1 = ys.min(), ys.max() + 1, xs.min(), xs.max() + 1
    sub_m = m[y0:y1, x0:x1]
    phase = np.where(sub_m, 2 * np.pi * np.mod(d[y0:y1, x0:x1], period_s) / period_s, 0.0)
    if sub_m.sum() == 1 or min(sub_m.shape) < 2:
        unwrapped = np.unwrap(phase.ravel()).reshape(phase.shape)
    elif sub_m.sum() > COARSE_UNWRAP_MIN_PX:
        unwrapped = _unwrap_coarse_to_fine(phase, sub_m, unwrap_phase)
    else:
        unwrapped = np.asarray(unwrap_phase(np.ma.array(phase, mask=~sub_m)).filled(np.nan))
    sub = unwrapped * period_s / (2 * np.pi)
    anchor = sub[start[0] - y0, start[1] - x0]
    sub += d[start] - anchor  # keep the start pixel's own delay (removes the whole-period offset)
    out[y0:y1, x0:x1] = np.where(sub_m, sub, np.nan)
    return out


#: Regions with more pixels than this are unwrapped on a grid of COARSE_UNWRAP_BLOCK^2 blocks first.
COARSE_UNWRAP_MIN_PX = 2**16
COARSE_UNWRAP_BLOCK = 4


def _unwrap_coarse_to_fine(phase, mask, unwrap_phase):
    """Unwrap a large region's phase on blocks, then put every pixel within pi of its block.

    The phase of each ``COARSE_UNWRAP_BLOCK``-square block is the circular mean
    of its pixels (blocks at least half inside the mask); those are unwrapped
    by the same reliability-sorted algorithm, and each pixel takes the
    multiple of 2 pi that brings it closest to its block (or the nearest
    block inside the mask). For a phase that changes slowly over a block this
    equals unwrapping every pixel, at a fraction of the cost. The result is
    checked: if any two neighbouring pixels of the region then differ by pi
    or more, or the blocks connect the region into a different number of
    parts than its pixels do (a one-pixel neck), every pixel is unwrapped
    instead.
    """
    b = COARSE_UNWRAP_BLOCK
    h, w = phase.shape
    ph, pw = -(-h // b) * b, -(-w // b) * b
    z = np.zeros((ph, pw), complex)
    z[:h, :w] = np.where(mask, np.exp(1j * phase), 0)
    n = np.zeros((ph, pw))
    n[:h, :w] = mask
    zs = z.reshape(ph // b, b, pw // b, b).sum(axis=(1, 3))
    ns = n.reshape(ph // b, b, pw // b, b).sum(axis=(1, 3))
    ok = (ns >= b * b / 2) & (np.abs(zs) > 0)
    if ok.sum() < 4:
        return np.asarray(unwrap_phase(np.ma.array(phase, mask=~mask)).filled(np.nan))
    coarse = np.asarray(unwrap_phase(np.ma.array(np.angle(zs), mask=~ok)).filled(np.nan))
    # blocks outside the coarse mask borrow the nearest coarse block's value
    _, (iy, ix) = ndi.distance_transform_edt(~ok, return_indices=True)
    coarse = coarse[iy, ix]
    ref = np.repeat(np.repeat(coarse, b, axis=0), b, axis=1)[:h, :w]
    out = phase + 2 * np.pi * np.round((ref - phase) / (2 * np.pi))
    # The shortcut holds only where the phase is smooth on the scale of a block and the
    # blocks connect the region as its pixels do; otherwise unwrap every pixel.
    steps_ok = all(np.all(np.abs(np.diff(out, axis=ax))[mask_pair] < np.pi)
                   for ax, mask_pair in ((0, mask[1:] & mask[:-1]), (1, mask[:, 1:] & mask[:, :-1])))
    if not steps_ok or ndi.label(ok)[1] != ndi.label(mask)[1]:
        return np.asarray(unwrap_phase(np.ma.array(phase, mask=~mask)).filled(np.nan))
    return out


def local_gradient(field, mask, radius: int = 3, min_points: int = 6) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares plane fit of ``field`` over a (2r+1)^2 neighbourhood: (d/dy, d/dx) per pixel.

    Only pixels inside ``mask`` take part; a pixel with fewer than
    ``min_points`` valid neighbours gets NaN. Computed from local moments with
    box sums in one compiled loop (:func:`tempofield.kernels._propagation_loops.local_plane_gradient`),
    so it costs a few passes over the image.

    Examples
    --------
    >>> yy, xx = np.mgrid[0:20, 0:20].astype(float)
    >>> gy, gx = local_gradient(2 * yy - 0.5 * xx, np.ones((20, 20), bool))
    >>> round(float(gy[10, 10]), 6), round(float(gx[10, 10]), 6)
    (2.0, -0.5)
    """
    from tempofield.kernels import _propagation_loops

    f = np.ascontiguousarray(field, np.float64)
    m = np.ascontiguousarray(np.asarray(mask, bool) & np.isfinite(f))
    gy = np.empty(f.shape)
    gx = np.empty(f.shape)
    _propagation_loops.local_plane_gradient(f, m, int(radius), float(min_points), gy, gx)
    return gy, gx


def velocity_from_activation(act_s, mask, pixel_size_um=None, radius: int = 3):
    """Local conduction velocity from activation times (Bayly et al. 1998).

    Parameters
    ----------
    act_s : (Y, X) ndarray
        Unwrapped activation time in seconds.
    mask : (Y, X) bool ndarray
    pixel_size_um : float, optional
        Micrometres per pixel; without it speeds are in pixels per second.
    radius : int
        Half-width of the fitted neighbourhood, pixels.

    Returns
    -------
    speed : (Y, X) ndarray
        1 / |grad T| in micrometres (or pixels) per second.
    direction_deg : (Y, X) ndarray
        Direction of travel, degrees counter-clockwise from +x with y down the rows.
    velocity : (Y, X, 2) ndarray
        (v_y, v_x) = grad T / |grad T|^2.

    References
    ----------
    Bayly, P. V. et al. (1998). Estimation of conduction velocity vector fields
    from epicardial mapping data. IEEE Trans. Biomed. Eng. 45, 563-571.
    """
    scale = float(pixel_size_um) if pixel_size_um else 1.0
    gy, gx = local_gradient(act_s, mask, radius)
    gy, gx = gy / scale, gx / scale  # seconds per micrometre
    g2 = gy ** 2 + gx ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        speed = 1.0 / np.sqrt(g2)
        vel = np.stack([gy / g2, gx / g2], axis=-1)
    direction = np.degrees(np.arctan2(gy, gx))
    return speed, direction, vel


def velocity_from_phase(phase_rad, mask, omega_rad_s: float, pixel_size_um=None, radius: int = 3):
    """Local conduction velocity from a phase map: speed = omega / |grad phi| (Bayly et al. 1998).

    The phase is unwrapped across the mask first, then handled as an
    activation time phi / omega.
    """
    if not omega_rad_s > 0:
        raise InputError(f"omega_rad_s must be positive; got {omega_rad_s!r}.")
    phi = unwrap_delay(np.mod(phase_rad, 2 * np.pi), mask, 2 * np.pi)
    return velocity_from_activation(phi / omega_rad_s, mask, pixel_size_um, radius)


#: Largest number of pixels used in a region's plane-wave / point-source fit.
FIT_MAX_POINTS = 5000


def fit_region(act_s, mask, pixel_size_um=None, weight=None) -> dict:
    """Fit a plane wave and a point source to a region's activation times; keep the better.

    Parameters
    ----------
    act_s : (Y, X) ndarray
        Unwrapped activation times, seconds.
    mask : (Y, X) bool ndarray
    pixel_size_um : float, optional
    weight : (Y, X) ndarray, optional
        Weight of each pixel, 1 / variance of its activation time (see
        :func:`delay_uncertainty`); equal weights by default.

    Returns
    -------
    dict
        ``model`` ("plane" or "point"), ``speed_um_s`` (pixels/s without a pixel
        size), ``direction_deg`` (plane wave; NaN for a point source),
        ``origin_yx`` (point source centre, or the earliest pixel for a plane
        wave), ``rms_s`` residual (weighted).
    """
    scale = float(pixel_size_um) if pixel_size_um else 1.0
    wmap = np.ones(np.shape(act_s)) if weight is None else np.asarray(weight, float)
    ok = np.asarray(mask, bool) & np.isfinite(act_s) & np.isfinite(wmap) & (wmap > 0)
    if ok.sum() < 6:
        return {"model": "none", "speed_um_s": np.nan, "direction_deg": np.nan, "origin_yx": (np.nan, np.nan),
                "rms_s": np.nan}
    yy, xx = np.nonzero(ok)
    t = np.asarray(act_s, float)[ok]
    w = wmap[ok] / wmap[ok].mean()
    if t.size > FIT_MAX_POINTS:  # an even subsample is plenty for four parameters
        keep = np.random.default_rng(0).choice(t.size, FIT_MAX_POINTS, replace=False)
        yy, xx, t, w = yy[keep], xx[keep], t[keep], w[keep]
    sw = np.sqrt(w)
    # centred coordinates: a line of pixels (one coordinate constant) must not lend
    # the intercept a gradient along the missing direction
    a = np.column_stack([np.ones_like(t), yy - yy.mean(), xx - xx.mean()])
    coef, *_ = np.linalg.lstsq(a * sw[:, None], t * sw, rcond=None)
    plane_rms = float(np.sqrt(np.average((a @ coef - t) ** 2, weights=w)))
    gy, gx = coef[1] / scale, coef[2] / scale
    g = np.hypot(gy, gx)
    i0 = int(np.argmin(t))
    plane = {"model": "plane", "speed_um_s": float(1 / g) if g > 0 else np.inf,
             "direction_deg": float(np.degrees(np.arctan2(gy, gx))),
             "origin_yx": (float(yy[i0]), float(xx[i0])), "rms_s": plane_rms}

    def resid(p):
        t0, y0, x0, slow = p
        return sw * (t0 + slow * np.hypot(yy - y0, xx - x0) - t)

    def jac(p):
        _, y0, x0, slow = p
        r = np.hypot(yy - y0, xx - x0)
        safe = np.where(r > 0, r, 1.0)
        return sw[:, None] * np.column_stack([np.ones_like(r), -slow * (yy - y0) / safe,
                                              -slow * (xx - x0) / safe, r])

    p0 = [t[i0], yy[i0], xx[i0], max(g * scale, 1e-6)]
    try:
        fit = least_squares(resid, p0, jac=jac, loss="soft_l1", f_scale=max(plane_rms, 1e-6))
        t0, y0, x0, slow = fit.x
        point_rms = float(np.sqrt(np.mean(resid(fit.x) ** 2) / np.mean(w)))
    except (ValueError, np.linalg.LinAlgError):
        return plane
    plane_exact = plane_rms <= 1e-6 * (float(t.max() - t.min()) + 1e-12)
    if point_rms < 0.8 * plane_rms and slow > 0 and not plane_exact:
        return {"model": "point", "speed_um_s": float(scale / slow), "direction_deg": np.nan,
                "origin_yx": (float(y0), float(x0)), "rms_s": point_rms}
    return plane


#: Propagation is reported only when the delays vary across the region more than their noise
#: explains: the chance that pure noise passes is at most this (see :func:`propagation_test`).
PROPAGATION_ALPHA = 1e-3


def delay_uncertainty(score, period_s) -> np.ndarray:
    """Standard deviation of each pixel's activation delay from its lock-in's signal-to-noise ratio.

    With ``score`` = |z|^2 / N (:func:`tempofield.kernels.phase.locked_score`),
    the lock-in phase of a signal in white noise has a standard deviation of
    about 1 / sqrt(2 score) radians (small-noise approximation, capped at
    that of a uniform phase, pi / sqrt(3)), i.e. that share of ``period_s``
    over 2 pi, in seconds.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        sd_rad = np.minimum(1.0 / np.sqrt(2.0 * np.asarray(score, float)), np.pi / np.sqrt(3.0))
    return sd_rad / (2 * np.pi) * np.asarray(period_s, float)


def propagation_test(act_s, mask, sd_s, pooling_radius: int = 0) -> dict:
    """Do the activation times vary across the region more than their own noise explains?

    The weighted scatter of the delays about their weighted mean,
    chi2 = sum w (d - mean)^2 with w = 1 / sd^2, is compared with its
    distribution for a region that beats all at once: chi-square with
    n_eff - 1 degrees of freedom, where neighbouring pooled pixels share
    noise, so ``(2 r + 1)^2`` pixels count as one (n_eff = n / (2r+1)^2, and
    chi2 is divided by the same factor). Propagation is measurable when the
    chance of so large a scatter from noise alone is below
    :data:`PROPAGATION_ALPHA`.

    Returns
    -------
    dict
        ``measurable`` (bool), ``p_value``, ``spread_s`` (the weighted
        standard deviation of the delays), ``noise_s`` (the typical delay
        uncertainty: the root of the weighted mean variance).
    """
    from scipy.stats import chi2 as chi2_dist

    d = np.asarray(act_s, float)
    sd = np.asarray(sd_s, float)
    ok = np.asarray(mask, bool) & np.isfinite(d) & np.isfinite(sd) & (sd > 0)
    n = int(ok.sum())
    block = (2 * int(pooling_radius) + 1) ** 2
    n_eff = n / block
    if n_eff < 3:
        return {"measurable": False, "p_value": 1.0, "spread_s": np.nan, "noise_s": np.nan}
    w = 1.0 / sd[ok] ** 2
    mean = np.sum(w * d[ok]) / w.sum()
    chi2 = float(np.sum(w * (d[ok] - mean) ** 2)) / block
    p_value = float(chi2_dist.sf(chi2, n_eff - 1))
    return {"measurable": p_value < PROPAGATION_ALPHA, "p_value": p_value,
            "spread_s": float(np.sqrt(np.sum(w * (d[ok] - mean) ** 2) / w.sum())),
            "noise_s": float(np.sqrt(n / w.sum()))}


def region_propagation(delay_s, regions, periods: dict, pixel_size_um=None, frame_interval_s=None,
                       radius: int = 3, *, delay_sd_s=None, pooling_radius: int = 0) -> tuple[dict, np.ndarray]:
    """Per-region propagation summary and the (Y, X, 2) velocity field.

    With ``delay_sd_s`` (each pixel's delay uncertainty, :func:`delay_uncertainty`)
    the fits are weighted by 1 / sd^2 and a region gets a speed, direction and
    origin only when :func:`propagation_test` finds its delays vary more than
    their noise explains; a pixel of the velocity field only where its local
    gradient is significant too (|grad T| over its standard error above the
    same test's threshold for two degrees of freedom). Otherwise the region
    is "synchronous": NaN speed, direction and origin, and ``note`` says
    within how much it beats. Without uncertainties, delays that span less
    than one frame interval count as synchrony.
    """
    h, w = regions.shape
    field = np.full((h, w, 2), np.nan)
    out = {}
    boxes = ndi.find_objects(np.asarray(regions))
    sd_map = None if delay_sd_s is None else np.asarray(delay_sd_s, float)
    for label, period in periods.items():
        if not 0 < label <= len(boxes) or boxes[label - 1] is None:  # no pixels: nothing to fit
            out[label] = {"model": "none", "speed_um_s": np.nan, "direction_deg": np.nan,
                          "origin_yx": (np.nan, np.nan), "rms_s": np.nan}
            continue
        # Everything below is local to the region: work on its bounding box
        # (a neighbourhood fit only sees pixels inside the mask anyway).
        ys, xs = boxes[label - 1]
        box = (slice(ys.start, ys.stop), slice(xs.start, xs.stop))
        mask = regions[box] == label
        act = unwrap_delay(delay_s[box], mask, period)
        span = np.nanmax(act) - np.nanmin(act) if np.isfinite(act).any() else 0.0
        sd = None if sd_map is None else sd_map[box]
        test = None if sd is None else propagation_test(act, mask, sd, pooling_radius)
        if test is not None:  # the delays' own noise decides (a lock-in resolves lags far below a frame)
            synchronous = not test["measurable"]
        else:  # without uncertainties: less than one frame interval is taken as synchrony
            synchronous = frame_interval_s is not None and span < frame_interval_s
        if synchronous:
            within = test["spread_s"] if test else span / 2
            out[label] = {"model": "synchronous", "speed_um_s": np.nan, "direction_deg": np.nan,
                          "origin_yx": (np.nan, np.nan), "rms_s": np.nan,
                          "note": f"no measurable propagation: the region beats within +-{1000 * within:.0f} ms"
                                  + (f" (delay noise {1000 * test['noise_s']:.0f} ms, p = {test['p_value']:.2g})"
                                     if test else "")}
            continue
        weight = None if sd is None else 1.0 / np.maximum(sd, 1e-12) ** 2
        _, _, vel = velocity_from_activation(act, mask, pixel_size_um, radius)
        if sd is not None:
            vel[~_significant_gradient(act, mask, sd, radius, pooling_radius)] = np.nan
        field[box][mask] = vel[mask]
        fit = fit_region(act, mask, pixel_size_um, weight)
        oy, ox = fit["origin_yx"]
        out[label] = {**fit, "origin_yx": (oy + ys.start, ox + xs.start)}
        if test:
            out[label]["p_value"] = test["p_value"]
    return out, field


def _significant_gradient(act_s, mask, sd_s, radius: int, pooling_radius: int) -> np.ndarray:
    """Pixels whose local plane fit's gradient stands out of its noise (two degrees of freedom).

    The gradient of a least-squares plane over the (2R+1)^2 window has a
    standard error of sd / sqrt(sum of squared offsets) per axis, inflated
    by (2r+1) for the noise neighbouring pooled pixels share.
    """
    from scipy.stats import chi2 as chi2_dist

    gy, gx = local_gradient(act_s, mask, radius)
    var = np.where(np.asarray(mask, bool), np.asarray(sd_s, float) ** 2, np.nan)
    valid = np.isfinite(var)
    size = 2 * radius + 1
    local_var = ndi.uniform_filter(np.where(valid, var, 0.0), size) / np.maximum(
        ndi.uniform_filter(valid.astype(float), size), 1e-12)
    offsets = size * 2 * sum(k * k for k in range(1, radius + 1))
    se = np.sqrt(np.maximum(local_var, 0.0) / offsets) * (2 * pooling_radius + 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        z2 = (gy ** 2 + gx ** 2) / se ** 2
    return np.isfinite(z2) & (z2 > chi2_dist.isf(PROPAGATION_ALPHA, 2))
