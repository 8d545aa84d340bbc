"""Figures of a result: ``report.png`` for a lab notebook.

Drawn with matplotlib's object API on an Agg canvas (no GUI, thread-safe).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .result import REPORT_FILE


def _mean_image(stack, max_frames=64):
    if stack is None:
        return None
    t = stack.n_frames
    idx = np.linspace(0, t - 1, min(t, max_frames)).astype(int)
    return np.asarray(stack.data[idx].mean(axis=0).compute(), np.float32)


def render_report(result, path, stack=None) -> Path:
    """Draw the report of ``result`` into the PNG file ``path`` and return the path."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from .cli import CAUTION

    fig = Figure(figsize=(13, 8.5), dpi=100)
    FigureCanvasAgg(fig)
    axes = fig.subplots(2, 3)
    extent = None
    if result.pixel_size_um:
        h, w = result.shape
        extent = (0, w * result.pixel_size_um, h * result.pixel_size_um, 0)
    unit = "µm" if result.pixel_size_um else "px"
    mean = _mean_image(stack)
    ax = axes[0, 0]
    if mean is not None:
        ax.imshow(mean, cmap="gray", extent=extent)
    if np.any(result.regions > 0):
        ax.contour(result.regions > 0, levels=[0.5], colors="orange", linewidths=1.0,
                   extent=None if extent is None else (extent[0], extent[1], extent[3], extent[2]),
                   origin="upper")
    ax.set_title("mean image, rhythmic area outlined")
    panels = [(axes[0, 1], result.rate_bpm, "rate (bpm)", "viridis"),
              (axes[0, 2], result.periodicity, "periodicity (0-1)", "magma"),
              (axes[1, 0], result.delay_s, "activation delay (s)", "twilight"),
              (axes[1, 1], result.coherence, "coherence (0-1)", "cividis")]
    for ax, img, title, cmap in panels:
        finite = np.isfinite(img)
        vmin, vmax = (np.nanpercentile(img, [1, 99]) if finite.any() else (0, 1))
        if title.startswith("activation"):
            vmin, vmax = 0.0, float(np.nanmax(result.period_s)) if np.isfinite(result.period_s).any() else 1.0
        im = ax.imshow(np.where(finite, img, np.nan), cmap=cmap, vmin=vmin, vmax=vmax, extent=extent)
        fig.colorbar(im, ax=ax, shrink=0.8, label=title)
        ax.set_title(title + ("" if finite.any() else " — none"))
    for ax in axes.flat[:5]:
        ax.set_xlabel(f"x ({unit})")
        ax.set_ylabel(f"y ({unit})")
    ax = axes[1, 2]
    rate = result.rate_bpm[np.isfinite(result.rate_bpm)]
    if rate.size:
        ax.hist(rate, bins=60, color="0.3")
    ax.set_xlabel("rate (bpm)")
    ax.set_ylabel("pixels")
    ax.set_title("rate distribution")
    fig.suptitle(f"rhythmap {result.version} — {Path(str(result.input.get('identity', {}).get('source', ''))).name}")
    fig.text(0.5, 0.005, CAUTION, ha="center", va="bottom", fontsize=7, color="0.35")
    fig.tight_layout(rect=(0, 0.02, 1, 0.97))
    fig.savefig(path)
    return Path(path)


def report_writers(result, stack=None) -> dict:
    """File writers for :meth:`RhythmResult.save`: ``{name: callable(folder)}``."""
    return {REPORT_FILE: lambda folder: render_report(result, Path(folder) / REPORT_FILE, stack)}
