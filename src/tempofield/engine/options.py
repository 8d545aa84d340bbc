"""Analysis options: one validated table of names, defaults, units and help.

The command line, the napari panel and the batch runner all read their options
from :data:`OPTIONS` through :func:`validate_options`; none keeps a copy. Each
option says its unit in its name where it has one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

from tempofield.errors import InputError


@dataclass(frozen=True)
class Option:
    """One analysis option: its name, default, type, help text and check."""

    name: str
    default: Any
    kind: type
    help: str
    check: Callable[[Any], bool] | None = None
    allowed: str = ""
    cli: bool = True


#: The rate band searched when neither the caller nor a specimen preset gives one.
DEFAULT_RATE_RANGE_BPM = (20.0, 240.0)


def _specimen_names():
    from tempofield.engine.presets import SPECIMENS

    return SPECIMENS


def _positive(v) -> bool:
    return v > 0 and math.isfinite(v)


OPTIONS: tuple[Option, ...] = (
    Option("pooling_radius_px", 1, int,
           "Radius of the square spatial pooling window (pixels) applied before the per-pixel "
           "analysis; 0 disables pooling. Pooling averages (2r+1)^2 pixels so faint tissue is still found.",
           lambda v: 0 <= v <= 32, "an integer from 0 to 32"),
    Option("false_alarm", 1e-3, float,
           "Probability that a pixel of pure white noise is reported as rhythmic (per pixel).",
           lambda v: 0 < v < 0.5, "a number between 0 and 0.5 (e.g. 0.001)"),
    Option("trend_cutoff_fraction", 0.5, float,
           "Slow trends (bleaching, drift) below this fraction of the lowest rate are removed.",
           lambda v: 0 < v <= 0.9, "a number in (0, 0.9]"),
    Option("memory_budget_mb", 512, float,
           "Working memory (MB) shared by the tiles analysed at the same time (one per thread); sets the "
           "tile size.",
           lambda v: 16 <= v <= 1e6, "a number of megabytes >= 16"),
    Option("min_cycles", 3.0, float,
           "The recording must span at least this many cycles of the slowest rate in the band.",
           lambda v: v >= 2, "a number >= 2"),
    Option("gram_max_pixels", 20000, int,
           "Cap on the number of (binned) pixels that enter the frame Gram matrix of the rhythm "
           "reference; the bin size grows until the beating pixels fit under it.",
           lambda v: 100 <= v <= 10**7, "an integer >= 100"),
    Option("n_landmarks", 200, int,
           "Number of landmark windows used for persistent homology and circular coordinates.",
           lambda v: 20 <= v <= 2000, "an integer from 20 to 2000"),
    Option("max_frames_topology", 1500, int,
           "Longest series of windows given to persistence; longer recordings are decimated and the "
           "phase is extended to every frame afterwards.",
           lambda v: 100 <= v <= 20000, "an integer from 100 to 20000"),
    Option("min_area_px", 25, int,
           "Smallest beating region kept, in pixels; smaller groups of rhythmic pixels (isolated false "
           "alarms, debris) are dropped.",
           lambda v: 1 <= v <= 10**8, "an integer >= 1"),
    Option("locked_detection", True, bool,
           "Once a region's rhythm is known, also count the pixels beside it that follow that rhythm: a "
           "pixel joins when its signal at the region's own beat (a lock-in, no search over rates) is "
           "significant at the same false-alarm rate, and it touches the region. Finds faint tissue next to "
           "bright tissue; the detection map says which pixels were found this way.",
           None, "true or false"),
    Option("maps_only", False, bool,
           "Compute only the spectral maps (rate, period, amplitude, periodicity) in one read of the stack; "
           "skip regions' rhythm references and the per-pixel phase pass.",
           None, "true or false"),
    Option("specimen", "", str,
           "Specimen preset (sets the rate band when none is given and warns about implausible results): "
           "hpsc-cardiomyocytes, zebrafish-heart-28c, mouse-heart, airway-cilia; empty for none.",
           lambda v: v == "" or v in _specimen_names(), "one of the preset names or empty"),
    Option("magnified_preview", False, bool,
           "Also write preview_magnified.tif: the first frames with the detected rhythm's band amplified "
           "(linear Eulerian magnification) so a subtle beat becomes visible.",
           None, "true or false"),
    Option("worker_processes", 0, int,
           "Worker processes for the persistent-homology steps (rhythm references, tile loop map); 0 runs "
           "them in the calling thread. Processes keep a GUI responsive (ripser holds Python's GIL); a "
           "script using them needs the usual `if __name__ == \"__main__\":` guard. On a dask.distributed "
           "cluster these steps go to its workers instead.",
           lambda v: 0 <= v <= 256, "an integer from 0 to 256"),
    Option("phase_from_kept_spectra", True, bool,
           "Keep the band of every pixel's spectrum that the lock-in needs (in a temporary file) during the "
           "maps pass, and compute the phase maps from it instead of reading the stack a second time. The "
           "stack is read again anyway when a reference's spectrum leaves that band, when the temporary "
           "directory lacks the space, or when the cluster's workers do not share this machine's disk.",
           None, "true or false"),
    Option("tile_loop_map", False, bool,
           "Also compute a tile-level loop-score map (16x16 pixel tiles), in worker processes (at least one).",
           None, "true or false"),
)

OPTION_BY_NAME = {o.name: o for o in OPTIONS}


def defaults() -> dict[str, Any]:
    """Return a fresh dict of every option's default value."""
    return {o.name: o.default for o in OPTIONS}


