"""The stages of an analysis, each a function of the run's state.

An analysis is :func:`prepare` followed by the stages in
:data:`tempofield.engine.run.STAGES`. Every stage takes the :class:`Run`,
reads the fields its docstring names under "Reads", fills those under
"Writes", and is a generator: what it yields are :class:`Progress` ticks (each
a point where the caller may cancel). A stage with nothing to do for this run
(no regions, ``maps_only``) returns at once. Adding a stage is one function
here, one line in ``STAGES`` and one test (DEVELOPERS.md, "Adding a stage").
"""

from __future__ import annotations

import contextlib
import math
import os
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator

import numpy as np

from tempofield._version import __version__
from tempofield.engine import presets
from tempofield.engine.kept import KeptSpectra, keep_spectra, kept_tasks
from tempofield.engine.options import (
    DEFAULT_RATE_RANGE_BPM,
    validate_options,
    validate_rate_range,
)
from tempofield.engine.processes import preload_later_stages, run_in_processes
from tempofield.engine.stack import Stack, open_stack
from tempofield.engine.tile_kernels import (
    PASS1_KEYS,
    gather_bins,
    kept_phase_tile_kernel,
    maps_tile_kernel,
    phase_tile_kernel,
)
from tempofield.engine.tiles import (
    Progress,
    TilePlan,
    active_client,
    drain,
    parallelism,
    pass_tasks,
    plan_tiles,
)
from tempofield.errors import CancelledError, InputError
from tempofield.kernels import phase as phase_mod
from tempofield.kernels import preprocess, rhythm, spectral
from tempofield.kernels import propagation as propagation_mod
from tempofield.kernels import regions as regions_mod
from tempofield.kernels.reference import reference_from_theta
from tempofield.outputs.result import RhythmResult

#: Energy share of the lock-in rows the phase stage may leave out when it reads fewer
#: of the kept bins (a tenth of phase.MAX_BAND_LEAK: the sums then stay within about
#: 0.3 % of their norms, and coherence within a few thousandths of the second read).
NARROW_LEAK = 1e-5


#: Specimens whose field gives rates in hertz (cilia beat frequency): their default rate unit.
HZ_SPECIMENS = frozenset({"airway-cilia"})

#: Pixels at least this coherent with their reference define the earliest phase of a region.
COHERENT = 0.5


def tile_loop_map(traces, bin_region, results, labels, rate_map, gram_bin, frame_interval_s, opts):
    """Loop score of every TILE_LOOP_PX square tile, from the Gram bins inside it, in worker processes.

    Returns the (Y, X) map (NaN where a tile has no score) and the tiles whose
    score could not be computed, as ((tile row, tile column), reason) pairs;
    an error that is not a :class:`~tempofield.errors.InputError` is raised.
    """
    ids = np.array(sorted({b for r in results for b in r["bins"].tolist()}), np.int64)
    by, bx = (ids >> 32) * gram_bin, (ids & 0xFFFFFFFF) * gram_bin
    tile_id = (by // TILE_LOOP_PX) * 1_000_000 + (bx // TILE_LOOP_PX)
    jobs = {}
    for tid in np.unique(tile_id).tolist():
        cols = (tile_id == tid) & (bin_region > 0)
        if cols.sum() < 2:
            continue
        ty, tx = divmod(tid, 1_000_000)
        block = rate_map[ty * TILE_LOOP_PX:(ty + 1) * TILE_LOOP_PX, tx * TILE_LOOP_PX:(tx + 1) * TILE_LOOP_PX]
        rate = float(np.nanmedian(block))
        if not np.isfinite(rate):
            continue
        jobs[(ty, tx)] = (rhythm.loop_score_of_traces, (traces[:, cols], frame_interval_s, rate),
                          {"n_landmarks": min(100, opts["n_landmarks"]),
                           "max_frames": opts["max_frames_topology"]})
    out = np.full(labels.shape, np.nan, np.float32)
    failed = []
    for (ty, tx), score in run_in_processes(jobs, max(1, opts["worker_processes"])):
        if isinstance(score, InputError):
            failed.append(((ty, tx), str(score)))
        elif isinstance(score, BaseException):
            raise score
        else:
            out[ty * TILE_LOOP_PX:(ty + 1) * TILE_LOOP_PX, tx * TILE_LOOP_PX:(tx + 1) * TILE_LOOP_PX] = score
    return out, sorted(failed)


#: Edge of the tiles of the optional loop-score map, pixels.
TILE_LOOP_PX = 16


@dataclass
class Run:
    """The state of one analysis, filled in stage by stage.

    :func:`prepare` sets the inputs (first block); each stage writes the
    fields of its own block. Maps are (Y, X) float32 arrays at the input's
    size, NaN where they do not apply.
    """

    # ---- inputs, from prepare
    stack: Stack
    opts: dict
    rate_range_bpm: tuple[float, float]
    specimen: Any
    plan: spectral.SpectralPlan
    basis: np.ndarray
    halo: int
    tiles: TilePlan
    gram_bin: int
    cancel: Callable[[], bool] | None
    cleanup: contextlib.ExitStack
    t_start: float
    timings: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)
    # ---- maps_pass
    tile_results: list = field(default_factory=list)
    keep: KeptSpectra | None = None
    phase_source: str = ""
    maps: dict = field(default_factory=dict)
    # ---- codec_flicker
    video: dict | None = None
    frozen: np.ndarray | None = None
    # ---- segmentation
    labels: np.ndarray | None = None
    # ---- references
    traces: np.ndarray | None = None
    bin_region: np.ndarray | None = None
    references: dict = field(default_factory=dict)
    # ---- loop_score_map
    loop_map: np.ndarray | None = None
    # ---- lockin
    candidates: np.ndarray | None = None
    thetas: dict = field(default_factory=dict)
    coherence: np.ndarray | None = None
    phase_rad: np.ndarray | None = None
    lock_amplitude: np.ndarray | None = None
    lock_score: np.ndarray | None = None
    # ---- locked_detection
    detection: np.ndarray | None = None
    # ---- activation
    delay_s: np.ndarray | None = None
    # ---- propagation
    propagation: dict = field(default_factory=dict)
    velocity: np.ndarray | None = None
    # ---- assemble
    result: RhythmResult | None = None

    @property
    def analyses_regions(self) -> bool:
        """True when the stages after segmentation have work: not maps-only, and some region."""
        return not self.opts["maps_only"] and self.labels is not None and self.labels.max() > 0

    def check_cancel(self) -> None:
        if self.cancel is not None and self.cancel():
            raise CancelledError("the analysis was cancelled")


