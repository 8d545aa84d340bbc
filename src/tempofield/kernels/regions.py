"""Beating regions: which rhythmic pixels belong together, and the table that describes them.

A pixel is rhythmic when its spectral peak passes the detection test of
:mod:`tempofield.kernels.spectral` (a stated false-alarm rate on noise). Rhythmic pixels
that touch (4-neighbours) and beat at the same rate, within a tolerance tied
to the frequency resolution, form one region; regions smaller than a minimum
area are dropped (isolated false alarms and flickering debris), and holes
inside a region are filled. Labels are numbered by decreasing area. Pure
numpy/scipy.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.ndimage as ndi

from tempofield.kernels import _regions_loops


def rate_tolerance_bpm(rate_bpm, bin_bpm: float) -> np.ndarray:
    """How far two neighbouring pixels' rates may differ and still be one rhythm.

    Two frequency bins (refined peaks of one rhythm scatter by well under one
    bin) or 3 % of the rate, whichever is larger.
    """
    return np.maximum(2.0 * bin_bpm, 0.03 * np.asarray(rate_bpm, float))


def segment(rate_bpm, detected, *, bin_bpm: float, min_area_px: int) -> np.ndarray:
    """Label the beating regions of a rate map.

    Parameters
    ----------
    rate_bpm : (Y, X) ndarray
        Per-pixel rate, NaN where no rhythm.
    detected : (Y, X) bool ndarray
        Pixels that passed the detection test.
    bin_bpm : float
        Frequency resolution of the recording, in bpm (60 / duration).
    min_area_px : int
        Smallest region kept, in pixels.

    Returns
    -------
    (Y, X) int32 ndarray
        0 = no rhythm, 1..n regions by decreasing area.

    Examples
    --------
    >>> r = np.full((6, 8), np.nan); r[:, :3] = 60.0; r[:, 5:] = 90.0
    >>> lab = segment(r, np.isfinite(r), bin_bpm=1.0, min_area_px=4)
    >>> sorted(np.unique(lab).tolist())
    [0, 1, 2]
    """
    rate = np.asarray(rate_bpm, float)
    ok = np.asarray(detected, bool) & np.isfinite(rate)
    h, w = ok.shape
    tol = rate_tolerance_bpm(np.where(ok, rate, 0.0), bin_bpm)
    comp = np.empty((h, w), np.int64)
    _regions_loops.rate_components(np.ascontiguousarray(rate), np.ascontiguousarray(ok), np.ascontiguousarray(tol), comp)
    counts = np.bincount(comp[comp >= 0].ravel())
    ids = np.arange(counts.size)
    big = ids[counts >= min_area_px]
    order = big[np.argsort(-counts[counts >= min_area_px], kind="stable")]
    kept = np.isin(comp, order)
    labels = np.zeros((h, w), np.int32)
    # work inside each component's bounding box: many small regions on a large frame stay cheap
    boxes = ndi.find_objects(np.where(comp >= 0, comp + 1, 0))
    for new, old in enumerate(order, start=1):
        box = boxes[old]
        filled = ndi.binary_fill_holes(comp[box] == old)
        # fill holes, but never over another kept rhythm nested inside this one
        sub = labels[box]
        sub[filled & (sub == 0) & ~(kept[box] & (comp[box] != old))] = new
    return labels


def relabel(labels, min_area_px: int) -> np.ndarray:
    """Drop regions under ``min_area_px`` and number the rest 1..n by decreasing area, without gaps."""
    lab = np.asarray(labels)
    ids, counts = np.unique(lab[lab > 0], return_counts=True)
    keep = counts >= min_area_px
    order = ids[keep][np.argsort(-counts[keep], kind="stable")]
    lut = np.zeros(int(lab.max()) + 1 if lab.size else 1, np.int32)
    lut[order] = np.arange(1, order.size + 1, dtype=np.int32)
    return lut[lab]


def trim_pooling_rim(labels, amplitude, radius: int, *, ratio: float = 0.5) -> np.ndarray:
    """Remove the rim that spatial pooling adds around each region.

    Pooling over (2r+1)^2 pixels spreads a region's signal r pixels outwards:
    a pixel just outside an edge carries about a third of the edge's
    amplitude, one just inside about two thirds. For r rounds, region pixels
    on the region's outer boundary whose amplitude is below ``ratio`` times the
    largest amplitude of their own region within the pooling window are
    dropped. Inner borders between regions, and faint patches inside a
    region, are left alone.

    Examples
    --------
    >>> lab = np.zeros((7, 7), np.int32); lab[1:6, 1:6] = 1
    >>> amp = np.zeros((7, 7)); amp[2:5, 2:5] = 1.0; amp[lab.astype(bool) & (amp == 0)] = 0.3
    >>> int(trim_pooling_rim(lab, amp, 1).sum())
    9
    """
    lab = np.array(labels, np.int32, copy=True)
    amp = np.where(np.isfinite(amplitude), amplitude, 0.0)
    size = 2 * int(radius) + 1
    for _ in range(int(radius)):
        outside = lab == 0
        rim = (lab > 0) & ndi.binary_dilation(outside, ndi.generate_binary_structure(2, 1))
        if not rim.any():
            break
        drop = np.zeros_like(rim)
        boxes = ndi.find_objects(lab)
        for label in np.unique(lab[rim]).tolist():
            sl = boxes[label - 1]
            # the box grown by the pooling radius (the max filter looks that far)
            box = tuple(slice(max(0, s.start - radius), s.stop + radius) for s in sl)
            own = lab[box] == label
            own_max = ndi.maximum_filter(np.where(own, amp[box], 0.0), size=size)
            drop[box] |= rim[box] & own & (amp[box] < ratio * own_max)
        if not drop.any():
            break
        lab[drop] = 0
    return lab


def nearest_region(labels, allowed) -> np.ndarray:
    """Each pixel's nearest region among the ``allowed`` labels (its own label inside one of them).

    Returns (Y, X) int32 labels; all zero when no allowed region exists.

    Examples
    --------
    >>> lab = np.zeros((1, 7), np.int32); lab[0, 0] = 1; lab[0, 6] = 2
    >>> nearest_region(lab, [1, 2]).tolist()
    [[1, 1, 1, 1, 2, 2, 2]]
    """
    lab = np.asarray(labels, np.int32)
    inside = np.isin(lab, np.asarray(list(allowed), np.int32))
    if not inside.any():
        return np.zeros_like(lab)
    _, (iy, ix) = ndi.distance_transform_edt(~inside, return_indices=True)
    return lab[iy, ix].astype(np.int32)


def join_locked(labels, candidates, significant, amplitude, radius: int) -> np.ndarray:
    """Regions grown by the pixels that lock in significantly to their nearest region's reference.

    A pixel outside every region joins its candidate region when its
    lock-in against that region's reference is ``significant`` and it is
    connected (8-neighbours) to the region through such pixels: isolated
    false alarms far from any tissue stay out. The pooling rim the grown
    part brings is then trimmed as for spectral regions
    (:func:`trim_pooling_rim`), from joined pixels only.

    Parameters
    ----------
    labels, candidates : (Y, X) int
        Regions, and each pixel's candidate region (:func:`nearest_region`).
    significant : (Y, X) bool
        The matched test's outcome per pixel.
    amplitude : (Y, X) float
        Amplitude of the rhythm's fundamental (spectral in regions, lock-in
        elsewhere), for the rim trim.
    radius : int
        The pooling radius.

    Examples
    --------
    >>> lab = np.zeros((5, 9), np.int32); lab[1:4, 1:4] = 1
    >>> sig = np.zeros((5, 9), bool); sig[1:4, 4:6] = True; sig[2, 8] = True   # touching; isolated
    >>> out = join_locked(lab, np.ones_like(lab), sig, np.ones((5, 9)), 0)
    >>> int((out == 1).sum()), int(out[2, 8])
    (15, 0)
    """
    lab = np.asarray(labels, np.int32)
    cand = np.asarray(candidates, np.int32)
    grow = (lab == 0) & (cand > 0) & np.asarray(significant, bool)
    out = lab.copy()
    eight = ndi.generate_binary_structure(2, 2)
    for label in np.unique(cand[grow]).tolist():
        comp, _ = ndi.label((lab == label) | (grow & (cand == label)), structure=eight)
        touching = np.unique(comp[lab == label])
        out[grow & (cand == label) & np.isin(comp, touching[touching > 0])] = label
    if radius and (out != lab).any():
        trimmed = trim_pooling_rim(out, amplitude, radius)
        out[(lab == 0) & (trimmed == 0)] = 0
    return out


def bin_labels(regions, bin_ids, gram_bin: int) -> np.ndarray:
    """The region of each Gram bin: the label most of its pixels carry (0 if none)."""
    by = (np.asarray(bin_ids) >> 32).astype(np.int64)
    bx = (np.asarray(bin_ids) & 0xFFFFFFFF).astype(np.int64)
    lab = np.asarray(regions)
    h, w = lab.shape
    ny, nx = -(-h // gram_bin), -(-w // gram_bin)
    n_lab = int(lab.max()) + 1 if lab.size else 1
    # one count per (bin, label): the bin's majority label among its labelled pixels
    # (ties to the smaller label, as bincount().argmax() gives)
    yy, xx = np.nonzero(lab > 0)
    key = ((yy // gram_bin) * nx + xx // gram_bin) * n_lab + lab[yy, xx]
    table = np.bincount(key, minlength=ny * nx * n_lab).reshape(ny * nx, n_lab)
    best = table.argmax(axis=1).astype(np.int32)
    best[table.max(axis=1) == 0] = 0
    return best[by * nx + bx]


TABLE_COLUMNS = (
    "region", "area_px", "area_um2", "rate_median_bpm", "rate_iqr_bpm", "beats", "beat_interval_mean_s",
    "beat_interval_cv", "loop_score", "second_loop_ratio", "quasi_periodic", "coherence_mean", "amplitude_median",
    "conduction_velocity_um_s", "wave_direction_deg", "origin_y_px", "origin_x_px", "origin_y_um", "origin_x_um",
)


def speed_unit(pixel_size_um) -> str:
    """The unit suffix of speeds: ``um_s`` with a pixel size, ``px_s`` (pixels per second) without."""
    return "um_s" if pixel_size_um else "px_s"


def table_columns(pixel_size_um=None) -> list[str]:
    """:data:`TABLE_COLUMNS` with the speed in the unit it is in (``conduction_velocity_px_s`` without a
    pixel size, and no micrometre origin then)."""
    cols = [c.replace("_um_s", "_" + speed_unit(pixel_size_um)) for c in TABLE_COLUMNS]
    return cols if pixel_size_um else [c for c in cols if c not in ("origin_y_um", "origin_x_um")]


def region_table(regions, maps: dict, references: dict, *, pixel_size_um=None, propagation=None) -> pd.DataFrame:
    """One row per region, units in the column names.

    ``maps`` holds (Y, X) arrays ``rate_bpm``, ``coherence``, ``amplitude``;
    ``references`` maps label -> RhythmReference; ``propagation`` maps label
    -> dict with ``speed_um_s``, ``direction_deg``, ``origin_yx`` (optional).
    A region without a reference (a maps-only run) has its rhythm's columns
    empty (``beats``, intervals, loop scores, ``quasi_periodic``), not zero or
    false. Speeds are in micrometres per second, or pixels per second
    (``conduction_velocity_px_s``) without a pixel size. Wave direction:
    degrees counter-clockwise from the +x axis (along the image columns) with
    y pointing down the rows, so a wave travelling down the rows is +90.
    """
    rows = []
    speed_col = "conduction_velocity_" + speed_unit(pixel_size_um)
    for label in sorted(int(v) for v in np.unique(regions) if v > 0):
        inside = regions == label
        rate = maps["rate_bpm"][inside]
        rate = rate[np.isfinite(rate)]
        ref = references.get(label)
        prop = (propagation or {}).get(label, {})
        iv = ref.beat_intervals_s if ref is not None else np.zeros(0)
        origin = prop.get("origin_yx", (np.nan, np.nan))
        row = {
            "region": label,
            "area_px": int(inside.sum()),
            "area_um2": float(inside.sum() * pixel_size_um ** 2) if pixel_size_um else np.nan,
            "rate_median_bpm": float(np.median(rate)) if rate.size else np.nan,
            "rate_iqr_bpm": float(np.subtract(*np.percentile(rate, [75, 25]))) if rate.size else np.nan,
            "beats": int(len(ref.beat_times_s)) if ref is not None else pd.NA,
            "beat_interval_mean_s": float(iv.mean()) if iv.size else np.nan,
            "beat_interval_cv": float(ref.interval_cv) if ref is not None else np.nan,
            "loop_score": float(ref.score) if ref is not None else np.nan,
            "second_loop_ratio": float(ref.second_loop_ratio) if ref is not None else np.nan,
            "quasi_periodic": bool(ref.quasi_periodic) if ref is not None else pd.NA,
            "coherence_mean": float(np.nanmean(maps["coherence"][inside])) if np.isfinite(
                maps["coherence"][inside]).any() else np.nan,
            "amplitude_median": float(np.nanmedian(maps["amplitude"][inside])) if np.isfinite(
                maps["amplitude"][inside]).any() else np.nan,
            speed_col: float(prop.get("speed_um_s", np.nan)),
            "wave_direction_deg": float(prop.get("direction_deg", np.nan)),
            "origin_y_px": float(origin[0]),
            "origin_x_px": float(origin[1]),
        }
        if pixel_size_um:
            row["origin_y_um"] = float(origin[0]) * pixel_size_um
            row["origin_x_um"] = float(origin[1]) * pixel_size_um
        rows.append(row)
    table = pd.DataFrame(rows, columns=table_columns(pixel_size_um))
    return table.astype({"beats": "Int64", "quasi_periodic": "boolean"})


def region_mean_trace(frames, regions, label: int) -> np.ndarray:
    """(T,) float32 mean of ``frames`` (T, Y, X; numpy or dask) over the pixels where ``regions == label``.

    Only the region's bounding box is read from a lazy stack.

    Examples
    --------
    >>> f = np.arange(24.0).reshape(2, 3, 4); lab = np.zeros((3, 4), int); lab[1, 1:3] = 1
    >>> region_mean_trace(f, lab, 1).tolist()
    [5.5, 17.5]
    """
    from tempofield.errors import InputError

    mask = np.asarray(regions) == int(label)
    if not mask.any():
        raise InputError(f"region {label} has no pixels in this result.")
    ys, xs = np.nonzero(mask)
    y0, y1, x0, x1 = ys.min(), ys.max() + 1, xs.min(), xs.max() + 1
    box = np.asarray(frames[:, y0:y1, x0:x1])
    return box[:, mask[y0:y1, x0:x1]].mean(axis=1, dtype=np.float32)
