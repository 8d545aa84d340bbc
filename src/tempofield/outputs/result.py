"""RhythmResult: the maps, tables and references of one analysis, and their files.

A result folder holds ``maps.ome.zarr`` (OME-NGFF 0.5 on Zarr v3: one channel
per map named after the attribute, physical scale on y and x, plus the region
labels as an NGFF label image), ``regions.csv``, ``beats.csv``,
``references.json`` and ``run.json`` (version, parameters, input identity,
timings). A folder is written beside its destination and renamed into place
when complete, so a reader never sees half a result, and an existing result is
replaced only when the caller asks for it.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from tempofield.errors import InputError, ResultExistsError
from tempofield.io.atomic import atomic_folder, check_replaceable

#: Maps of the public contract, in channel order of ``maps.ome.zarr``.
MAP_NAMES = ("rate_bpm", "period_s", "amplitude", "periodicity", "coherence", "phase_rad", "delay_s", "regions")

#: Physical unit of each map (UDUNITS-style), for file metadata and colour bars.
MAP_UNITS = {"rate_bpm": "1/minute", "period_s": "second", "amplitude": "intensity",
             "periodicity": "1", "coherence": "1", "phase_rad": "radian", "delay_s": "second",
             "regions": "label"}

#: Units of the maps a run may add beside the public ones (``extra_maps``).
EXTRA_UNITS = {"peak_score": "1", "mean_intensity": "intensity", "detection": "1",
               "velocity_y_um_s": "micrometer/second", "velocity_x_um_s": "micrometer/second",
               "velocity_y_px_s": "pixel/second", "velocity_x_px_s": "pixel/second", "loop_score_tiles": "1"}

RUN_FILE = "run.json"
MAPS_FILE = "maps.ome.zarr"
REGIONS_FILE = "regions.csv"
BEATS_FILE = "beats.csv"
REFERENCES_FILE = "references.json"
REPORT_FILE = "report.png"


@dataclass
class RhythmResult:
    """Everything one analysis produced.

    Maps are (Y, X) float32 at the input's size (``regions`` is int32, 0 = no
    rhythm); NaN marks pixels where a map has no value.
    """

    rate_bpm: np.ndarray
    period_s: np.ndarray
    amplitude: np.ndarray
    periodicity: np.ndarray
    coherence: np.ndarray
    phase_rad: np.ndarray
    delay_s: np.ndarray
    regions: np.ndarray
    frame_interval_s: float
    pixel_size_um: float | None = None
    region_table: pd.DataFrame = field(default_factory=pd.DataFrame)
    references: dict = field(default_factory=dict)
    parameters: dict = field(default_factory=dict)
    input: dict = field(default_factory=dict)
    timings: dict = field(default_factory=dict)
    extra_maps: dict = field(default_factory=dict)
    version: str = ""

    @property
    def maps(self) -> dict[str, np.ndarray]:
        """The contract's maps by name, in channel order."""
        return {name: getattr(self, name) for name in MAP_NAMES}

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.rate_bpm.shape)

    @property
    def rate_unit(self) -> str:
        """``"bpm"`` or ``"Hz"``: the unit of rates in the tables and figures of this result (the maps are in bpm)."""
        return "Hz" if self.parameters.get("rate_unit_shown", self.parameters.get("rate_unit")) == "Hz" else "bpm"

    def summary(self) -> dict[str, Any]:
        """A few headline numbers: rhythmic area, median rate and its spread."""
        rate = self.rate_bpm[np.isfinite(self.rate_bpm)]
        out = {"rhythmic_fraction": float(rate.size / self.rate_bpm.size),
               "rate_median_bpm": float(np.median(rate)) if rate.size else float("nan"),
               "rate_iqr_bpm": float(np.subtract(*np.percentile(rate, [75, 25]))) if rate.size else float("nan"),
               "n_regions": int(len(np.unique(self.regions[self.regions > 0])))}
        return out

    def save(self, path, *, overwrite: bool = False, extra_files: dict | None = None) -> Path:
        """Write the result folder at ``path`` (see module notes), atomically.

        Parameters
        ----------
        path : str or os.PathLike
            The folder to create.
        overwrite : bool, keyword-only
            Replace an existing result folder. Without it an existing folder
            is an error and is left untouched.
        extra_files : dict, optional
            ``{file name: callable(folder_path)}`` writers of more files (the
            report), run inside the temporary folder before it is renamed.

        Returns
        -------
        pathlib.Path
            The folder written.

        Raises
        ------
        ResultExistsError
            If ``path`` exists and ``overwrite`` is False.
        """
        dest = Path(path).resolve()
        if dest.exists() and not overwrite:
            raise ResultExistsError(
                f"{str(dest)!r} already exists; nothing was written. Choose another output folder, "
                "or pass overwrite=True (--overwrite on the command line) to replace it.")
        source = self.input.get("identity", {}).get("source")
        check_replaceable(dest, is_result_folder, "tempofield result folder",
                          protect=[source] if source and source != "array" else [])
        with atomic_folder(dest, overwrite=overwrite) as tmp:
            self._write_into(tmp)
            for writer in (extra_files or {}).values():
                writer(tmp)
            _write_json(tmp / RUN_FILE, self._run_record())  # last: marks the folder complete
        return dest

    def _run_record(self) -> dict[str, Any]:
        return {"format": "tempofield-result", "format_version": 1, "version": self.version,
                "parameters": self.parameters, "input": self.input, "timings": self.timings,
                "frame_interval_s": self.frame_interval_s, "pixel_size_um": self.pixel_size_um,
                "shape": list(self.shape), "summary": self.summary(),
                "extra_maps": sorted(self.extra_maps)}

    def _write_into(self, folder: Path) -> None:
        from tempofield.io import omezarr

        # the regions are a label image only (another viewer must not show them as a grey channel)
        channels = {name: getattr(self, name) for name in MAP_NAMES if name != "regions"}
        channels.update(self.extra_maps)
        omezarr.write_maps(folder / MAPS_FILE, channels, pixel_size_um=self.pixel_size_um,
                           labels={"regions": self.regions}, units={**MAP_UNITS, **EXTRA_UNITS})
        table = self.region_table if self.region_table is not None else pd.DataFrame()
        in_rate_unit(table, self.rate_unit).to_csv(folder / REGIONS_FILE, index=False)
        beats = beats_table(self.references)
        beats.to_csv(folder / BEATS_FILE, index=False)
        _write_json(folder / REFERENCES_FILE,
                    {str(k): (ref.to_dict() if hasattr(ref, "to_dict") else ref) for k, ref in self.references.items()})