def prepare(stack, rate_range_bpm, options: dict, cancel, cleanup) -> Run:
    """Open and check the inputs, and plan the spectrum, the trend basis and the tiles.

    Raises :class:`~tempofield.errors.InputError` for anything wrong with the
    stack, the band or the options, before any pixel is read.
    """
    if not isinstance(stack, Stack):
        stack = open_stack(stack)
    opts = validate_options(options)
    specimen = presets.get_specimen(opts["specimen"]) if opts["specimen"] else None
    if rate_range_bpm is None:
        rate_range_bpm = specimen.rate_range_bpm if specimen else DEFAULT_RATE_RANGE_BPM
    lo_hi = validate_rate_range(rate_range_bpm)
    t_start = time.perf_counter()
    t, y, x = stack.shape
    plan = spectral.plan_spectrum(t, stack.frame_interval_s, lo_hi, false_alarm=opts["false_alarm"],
                                  min_cycles=opts["min_cycles"],
                                  trend_cutoff_fraction=opts["trend_cutoff_fraction"])
    cutoff_hz = opts["trend_cutoff_fraction"] * lo_hi[0] / 60.0
    basis = preprocess.trend_basis(t, stack.frame_interval_s, cutoff_hz)
    halo = opts["pooling_radius_px"]
    if halo and (y <= 2 * halo or x <= 2 * halo):
        raise InputError(f"pooling_radius_px={halo} is too large for frames of {y} x {x} pixels; "
                         f"use at most {max(0, (min(y, x) - 1) // 2)}.")
    n_parallel, total_threads = parallelism()
    tiles = plan_tiles(stack.data.shape, stack.data.chunks, memory_budget_mb=opts["memory_budget_mb"],
                       halo=halo, n_parallel=n_parallel, min_tiles=2 * total_threads)
    if not tiles.aligned and stack.data.nbytes > opts["memory_budget_mb"] * 2**20:
        warnings.warn(
            f"{stack.source}: the input's chunks do not hold the whole time axis {stack.data.chunks[0][:3]}..., "
            "so the stack is regrouped in memory while it is read. For large stacks convert it once "
            "with `tempofield convert STACK OUT.ome.zarr` and analyse the converted copy.", stacklevel=3)
    gram_bin = max(1, math.ceil(math.sqrt(y * x / opts["gram_max_pixels"])))
    return Run(stack=stack, opts=opts, rate_range_bpm=lo_hi, specimen=specimen, plan=plan, basis=basis,
               halo=halo, tiles=tiles, gram_bin=gram_bin, cancel=cancel, cleanup=cleanup, t_start=t_start)


