"""Run an analysis: the public entry points and the sequence of stages.

:func:`iter_analyze` prepares a :class:`~tempofield.engine.stages.Run` and
runs :data:`STAGES` in order, passing on each stage's progress ticks and
stopping at any of them when asked to; :func:`analyze` is the plain-call
version. What each stage reads and writes is in its docstring in
:mod:`tempofield.engine.stages`.
"""

from __future__ import annotations

import contextlib
from typing import Callable, Iterator

from tempofield.engine import stages
from tempofield.engine.tiles import Progress, ProgressFn
from tempofield.outputs.result import RhythmResult

#: The stages of an analysis, in order. Each is ``stage(run) -> Iterator[Progress]``.
STAGES = (
    stages.maps_pass,        # pass 1: spectral maps, Gram bins, kept spectra
    stages.codec_flicker,    # lossy video: frozen pixels and key-frame rhythms are no rhythm
    stages.segmentation,     # beating regions
    stages.references,       # each region's rhythm reference (persistence, circular coordinates)
    stages.loop_score_map,   # optional: loop score over small tiles
    stages.lockin,           # lock-in phase, coherence and amplitude of every pixel
    stages.locked_detection, # faint tissue that follows a region's rhythm joins it
    stages.activation,       # phase from each region's earliest pixels, beats, activation delay
    stages.propagation,      # conduction velocity, plane / point-source fits
    stages.assemble,         # the RhythmResult
)

__all__ = ["STAGES", "Progress", "analyze", "iter_analyze"]


def iter_analyze(stack, rate_range_bpm, *, cancel: Callable[[], bool] | None = None,
                 **options) -> Iterator[Progress]:
    """Run the analysis step by step, yielding :class:`Progress` ticks.

    A generator for interactive front ends: every tick is a point where the
    caller may stop (``close()`` the generator, or let ``cancel()`` return
    True, which raises :class:`~tempofield.errors.CancelledError`). The
    :class:`RhythmResult` is the generator's return value
    (``StopIteration.value``); :func:`analyze` is the plain-call version.

    Parameters and raised errors are those of :func:`analyze`.
    """
    with contextlib.ExitStack() as cleanup:  # temporary files go however the run ends
        run = stages.prepare(stack, rate_range_bpm, options, cancel, cleanup)
        total = run.tiles.n_tiles
        yield Progress(0, total, "maps")
        for stage in STAGES:
            yield from stage(run)
            run.check_cancel()
        yield Progress(total, total, "done")
        return run.result


def analyze(stack, rate_range_bpm=None, progress: ProgressFn | None = None, *,
            cancel: Callable[[], bool] | None = None, **options) -> RhythmResult:
    """Map where a stack beats, how fast and how regularly.

    Parameters
    ----------
    stack : Stack, path or (T, Y, X) array
        From :func:`tempofield.open_stack`; a path or array is opened with it
        (an array then needs ``frame_interval_s`` via ``open_stack`` first).
    rate_range_bpm : (float, float), optional
        Band of rates to look for, in beats per minute. Default: the
        ``specimen`` preset's band, or ``options.DEFAULT_RATE_RANGE_BPM``.
    progress : callable, optional
        Called as ``progress(done, total, stage)`` after each tile.
    cancel : callable, optional, keyword-only
        Polled after each tile; returning True stops the run with
        :class:`~tempofield.errors.CancelledError`.
    **options
        Keyword-only analysis options, see :data:`tempofield.engine.options.OPTIONS`.

    Returns
    -------
    RhythmResult
        Maps at the input's (Y, X), tables, references and provenance.

    Raises
    ------
    InputError
        For a rate band above the Nyquist frequency, a recording shorter than
        a few cycles, or an invalid option.
    CancelledError
        If ``cancel`` returned True.

    Examples
    --------
    >>> import numpy as np, tempofield
    >>> t = np.arange(200)[:, None, None] * 0.05
    >>> frames = 100 + 10 * np.sin(2 * np.pi * 1.5 * t) * np.ones((1, 6, 6))
    >>> res = tempofield.analyze(tempofield.open_stack(frames, frame_interval_s=0.05), (40, 200))
    >>> round(float(np.nanmedian(res.rate_bpm)), 1)
    90.0
    """
    gen = iter_analyze(stack, rate_range_bpm, cancel=cancel, **options)
    while True:
        try:
            tick = next(gen)
        except StopIteration as stop:
            return stop.value
        if progress is not None:
            progress(tick.done, tick.total, tick.stage)