def in_rate_unit(table: pd.DataFrame, unit: str) -> pd.DataFrame:
    """A region table with its rate columns in ``unit``: ``rate_*_bpm`` become ``rate_*_hz`` (divided by 60)
    for Hz; unchanged for bpm.

    Examples
    --------
    >>> in_rate_unit(pd.DataFrame({"region": [1], "rate_median_bpm": [90.0]}), "Hz").to_dict("list")
    {'region': [1], 'rate_median_hz': [1.5]}
    """
    if unit != "Hz":
        return table
    rates = [c for c in table.columns if c.startswith("rate_") and c.endswith("_bpm")]
    out = table.copy()
    for c in rates:
        out[c] = out[c] / 60.0
    return out.rename(columns={c: c[:-len("_bpm")] + "_hz" for c in rates})


def beats_table(references: dict) -> pd.DataFrame:
    """One row per beat of every region's reference: region, beat index, time, interval."""
    rows = []
    for label, ref in references.items():
        times = np.asarray(getattr(ref, "beat_times_s", []), float)
        for i, t in enumerate(times):
            rows.append({"region": int(label), "beat": i + 1, "time_s": float(t),
                         "interval_s": float(t - times[i - 1]) if i else float("nan")})
    return pd.DataFrame(rows, columns=["region", "beat", "time_s", "interval_s"])


def _write_json(path: Path, obj) -> None:
    path.write_text(json.dumps(obj, indent=2, default=_json_default))


def _json_default(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"cannot store {type(o).__name__} in JSON")


RESULT_FILES = frozenset({MAPS_FILE, REGIONS_FILE, BEATS_FILE, REFERENCES_FILE, REPORT_FILE, RUN_FILE,
                          "preview_magnified.tif"})


def is_result_folder(path) -> bool:
    """True for a tempofield result folder, complete or torn: it holds nothing but result files."""
    p = Path(path)
    if is_complete(p):
        return True
    try:
        names = {c.name for c in p.iterdir()}
    except OSError:
        return False
    return bool(names) and names <= RESULT_FILES


def is_complete(path) -> bool:
    """True if ``path`` is a finished result folder (its run.json is present and readable)."""
    try:
        rec = json.loads((Path(path) / RUN_FILE).read_text())
    except (OSError, ValueError):
        return False
    return rec.get("format") == "tempofield-result"


def load_result(path) -> RhythmResult:
    """Read a result folder written by :meth:`RhythmResult.save`.

    Raises
    ------
    InputError
        If ``path`` is not a complete tempofield result folder.
    """
    from tempofield.io import omezarr
    from tempofield.kernels.reference import RhythmReference

    folder = Path(path)
    if not is_complete(folder):
        raise InputError(f"{str(folder)!r} is not a complete tempofield result folder (no valid {RUN_FILE}).")
    rec = json.loads((folder / RUN_FILE).read_text())
    channels, _ = omezarr.read_maps(folder / MAPS_FILE)
    if "regions" not in channels:  # (results written before the regions became a label image only)
        channels["regions"] = omezarr.read_label(folder / MAPS_FILE, "regions")
    table_path = folder / REGIONS_FILE
    try:
        table = pd.read_csv(table_path)
    except (pd.errors.EmptyDataError, FileNotFoundError):
        table = pd.DataFrame()
    refs = {}
    ref_path = folder / REFERENCES_FILE
    if ref_path.exists():
        for k, d in json.loads(ref_path.read_text()).items():
            refs[int(k)] = RhythmReference.from_dict(d)
    extra = {k: channels[k] for k in rec.get("extra_maps", []) if k in channels}
    return RhythmResult(
        **{name: (channels[name].astype(np.int32) if name == "regions" else channels[name]) for name in MAP_NAMES},
        frame_interval_s=rec["frame_interval_s"], pixel_size_um=rec.get("pixel_size_um"),
        region_table=table, references=refs, parameters=rec.get("parameters", {}),
        input=rec.get("input", {}), timings=rec.get("timings", {}), extra_maps=extra,
        version=rec.get("version", ""))