def maps_pass(run: Run) -> Iterator[Progress]:
    """Pass 1 over the stack: spectral maps, Gram bins and (when the phase follows) kept spectra.

    Reads: ``stack``, ``plan``, ``basis``, ``tiles``, ``gram_bin``.
    Writes: ``maps`` (the :data:`PASS1_KEYS` maps but ``constant``),
    ``tile_results`` (per-tile Gram bins), ``keep``, ``phase_source``.
    Raises InputError for a constant stack.
    """
    stack, opts = run.stack, run.opts
    t, y, x = stack.shape
    if not opts["maps_only"]:
        preload_later_stages()
    # a maps-only run needs no Gram bins
    tile_bin = None if opts["maps_only"] else run.gram_bin
    run.phase_source = "no phase stage (maps only)"
    if not opts["maps_only"]:
        if opts["phase_from_kept_spectra"]:
            lo, hi = run.rate_range_bpm
            band = phase_mod.kept_band_bins((lo / 60.0, hi / 60.0), run.plan.bin_hz, run.plan.n_bins)
            run.keep, run.phase_source = keep_spectra(stack.data.shape, band, run.cleanup, active_client())
        else:
            run.phase_source = "phase_from_kept_spectra is off"
    keep = run.keep
    tasks = pass_tasks(stack.data, run.tiles, maps_tile_kernel,
                       None if keep is None else (lambda y0, x0, ty, tx: {"keep_offset": keep.offset(y0, x0, ty)}),
                       halo=run.halo, plan=run.plan, basis=run.basis, gram_bin=tile_bin, keep=keep)
    results = yield from drain(tasks, "maps", run.cancel, stack.source)
    run.timings["maps_pass_s"] = time.perf_counter() - run.t_start
    maps = np.full((len(PASS1_KEYS), y, x), np.nan, np.float32)
    for r in results:
        ty, tx = r["maps"].shape[1:]
        maps[:, r["y0"]:r["y0"] + ty, r["x0"]:r["x0"] + tx] = r["maps"]
        del r["maps"]
    m = dict(zip(PASS1_KEYS, maps))
    if np.all(m.pop("constant") > 0):
        raise InputError(
            f"{stack.source}: no pixel changes over time (the stack is constant), so there is no rhythm to "
            "measure. Check that the right file, channel or plane was opened.")
    run.maps, run.tile_results = m, results


#: In a lossy inter-frame video, a pixel whose value repeats exactly over more than this share of
#: frame-to-frame steps is frozen by the codec, not seen by a camera: no rhythm is taken from it.
FROZEN_LIMIT = 0.85

#: ... and a region whose pixels repeat over more than this share of the steps (its median) is the
#: codec's flicker as a whole: a camera sees noise on tissue in every frame.
REGION_FROZEN_LIMIT = 0.7

#: ... and a rhythm at the key-frame rate is taken for codec flicker only where the pixel repeats over
#: more than this share of the steps (partly still picture).
STILL_LIMIT = 0.3