def _coerce(opt: Option, value):
    if opt.kind is bool:
        if isinstance(value, str):
            low = value.strip().lower()
            if low in ("1", "true", "yes", "on"):
                return True
            if low in ("0", "false", "no", "off"):
                return False
            raise ValueError(value)
        return bool(value)
    if opt.kind is int:
        if isinstance(value, float) and not value.is_integer():
            raise ValueError(value)
        return int(value)
    return opt.kind(value)


def validate_options(options: dict[str, Any] | None = None) -> dict[str, Any]:
    """Check user options against :data:`OPTIONS` and fill in defaults.

    Parameters
    ----------
    options : dict, optional
        Option names (as in :data:`OPTIONS`) to values. Strings are converted.

    Returns
    -------
    dict
        Every option, validated and converted to its declared type.

    Raises
    ------
    InputError
        If a name is unknown or a value is out of range; the message names the
        option, the value and what is allowed.

    Examples
    --------
    >>> validate_options({"pooling_radius_px": "2"})["pooling_radius_px"]
    2
    """
    out = defaults()
    for name, value in (options or {}).items():
        opt = OPTION_BY_NAME.get(name)
        if opt is None:
            known = ", ".join(sorted(OPTION_BY_NAME))
            raise InputError(f"unknown option {name!r}; known options are: {known}.")
        try:
            conv = _coerce(opt, value)
        except (TypeError, ValueError):
            raise InputError(f"option {name}={value!r} is not {opt.allowed}.") from None
        if opt.check is not None and not opt.check(conv):
            raise InputError(f"option {name}={value!r} is out of range: use {opt.allowed}.")
        out[name] = conv
    return out


def validate_rate_range(rate_range_bpm) -> tuple[float, float]:
    """Check a (low, high) rate band in beats per minute and return it as floats.

    Raises
    ------
    InputError
        If it is not two finite positive numbers with low < high.

    Examples
    --------
    >>> validate_rate_range((30, 180))
    (30.0, 180.0)
    """
    try:
        lo, hi = (float(v) for v in rate_range_bpm)
    except (TypeError, ValueError):
        raise InputError(
            f"rate_range_bpm={rate_range_bpm!r} must be two numbers (low, high) in beats per "
            "minute, e.g. rate_range_bpm=(30, 180) or --rate-range 30 180."
        ) from None
    if not (_positive(lo) and _positive(hi) and lo < hi):
        raise InputError(
            f"rate_range_bpm={rate_range_bpm!r} must satisfy 0 < low < high (beats per minute), "
            "e.g. (30, 180)."
        )
    return lo, hi
