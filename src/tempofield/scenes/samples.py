"""The shipped sample stacks: made by :mod:`tempofield.scenes.synthetic`, written as real files.

``well_sheet.tif``   ImageJ TIFF: a culture well with a sheet beating at 72 bpm
                     (wave from a pacemaker), a cluster at 42 bpm, a faint
                     patch, bleaching, noise and flickering debris.
``plane_wave.ome.tif`` OME-TIFF: a straight wave of known speed and direction.
Each has a ``*_truth.npz`` with the ground truth it was built from.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import tifffile

from tempofield.scenes import synthetic

SEED = 20261202


def well_sheet():
    return synthetic.well_scene((250, 80, 80), frame_interval_s=0.04, pixel_size_um=4.0, speed_um_s=800.0,
                                pacemaker=(22.0, 22.0), cluster_center=(58.0, 60.0), cluster_radius_px=9.0,
                                rng=SEED)


def plane_wave():
    return synthetic.plane_wave_scene((200, 48, 48), frame_interval_s=0.02, pixel_size_um=5.0,
                                      rate_bpm=90.0, speed_um_s=6000.0, direction_deg=30.0,
                                      dtype=np.uint16, rng=SEED)


def _truth_arrays(truth: dict) -> dict:
    out = {}
    for key, val in truth.items():
        if isinstance(val, dict):
            for label, v in val.items():
                out[f"{key}__{label}"] = np.asarray(v)
        else:
            out[key] = np.asarray(val)
    return out


def write_samples(folder) -> list[Path]:
    """Write the sample stacks and their truth into ``folder``; return the paths written."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    s = well_sheet()
    p = folder / "well_sheet.tif"
    tifffile.imwrite(p, s.frames, imagej=True, compression="zlib",
                     resolution=(1 / s.pixel_size_um, 1 / s.pixel_size_um),
                     metadata={"axes": "TYX", "finterval": s.frame_interval_s, "unit": "um"})
    np.savez_compressed(folder / "well_sheet_truth.npz", **_truth_arrays(s.truth))
    paths += [p, folder / "well_sheet_truth.npz"]
    w = plane_wave()
    p = folder / "plane_wave.ome.tif"
    tifffile.imwrite(p, w.frames, ome=True, compression="zlib",
                     metadata={"axes": "TYX", "TimeIncrement": w.frame_interval_s, "TimeIncrementUnit": "s",
                               "PhysicalSizeX": w.pixel_size_um, "PhysicalSizeXUnit": "µm",
                               "PhysicalSizeY": w.pixel_size_um, "PhysicalSizeYUnit": "µm"})
    np.savez_compressed(folder / "plane_wave_truth.npz", **_truth_arrays(w.truth))
    paths += [p, folder / "plane_wave_truth.npz"]
    return paths
