"""A magnified preview: the detected rhythm's band amplified so a subtle beat becomes visible.

Linear Eulerian magnification (Wu et al. 2012): each frame is I + alpha * B,
where B is the intensity change of the spatially smoothed stack band-passed in
time around the rhythm. For intensity changes this is exact; for motion it is
a good approximation only while the amplified displacement stays small
against the image structure, (1 + alpha) delta(t) < lambda / 8 (bound from
memory of the paper). A preview, not a measurement. Pure numpy/scipy.
"""

from __future__ import annotations

import numpy as np
import scipy.fft
import scipy.ndimage as ndi

from tempofield._dtypes import as_float
from tempofield.errors import InputError


def bandpass_time(frames, frame_interval_s: float, band_hz) -> np.ndarray:
    """Ideal band-pass along time: keep the Fourier bins inside ``band_hz``, drop the rest.

    Examples
    --------
    >>> t = np.arange(200) * 0.05
    >>> x = (np.sin(2 * np.pi * 1.0 * t) + np.sin(2 * np.pi * 5.0 * t))[:, None, None]
    >>> y = bandpass_time(x, 0.05, (0.5, 2.0))[:, 0, 0]
    >>> bool(np.allclose(y, np.sin(2 * np.pi * 1.0 * t), atol=1e-6))
    True
    """
    x = as_float(frames)
    lo, hi = band_hz
    if not 0 <= lo < hi:
        raise InputError(f"band_hz={band_hz!r} must satisfy 0 <= low < high.")
    spec = scipy.fft.rfft(x, axis=0)
    f = scipy.fft.rfftfreq(x.shape[0], frame_interval_s)
    spec[(f < lo) | (f > hi)] = 0
    return scipy.fft.irfft(spec, n=x.shape[0], axis=0).astype(np.float32)


def magnify(frames, frame_interval_s: float, band_hz, *, alpha: float = 10.0, sigma_px: float = 2.0) -> np.ndarray:
    """Amplify the band ``band_hz`` of a (T, Y, X) stack by ``alpha``.

    Parameters
    ----------
    frames : (T, Y, X) ndarray
    frame_interval_s : float
    band_hz : (float, float)
        Temporal band to amplify, Hz (e.g. the rhythm's rate +-20 %).
    alpha : float
        Amplification; the band's content is multiplied by 1 + alpha.
    sigma_px : float
        Gaussian smoothing in space before band-passing (reduces amplified noise).

    Returns
    -------
    (T, Y, X) float32 ndarray: I + alpha * B.

    References
    ----------
    Wu, H.-Y. et al. (2012). Eulerian video magnification for revealing subtle
    changes in the world. ACM Trans. Graph. 31(4), 65.
    """
    x = as_float(frames)
    if x.ndim != 3:
        raise InputError(f"magnify needs (T, Y, X) frames; got shape {x.shape}.")
    smooth = ndi.gaussian_filter(x, sigma=(0, sigma_px, sigma_px)) if sigma_px > 0 else x
    return x + np.float32(alpha) * bandpass_time(smooth, frame_interval_s, band_hz)
