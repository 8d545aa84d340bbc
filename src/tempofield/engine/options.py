"""Analysis options: one validated table of names, defaults, units and help.

The command line, the napari panel and the batch runner all read their options
from :data:`OPTIONS` through :func:`validate_options`; none keeps a copy. Each
option says its unit in its name where it has one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

from tempofield.engine.presets import SPECIMENS
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


def _positive(v) -> bool:
    return v > 0 and math.isfinite(v)


#: The preset names, as the help text and the error for an unknown name list them.
_SPECIMENS = ", ".join(SPECIMENS)

OPTIONS: tuple[Option, ...] = (
    Option("pooling_radius_px", 1, int,
           "Radius of the square spatial pooling window (pixels) applied before the per-pixel "
           "analysis; 0 disables pooling. Pooling averages (2r+1)^2 pixels so faint tissue is still found.",
           lambda v: 0 <= v <= 32, "an integer from 0 to 32"),
    Option("false_alarm", 1e-3, float,
           "Probability that a pixel of pure white noise is reported as rhythmic (per pixel).",
           lambda v: 0 < v < 0.5, "a number above 0 and below 0.5 (e.g. 0.001)"),
    Option("trend_cutoff_fraction", 0.5, float,
           "Slow trends (bleaching, drift) below this fraction of the lowest rate are removed.",
           lambda v: 0 < v <= 0.9, "a number above 0 and at most 0.9"),
    Option("memory_budget_mb", 512, float,
           "Working memory (MB) shared by the tiles analysed at the same time (one per thread); sets the "
           "tile size.",
           lambda v: 16 <= v <= 1e6, "a number of megabytes from 16 to 1000000 (1 TB)"),
    Option("min_cycles", 3.0, float,
           "The recording must span at least this many cycles of the slowest rate in the band.",
           lambda v: v >= 2, "a number from 2 up, with no upper limit (but the recording must span that many "
                             "cycles of the slowest rate)"),
    Option("gram_max_pixels", 20000, int,
           "Most pixels each beating region's rhythm reference (the beat timing its phase and beats are "
           "measured against) is built from. In larger regions neighbouring pixels are averaged in small "
           "squares until they fit. Higher: the reference uses finer detail, but the analysis takes more "
           "memory (it grows with this number times the number of frames) and more time. Lower: faster and "
           "leaner on very large fields. The default suits most recordings; lower it if a large field runs "
           "out of memory.",
           lambda v: 100 <= v <= 10**7, "an integer from 100 to 10000000"),
    Option("n_landmarks", 200, int,
           "How many moments of the recording are compared with each other to find each region's repeating "
           "beat cycle (its loop score and the timing of its beats). More: a steadier loop score and beat "
           "timing on long or irregular recordings, but that step takes longer (its time grows faster than "
           "this number). Fewer: faster, a little noisier. The default suits most recordings; try 300 to 400 "
           "if the loop score of similar recordings varies a lot.",
           lambda v: 20 <= v <= 2000, "an integer from 20 to 2000"),
    Option("max_frames_topology", 1500, int,
           "Most frames the cycle-finding step (loop score, beat timing of each region) looks at. Longer "
           "recordings are thinned for that step only (every 2nd, 3rd ... frame, keeping enough frames per "
           "beat); beat times and phase maps are still given for every frame. Its memory grows with the "
           "square of this number: lower it if that step runs out of memory on long recordings, raise it if "
           "fast beats in long recordings get a low loop score.",
           lambda v: 100 <= v <= 20000, "an integer from 100 to 20000"),
    Option("min_area_px", 25, int,
           "Smallest beating region kept, in pixels; smaller groups of rhythmic pixels (isolated false "
           "alarms, debris) are dropped.",
           lambda v: 1 <= v <= 10**8, "an integer from 1 to 100000000"),
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
           f"{_SPECIMENS}; empty for none.",
           lambda v: v == "" or v in SPECIMENS, f"one of the specimen presets {_SPECIMENS}, or empty for none"),
    Option("rate_unit", "", str,
           "Unit of the rates in the summary, the report and regions.csv: bpm (beats per minute) or Hz "
           "(beats per second; 1 Hz is 60 bpm). Empty: bpm, or Hz with the airway-cilia preset.",
           lambda v: v in ("", "bpm", "Hz"), "bpm, Hz, or empty (bpm; Hz with the airway-cilia preset)"),
    Option("magnified_preview", False, bool,
           "Also write preview_magnified.tif: the first frames with the detected rhythm's band amplified "
           "(linear Eulerian magnification) so a subtle beat becomes visible.",
           None, "true or false"),
    Option("worker_processes", 0, int,
           "Helper programs that run the cycle-finding step (each region's rhythm reference, and the tile "
           "loop-score map) beside the main one. 0 runs that step in the main program: simplest, and right "
           "for the command line and scripts. In the napari viewer, 1 keeps the viewer responding instead of "
           "freezing while that step runs. More than 1 helps only when there are many beating regions; each "
           "helper takes about 0.3 GB of memory and a few seconds to start the first time. On a dask cluster "
           "that step runs on the cluster's workers instead.",
           lambda v: 0 <= v <= 256, "an integer from 0 to 256"),
    Option("phase_from_kept_spectra", True, bool,
           "On: while the stack is read for the first maps, keep the part of every pixel's signal that the "
           "phase maps need in a temporary file (in the temporary folder, deleted when the analysis ends), so "
           "the stack is read only once: faster, above all for large files on network or slow disks. Off: the "
           "stack is read a second time for the phase maps instead; the maps agree to within 0.001 radians. "
           "Turn it off when the temporary folder's disk is small or slow. The stack is read twice anyway when "
           "that folder lacks space, when a region's rhythm is too irregular for the kept part, or when the "
           "cluster's workers do not share this computer's disk.",
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
        option (by its Python name: the command line shows its flag instead),
        the value and what is allowed, with both limits.

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
            raise InputError(f"{name}={value!r} is not {opt.allowed}.") from None
        if opt.check is not None and not opt.check(conv):
            if opt.kind is str:
                raise InputError(f"{name}={value!r} is not known: use {opt.allowed}.")
            raise InputError(f"{name}={value!r} is out of range: use {opt.allowed}.")
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
            "minute, e.g. rate_range_bpm=(30, 180)."
        ) from None
    if not (_positive(lo) and _positive(hi) and lo < hi):
        raise InputError(
            f"rate_range_bpm={rate_range_bpm!r} must satisfy 0 < low < high (beats per minute), "
            "e.g. rate_range_bpm=(30, 180)."
        )
    return lo, hi