def codec_flicker(run: Run) -> Iterator[Progress]:
    """Lossy video: what the coding did is not a rhythm.

    For a video whose codec codes frames from one another (H.264 and the
    like, :func:`tempofield.io.video.probe_video`), two rules, both stated
    in the warning: (1) pixels that the codec froze (their value repeats
    exactly over more than :data:`FROZEN_LIMIT` of the frame steps; a camera
    pixel never does) are not rhythmic; (2) when the key frames recur often
    enough for their rate to be resolved (at least three frequency bins
    apart), rhythms within one bin of the key-frame rate or its multiples
    are not taken either where the picture is partly still (repeats over
    more than :data:`STILL_LIMIT` of the steps). :func:`segmentation` then drops regions whose
    median frozen share exceeds :data:`REGION_FROZEN_LIMIT`, and
    :func:`locked_detection` leaves frozen pixels out.

    Reads: ``stack`` (source, frames), ``maps``. Writes: ``maps`` (rate,
    period and amplitude NaN and ``detected`` 0 where excluded), ``frozen``,
    ``warnings``, ``video`` (the coding, recorded in ``run.json``).
    """
    stack = run.stack
    if stack.meta.get("format") != "video" or stack.source == "array":
        return
    from tempofield.io.video import probe_video

    run.video = video = probe_video(stack.source)
    if not video["inter_frame_lossy"]:
        return
    yield Progress(0, 1, "codec check")
    frozen = np.asarray(stack.data.map_blocks(lambda b: preprocess.frozen_fraction(b)[None], dtype=np.float32,
                                              chunks=(1,) + stack.data.chunks[1:]).compute(scheduler="threads"))[0]
    run.frozen = frozen
    m = run.maps
    detected = m["detected"] > 0
    excluded = detected & (frozen > FROZEN_LIMIT)
    comb = ""
    bin_bpm = 60.0 * run.plan.bin_hz
    k = video["key_frame_interval"]
    if k and k > 1:
        key_bpm = 60.0 / (k * stack.frame_interval_s)
        if key_bpm >= 3 * bin_bpm:
            rate = m["rate_bpm"]
            nearest = np.round(rate / key_bpm) * key_bpm
            # only where the picture is partly still: a pixel that changes every frame is seen, not coded
            at_keys = detected & (nearest > 0) & (np.abs(rate - nearest) <= bin_bpm) & (frozen > STILL_LIMIT)
            excluded |= at_keys
            comb = f"; rhythms at the key-frame rate {key_bpm:.1f} bpm or its multiples were not taken"
    for key in ("rate_bpm", "period_s", "amplitude"):
        m[key][excluded] = np.nan
    m["detected"][excluded] = 0
    key_text = f"a key frame every {k:g} frames" if k else "one key frame"
    run.warnings.append(
        f"{Path(stack.source).name} is a {video['codec']} video: a lossy codec that codes frames from one another "
        f"({key_text}); still parts of the picture flicker with the coding, not with the tissue. "
        f"{100 * np.mean(frozen > FROZEN_LIMIT):.0f} % of the field was frozen by the codec and is not taken as "
        f"rhythmic{comb}. For measurements, export the recording without loss (TIFF, or an FFV1 or PNG video).")
    yield Progress(1, 1, "codec check")


def segmentation(run: Run) -> Iterator[Progress]:
    """Beating regions: rate-consistent components of the detected pixels, less the pooling rim.

    Reads: ``maps``. Writes: ``labels`` ((Y, X) int32, 0 = no rhythm).
    """
    m, opts = run.maps, run.opts
    labels = regions_mod.segment(m["rate_bpm"], m["detected"] > 0, bin_bpm=60.0 * run.plan.bin_hz,
                                 min_area_px=opts["min_area_px"])
    if run.halo:
        labels = regions_mod.relabel(regions_mod.trim_pooling_rim(labels, m["amplitude"], run.halo),
                                     opts["min_area_px"])
    if run.frozen is not None and labels.max() > 0:  # lossy video: regions of codec flicker (codec_flicker)
        medians = [float(np.median(run.frozen[labels == lab])) for lab in range(1, labels.max() + 1)]
        flicker = [lab for lab, med in enumerate(medians, start=1) if med > REGION_FROZEN_LIMIT]
        if flicker:
            labels = regions_mod.relabel(np.where(np.isin(labels, flicker), 0, labels), 1)
            run.warnings.append(f"{len(flicker)} region(s) of frozen, codec-coded picture were dropped (their "
                                f"pixels repeat exactly over more than {100 * REGION_FROZEN_LIMIT:.0f} % of the "
                                "frames, which a camera's noise never does)")
    run.labels = labels
    return
    yield  # a generator with no ticks


def references(run: Run) -> Iterator[Progress]:
    """Each region's rhythm reference (phase over time, beats, loop score) from its Gram bins.

    Reads: ``tile_results``, ``labels``, ``maps["rate_bpm"]``, ``basis``.
    Writes: ``traces`` and ``bin_region`` (the detrended bin traces and their
    regions), ``references`` ({label: RhythmReference}); a region without a
    reference gets a warning.
    """
    if not run.analyses_regions:
        return
    t_ref = time.perf_counter()
    stack, opts, labels, rate_map = run.stack, run.opts, run.labels, run.maps["rate_bpm"]
    t = stack.n_frames
    region_ids = [int(v) for v in range(1, labels.max() + 1)]
    yield Progress(0, len(region_ids), "references")
    traces, bin_region = gather_bins(run.tile_results, labels, run.gram_bin)
    for r in run.tile_results:  # the gathered copy is all that is needed from here on
        r.pop("bin_sums", None)
    run.warnings += harmonic_warnings(run, traces, bin_region)  # (before the slow trends go)
    traces = preprocess.detrend(traces, run.basis)
    jobs = {}
    for label in region_ids:
        cols = bin_region == label
        if cols.sum() < 1:
            run.warnings.append(f"region {label}: too few pixels for a rhythm reference")
            continue
        rate = float(np.nanmedian(rate_map[labels == label]))
        period_frames = 60.0 / rate / stack.frame_interval_s
        step = rhythm.decimation_for(t, period_frames, opts["max_frames_topology"])
        if t // step > 2 * opts["max_frames_topology"]:
            run.warnings.append(
                f"region {label}: the period ({period_frames:.1f} frames) is too short to decimate {t} frames "
                f"for persistence; the step used {t // step} windows, and its memory grows with their square. "
                "Analyse shorter segments if it runs out.")
        jobs[label] = (rhythm.region_reference, (traces[:, cols], stack.frame_interval_s, rate),
                       {"n_landmarks": opts["n_landmarks"], "max_frames": opts["max_frames_topology"]})
    n_done = 0
    for label, outcome in run_in_processes(jobs, opts["worker_processes"]):
        n_done += 1
        if isinstance(outcome, InputError):
            run.warnings.append(f"region {label}: no rhythm reference ({outcome})")
        elif isinstance(outcome, BaseException):
            raise outcome
        else:
            run.references[label] = outcome
            run.warnings += reference_warnings(label, outcome)
        yield Progress(n_done, len(jobs), "references")
        run.check_cancel()
    run.traces, run.bin_region = traces, bin_region
    run.timings["references_s"] = time.perf_counter() - t_ref


def _band_advice(run: Run, true_bpm: float) -> str:
    lo, hi = run.rate_range_bpm
    new_lo = max(1.0, float(np.floor(0.8 * true_bpm)))
    return (f"to include it, widen the band: --rate-range {new_lo:g} {hi:g} on the command line "
            f"(rate_range_bpm=({new_lo:g}, {hi:g}) in Python)")


def harmonic_warnings(run: Run, traces, bin_region) -> list[str]:
    """Regions whose rate is probably the harmonic of a slower rhythm below the band."""
    out = []
    lo, hi = run.rate_range_bpm
    rate_map, labels = run.maps["rate_bpm"], run.labels
    for label in range(1, int(labels.max()) + 1):
        cols = bin_region == label
        if not cols.any():
            continue
        rate = float(np.nanmedian(rate_map[labels == label]))
        true = spectral.subharmonic_below_band(traces[:, cols], run.stack.frame_interval_s, rate, lo)
        if true is not None:
            out.append(f"region {label}: its {rate:.0f} bpm is probably the harmonic of a rhythm at about "
                       f"{true:.0f} bpm, below the band {lo:g}-{hi:g} bpm; " + _band_advice(run, true))
    return out


def reference_warnings(label: int, ref) -> list[str]:
    """What a region's reference says about its own making: a fallback route, or a failed self-check."""
    out = []
    check = ref.check or {}
    first = (check.get("tried") or {}).get("topology")
    if ref.method != "topology":
        why = f" ({'; '.join(first)})" if first else ""
        out.append(f"region {label}: the topological phase failed its self-check{why}; "
                   f"the rhythm reference is the {ref.method}")
    if check.get("failures"):
        out.append(f"region {label}: no rhythm reference passed its self-check ({'; '.join(check['failures'])}); "
                   "its beats and phase may be wrong")
    return out


def loop_score_map(run: Run) -> Iterator[Progress]:
    """The optional map of loop scores over small square tiles (``tile_loop_map``).

    Reads: ``traces``, ``bin_region``, ``tile_results``, ``labels``, ``maps["rate_bpm"]``.
    Writes: ``loop_map``; tiles without a score are named in ``warnings``.
    """
    if not (run.opts["tile_loop_map"] and run.analyses_regions):
        return
    t_loop = time.perf_counter()
    yield Progress(0, 1, "loop map")
    run.loop_map, failed = tile_loop_map(run.traces, run.bin_region, run.tile_results, run.labels,
                                         run.maps["rate_bpm"], run.gram_bin, run.stack.frame_interval_s, run.opts)
    if failed:
        (ty0, tx0), why = failed[0]
        run.warnings.append(f"loop-score map: {len(failed)} tile(s) of {TILE_LOOP_PX} px have no score "
                            f"(e.g. the tile at y={ty0 * TILE_LOOP_PX}, x={tx0 * TILE_LOOP_PX}: {why})")
    yield Progress(1, 1, "loop map")
    run.timings["references_s"] = run.timings.get("references_s", 0.0) + time.perf_counter() - t_loop


def lockin(run: Run) -> Iterator[Progress]:
    """Lock-in of every pixel against the reference of its nearest region: phase, coherence, amplitude.

    Reads: ``references``, ``labels``, ``keep``, ``tiles``, ``basis``.
    Writes: ``candidates`` (each pixel's nearest region with a reference),
    ``thetas`` (each reference's phase on every frame, the smoothed and the
    raw one), ``phase_rad`` (the lag behind the candidate's reference, not
    yet re-based), ``coherence``, ``lock_amplitude``, ``lock_score`` (the
    matched test's |z|^2 / noise power), ``phase_source``; the
    phase and delay maps are NaN when there is no reference.
    """
    stack = run.stack
    t, y, x = stack.shape
    run.coherence = np.full((y, x), np.nan, np.float32)
    run.phase_rad = np.full((y, x), np.nan, np.float32)
    run.delay_s = np.full((y, x), np.nan, np.float32)
    references, labels = run.references, run.labels
    if not references:
        if not run.opts["maps_only"]:
            run.phase_source = "no phase stage (no region with a rhythm reference)"
        return
    t_phase = time.perf_counter()
    frame_times = np.arange(t) * stack.frame_interval_s
    on_frames = {label: phase_mod.theta_on_frames(ref.time_s, ref.theta_rad, frame_times)
                 for label, ref in references.items()}
    # the lock-in rows need a phase that advances evenly within each cycle: its mean over one period
    smooth = {label: phase_mod.smooth_over_period(on_frames[label], 60.0 / ref.rate_mean_bpm / stack.frame_interval_s)
              for label, ref in references.items()}
    run.thetas = {label: (smooth[label], on_frames[label]) for label in references}
    rows = {label: phase_mod.lockin_basis(th) for label, th in smooth.items()}
    # b . detrend(x) = detrend(b) . x: the second read locks raw traces in against detrended rows
    bases = {label: preprocess.detrend(r.T, run.basis).T for label, r in rows.items()}
    dominant = max(references, key=lambda lab: int((labels == lab).sum()))
    cand = run.candidates = regions_mod.nearest_region(labels, list(references))
    yield Progress(0, run.tiles.n_tiles, "phase")

    def tile_labels(y0, x0, ty, tx):
        return {"labels": cand[y0:y0 + ty, x0:x0 + tx]}

    keep = run.keep
    if keep is not None:
        # the kept spectra are of detrended traces, so the plain rows (compact spectra) apply
        leak = max(phase_mod.band_lockin_weights(r, keep.band)[1] for r in rows.values())
        if leak <= phase_mod.MAX_BAND_LEAK:
            # read and multiply only the bins these references need
            use = phase_mod.narrowest_band(list(rows.values()), keep.band, NARROW_LEAK)
            weights = {label: phase_mod.band_lockin_weights(r, use) for label, r in rows.items()}
            leak = max(w[1] for w in weights.values())
        if leak > phase_mod.MAX_BAND_LEAK:
            run.phase_source = (f"the references' lock-in rows leave the kept band of the spectrum "
                                f"({leak:.1e} of their energy outside it)")
            with contextlib.suppress(OSError):
                os.remove(keep.path)  # free the disk before reading the stack again
            keep = run.keep = None
    if keep is not None:
        run.phase_source = (f"kept spectra (bins {use[0]}-{use[1] - 1} of {keep.band[0]}-{keep.band[1] - 1}, "
                            f"largest band leak {leak:.1e})")
        tasks = kept_tasks(keep, run.tiles, kept_phase_tile_kernel, tile_labels, lockin_bases=bases,
                           band_weights={label: w[0] for label, w in weights.items()}, dominant=dominant,
                           bins=(use[0] - keep.band[0], use[1] - keep.band[0]))
    else:
        run.phase_source = f"second read ({run.phase_source})"
        tasks = pass_tasks(stack.data, run.tiles, phase_tile_kernel, tile_labels,
                           halo=run.halo, lockin_bases=bases, dominant=dominant)
    results = yield from drain(tasks, "phase", run.cancel, stack.source)
    run.lock_amplitude = np.full((y, x), np.nan, np.float32)
    for r in results:
        ty, tx = r["phase"].shape
        sl = (slice(r["y0"], r["y0"] + ty), slice(r["x0"], r["x0"] + tx))
        run.phase_rad[sl] = r["phase"]
        run.coherence[sl] = r["coherence"]
        run.lock_amplitude[sl] = r["lock_amplitude"]
    # the matched test's statistic: used by the locked detection and, as delay uncertainty, by propagation
    run.lock_score = phase_mod.locked_score(run.lock_amplitude, run.maps["noise_power"], t)
    run.timings["phase_pass_s"] = time.perf_counter() - t_phase


def locked_detection(run: Run) -> Iterator[Progress]:
    """Faint tissue beside a known rhythm: pixels whose lock-in against their nearest region's
    reference is significant, and that touch the region, join it (``locked_detection``).

    The matched test: for white noise of power N per bin of the Hann-windowed
    spectrum (the maps pass's ``noise_power``), the tapered lock-in sum z has
    E|z|^2 = N, and |z|^2 / N is exponentially distributed; a pixel is
    significant when |z|^2 / N > -ln(false_alarm), the per-pixel false-alarm
    rate of the spectral detection (no search over rates, so no larger
    threshold is needed).

    Reads: ``labels``, ``candidates``, ``lock_amplitude``, ``lock_score``, ``maps``,
    ``references``. Writes: ``detection`` ((Y, X) uint8: 0 none,
    1 spectral, 2 reference-locked), ``labels`` (grown), and, for the
    joined pixels, ``maps["amplitude"]`` (the lock-in amplitude; their rate
    and period are set by :func:`activation` from the final reference).
    """
    m = run.maps
    detection = np.where(m["detected"] > 0, 1, 0).astype(np.uint8)
    run.detection = detection
    if not run.references or not run.opts["locked_detection"]:
        return
    score = run.lock_score
    if run.frozen is not None:
        # A lossy inter-frame codec spreads a beat into the blocks around it, and its bit budget makes
        # still picture flicker with the beat: a lock-in would find both. Not used there.
        run.warnings.append("reference-locked detection was not used: in a lossy video the codec spreads "
                            "the beat into neighbouring blocks")
        return
    significant = np.isfinite(score) & (score > -np.log(run.opts["false_alarm"]))
    amplitude = np.where(run.labels > 0, m["amplitude"], run.lock_amplitude)
    grown = regions_mod.join_locked(run.labels, run.candidates, significant, amplitude, run.halo)
    joined = (grown > 0) & (run.labels == 0)
    if joined.any():  # (their rate and period are their reference's, set once it is final: activation)
        m["amplitude"][joined] = run.lock_amplitude[joined]
        detection[joined] = 2
    run.labels = grown
    yield Progress(1, 1, "locked detection")


def activation(run: Run) -> Iterator[Progress]:
    """Each region's phase counted from its earliest pixels; its beats; every pixel's activation delay.

    Reads: ``phase_rad`` (raw lags), ``coherence``, ``labels``, ``thetas``,
    ``references``. Writes: ``phase_rad`` (re-based, NaN outside regions with
    a reference), ``references`` (beats from the re-based phase), ``delay_s``,
    and the rate and period of pixels found by their lock-in (``detection`` 2).
    """
    if not run.references:
        return
    labels, references = run.labels, run.references
    phase_rad, coherence = run.phase_rad, run.coherence
    phase_rad[~np.isin(labels, list(references))] = np.nan
    frame_times = np.arange(run.stack.n_frames) * run.stack.frame_interval_s
    for label, ref in list(references.items()):
        inside = labels == label
        steady = inside & (coherence >= COHERENT)
        # the first coherent pixel after the empty part of the circle: no coherent pixel wraps
        phase0 = phase_mod.earliest_phase(phase_rad[steady if steady.any() else inside], quantile=0.0)
        # Count phase from the region's earliest pixels: its lag becomes 0, and a
        # beat is the moment the rhythm's fundamental peaks there.
        phase_rad[inside] = np.mod(phase_rad[inside] - phase0, 2 * np.pi)
        smooth, raw = run.thetas[label]
        # beats keep each cycle's own timing: the phase less its mean within-cycle unevenness
        theta = phase_mod.even_phase(raw, smooth) - phase0
        references[label] = ref = reference_from_theta(
            frame_times, np.mod(theta, 2 * np.pi), diagram=ref.diagram, score=ref.score,
            second_loop_ratio=ref.second_loop_ratio, quasi_periodic=ref.quasi_periodic,
            window_frames=ref.window_frames, dim=ref.dim, tau=ref.tau, method=ref.method, check=ref.check)
        run.delay_s[inside] = phase_mod.activation_delay(phase_rad[inside], ref.mean_period_s, 0.0)
        if run.detection is not None:  # pixels found by their lock-in: the rhythm of their reference
            locked = inside & (run.detection == 2)
            run.maps["rate_bpm"][locked] = ref.rate_mean_bpm
            run.maps["period_s"][locked] = 60.0 / ref.rate_mean_bpm
    return
    yield


def propagation(run: Run) -> Iterator[Progress]:
    """Conduction velocity field and each region's plane-wave or point-source fit, from the delays.

    Reads: ``delay_s``, ``labels``, ``references``, ``lock_score`` (each
    delay's uncertainty). Writes:
    ``propagation`` ({label: fit values}), ``velocity`` ((Y, X, 2) in µm/s,
    or px/s without a pixel size), a warning for each region without
    measurable propagation.
    """
    if not run.references:
        return
    periods = {label: ref.mean_period_s for label, ref in run.references.items()}
    yield Progress(0, 1, "propagation")
    run.check_cancel()
    period_map = np.full(run.labels.shape, np.nan)
    for label, period in periods.items():
        period_map[run.labels == label] = period
    delay_sd = propagation_mod.delay_uncertainty(run.lock_score, period_map)
    run.propagation, run.velocity = propagation_mod.region_propagation(
        run.delay_s, run.labels, periods, run.stack.pixel_size_um, run.stack.frame_interval_s,
        delay_sd_s=delay_sd, pooling_radius=run.halo)
    for label, fit in sorted(run.propagation.items()):
        if fit.get("note"):
            run.warnings.append(f"region {label}: {fit['note']}; no conduction velocity, direction or origin")
    yield Progress(1, 1, "propagation")


def assemble(run: Run) -> Iterator[Progress]:
    """The :class:`RhythmResult`: maps, region table, plausibility warnings, provenance.

    Reads: every field above. Writes: ``result``.
    """
    stack, opts, m = run.stack, run.opts, run.maps
    extra = {"peak_score": m["peak_score"], "mean_intensity": m["mean"]}
    if run.detection is not None:
        extra["detection"] = run.detection.astype(np.float32)
    if run.loop_map is not None:
        extra["loop_score_tiles"] = run.loop_map
    if run.velocity is not None:
        unit = regions_mod.speed_unit(stack.pixel_size_um)
        extra[f"velocity_y_{unit}"] = run.velocity[..., 0].astype(np.float32)
        extra[f"velocity_x_{unit}"] = run.velocity[..., 1].astype(np.float32)
    # coherence says how well a rhythmic pixel follows its region's rhythm: none elsewhere
    run.coherence[run.labels == 0] = np.nan
    table = regions_mod.region_table(run.labels, {"rate_bpm": m["rate_bpm"], "coherence": run.coherence,
                                                  "amplitude": m["amplitude"]}, run.references,
                                     pixel_size_um=stack.pixel_size_um, propagation=run.propagation)
    if run.specimen is not None:
        run.warnings += presets.plausibility_warnings(run.specimen, table, stack.frame_interval_s)
    lo, hi = run.rate_range_bpm
    for label, ref in sorted(run.references.items()):
        if not lo <= ref.rate_mean_bpm <= hi:
            ratio = float((ref.check or {}).get("rate_ratio", np.nan))
            why = ""
            for q in (2, 3):
                if abs(ratio * q - 1.0) < 0.1:
                    why = f" (about 1/{q} of the region's spectral rate: the rate map may show a harmonic)"
            run.warnings.append(f"region {label}: its rhythm reference beats at {ref.rate_mean_bpm:.1f} bpm, "
                                f"outside the band {lo:g}-{hi:g} bpm{why}"
                                + ("; " + _band_advice(run, ref.rate_mean_bpm) if ref.rate_mean_bpm < lo else ""))
    for label, ref in run.references.items():
        if ref.quasi_periodic:
            run.warnings.append(f"region {label}: two strong loops (second-loop ratio {ref.second_loop_ratio:.2f}): "
                                "the motion looks quasi-periodic (two rhythms), not one beat")
    run.result = RhythmResult(
        rate_bpm=m["rate_bpm"], period_s=m["period_s"], amplitude=m["amplitude"],
        periodicity=m["periodicity"], coherence=run.coherence, phase_rad=run.phase_rad,
        delay_s=run.delay_s, regions=run.labels, region_table=table, references=run.references,
        frame_interval_s=stack.frame_interval_s, pixel_size_um=stack.pixel_size_um,
        parameters={"rate_range_bpm": list(run.rate_range_bpm), **opts,
                    # (the option as given stays under "rate_unit": the batch runner compares it)
                    "rate_unit_shown": opts["rate_unit"] or ("Hz" if opts["specimen"] in HZ_SPECIMENS else "bpm"),
                    "warnings": run.warnings,
                    "gram_bin_px": run.gram_bin, "tile_shape_px": list(run.tiles.tile_shape),
                    "phase_source": run.phase_source, "video_coding": run.video,
                    "velocity_unit": "um/s" if stack.pixel_size_um else "px/s"},
        input={"identity": stack.identity(), "meta": stack.meta, "shape": list(stack.shape)},
        timings={**run.timings, "total_s": time.perf_counter() - run.t_start},
        extra_maps=extra,
        version=__version__,
    )
    return
    yield
