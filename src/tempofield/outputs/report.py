"""Figures of a result: ``report.png`` for a lab notebook, and the magnified preview.

Drawn with matplotlib's object API on an Agg canvas (no GUI, thread-safe).
The report shows, at a glance: the mean image with the regions outlined and
numbered, the rate map, the activation-delay map (cyclic colours, with the
local conduction direction), the coherence map, the persistence diagram of
each region's rhythm, the largest region's phase and instantaneous rate over
time with its beats, and the region table. Colour bars carry units.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import scipy.ndimage as ndi

from tempofield.outputs.result import REPORT_FILE

PREVIEW_FILE = "preview_magnified.tif"
PREVIEW_MAX_FRAMES = 300

#: Columns of the region table shown in the report (all are in regions.csv).
REPORT_COLUMNS = [("region", "region", "{:d}"), ("area_px", "area px", "{:d}"),
                  ("rate_median_{rate}", "rate {rate}", "{:.3g}"), ("beats", "beats", "{:d}"),
                  ("beat_interval_cv", "beat-interval\nvariation (CV)", "{:.3f}"), ("loop_score", "loop score", "{:.2f}"),
                  ("coherence_mean", "coherence", "{:.2f}"),
                  ("conduction_velocity_{speed}", "conduction\nvelocity {unit}/s", "{:.3g}"),
                  ("wave_direction_deg", "wave\ndirection °", "{:.0f}"), ("origin_y_{length}", "origin y {unit}", "{:.1f}"),
                  ("origin_x_{length}", "origin x {unit}", "{:.1f}")]

#: How the report states the direction of travel.
DIRECTION_NOTE = ("wave direction: degrees counter-clockwise from +x (along the columns), y pointing down the "
                  "rows, so a wave travelling down the image is +90°")


def mean_image(stack, max_frames=64):
    """Mean of up to ``max_frames`` frames spread over the stack (reads only those frames)."""
    if stack is None:
        return None
    t = stack.n_frames
    idx = np.linspace(0, t - 1, min(t, max_frames)).astype(int)
    return np.asarray(stack.data[idx].mean(axis=0).compute(), np.float32)


def _fmt(fmt, v):
    try:
        if v is None or v is pd.NA or v != v:
            return "–"
        return fmt.format(int(v) if fmt == "{:d}" else v)
    except (TypeError, ValueError):
        return str(v)


def render_report(result, path, stack=None) -> Path:
    """Draw the report of ``result`` into the PNG file ``path`` and return the path."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from tempofield.outputs.texts import CAUTION

    fig = Figure(figsize=(15, 13), dpi=90)
    FigureCanvasAgg(fig)
    grid = fig.add_gridspec(3, 3, height_ratios=[1, 1, 0.55])
    ax_mean, ax_rate, ax_delay = (fig.add_subplot(grid[0, i]) for i in range(3))
    ax_coh, ax_dgm, ax_theta = (fig.add_subplot(grid[1, i]) for i in range(3))
    ax_table = fig.add_subplot(grid[2, :])
    h, w = result.shape
    ps = result.pixel_size_um
    unit = "µm" if ps else "px"
    extent = (0, w * (ps or 1), h * (ps or 1), 0)
    labels = result.regions

    mean = result.extra_maps.get("mean_intensity")  # from the first pass: no extra read
    if mean is None:
        mean = mean_image(stack)
    ax_mean.imshow(mean if mean is not None else np.zeros((h, w)), cmap="gray", extent=extent)
    _outline(ax_mean, labels, ps)
    ax_mean.set_title("mean image, regions outlined")

    per = 60.0 if result.rate_unit == "Hz" else 1.0
    rate_map = result.rate_bpm / per
    finite_rate = rate_map[np.isfinite(rate_map)]
    lo, hi = (np.percentile(finite_rate, [1, 99]) if finite_rate.size else (0, 1))
    im = ax_rate.imshow(rate_map, cmap="viridis", vmin=lo, vmax=max(hi, lo + 1e-3 / per), extent=extent)
    fig.colorbar(im, ax=ax_rate, shrink=0.8, label=f"rate ({result.rate_unit})")
    ax_rate.set_title("rate" + ("" if finite_rate.size else " (no rhythm found)"))

    # Each region's delay as a fraction of its own period, so the cyclic colours wrap where the delay does.
    cycle = np.full(result.delay_s.shape, np.nan, np.float32)
    periods = []
    for label, ref in sorted(result.references.items()):
        inside = labels == label
        period = ref.mean_period_s
        periods.append(f"{label}: {period:.3g} s")
        cycle[inside] = result.delay_s[inside] / period
    im = ax_delay.imshow(cycle, cmap="twilight", vmin=0, vmax=1, extent=extent)
    cb_delay = fig.colorbar(im, ax=ax_delay, shrink=0.8, label="activation delay (fraction of the region's period)")
    speed = "um_s" if ps else "px_s"
    vy, vx = result.extra_maps.get(f"velocity_y_{speed}"), result.extra_maps.get(f"velocity_x_{speed}")
    if vy is not None and np.isfinite(vy).any():
        step = max(1, min(h, w) // 16)
        yy, xx = np.mgrid[step // 2:h:step, step // 2:w:step]
        u, v = vx[yy, xx], vy[yy, xx]
        norm = np.hypot(u, v)
        ok = np.isfinite(norm) & (norm > 0)
        ax_delay.quiver((xx[ok] + 0.5) * (ps or 1), (yy[ok] + 0.5) * (ps or 1), u[ok] / norm[ok], -v[ok] / norm[ok],
                        color="k", alpha=0.6, scale=25, width=0.004)
    ax_delay.set_title("activation delay (periods " + ", ".join(periods) + ")\narrows: direction of travel",
                       fontsize=10)

    im = ax_coh.imshow(result.coherence, cmap="cividis", vmin=0, vmax=1, extent=extent)
    cb_coh = fig.colorbar(im, ax=ax_coh, shrink=0.8, label="coherence (0-1)")
    ax_coh.set_title("coherence with the region's rhythm")
    for ax in (ax_mean, ax_rate, ax_delay, ax_coh):
        ax.set_xlabel(f"x ({unit})")
        ax.set_ylabel(f"y ({unit})")

    top = 0.0
    for label, ref in sorted(result.references.items()):
        d = np.asarray(ref.diagram, float).reshape(-1, 2)
        if d.size:
            ax_dgm.scatter(d[:, 0], d[:, 1], s=14, label=f"region {label} (loop {ref.score:.2f})")
            top = max(top, float(d.max()))
    top = top or 2.0
    ax_dgm.plot([0, top * 1.05], [0, top * 1.05], color="0.6", lw=1)
    ax_dgm.set_xlabel("birth (window distance)")
    ax_dgm.set_ylabel("death (window distance)")
    ax_dgm.set_title("persistence diagram, H1")
    if result.references:
        ax_dgm.legend(fontsize=8, loc="lower right")
    else:
        ax_dgm.text(0.5, 0.5, "no rhythm reference", ha="center", transform=ax_dgm.transAxes)

    if result.references:
        sizes = {lab: int((labels == lab).sum()) for lab in result.references}
        label = max(sizes, key=sizes.get)
        ref = result.references[label]
        ax_theta.plot(ref.time_s, ref.theta_rad, color="0.5", lw=0.8, label="phase θ(t)")
        ax_theta.set_ylim(0, 2 * np.pi)
        ax_theta.set_ylabel("phase θ (rad)")
        ax_theta.set_xlabel("time (s)")
        for bt in ref.beat_times_s:
            ax_theta.axvline(bt, color="tab:red", lw=0.6, alpha=0.6)
        ax2 = ax_theta.twinx()
        ax2.plot(ref.time_s, ref.inst_rate_bpm / per, color="tab:blue", lw=1.5)
        ax2.set_ylabel(f"instantaneous rate ({result.rate_unit})", color="tab:blue")
        ax_theta.set_title(f"region {label}: {len(ref.beat_times_s)} beats (red), "
                           f"mean {ref.rate_mean_bpm / per:.3g} {result.rate_unit}; phase from the {ref.method}")
    else:
        ax_theta.text(0.5, 0.5, "no rhythm reference", ha="center", transform=ax_theta.transAxes)
        ax_theta.set_title("phase and rate over time")

    ax_table.axis("off")
    table = result.region_table
    warnings = list(result.parameters.get("warnings", []))
    if table is not None and len(table):
        from tempofield.outputs.result import in_rate_unit

        table = in_rate_unit(table, result.rate_unit)
        names = {"speed": speed, "length": "um" if ps else "px", "rate": "hz" if result.rate_unit == "Hz" else "bpm"}
        cols = [(c.format(**names), name, fmt) for c, name, fmt in REPORT_COLUMNS
                if c.format(**names) in table.columns]
        cells = [[_fmt(fmt, row[c]) for c, _, fmt in cols] for _, row in table.head(12).iterrows()]
        heads = [name.format(unit=unit, rate=result.rate_unit) for _, name, _ in cols]
        tab = ax_table.table(cellText=cells, colLabels=heads,
                             loc="upper center")
        tab.auto_set_font_size(False)
        tab.set_fontsize(9)
        tab.scale(1, 1.9)
        ax_table.text(0.0, 0.26, DIRECTION_NOTE, fontsize=8, color="0.3", transform=ax_table.transAxes)
    else:
        ax_table.text(0.5, 0.8, "no beating region found", ha="center", fontsize=12)
    if warnings:
        ax_table.text(0.0, 0.02, "\n".join("warning: " + x for x in warnings[:4]), fontsize=8, color="tab:red",
                      va="bottom", transform=ax_table.transAxes, wrap=True)
    if not result.references:  # nothing to fill the rhythm's panels with: leave them out, and say why
        for ax in (ax_delay, ax_coh, ax_dgm, ax_theta, cb_delay.ax, cb_coh.ax):
            ax.set_visible(False)
        why = ("maps only: no rhythm references were computed" if result.parameters.get("maps_only")
               else "no region with a rhythm reference")
        fig.text(0.5, 0.45, why + ", so there are no activation delay, coherence, persistence or phase panels",
                 ha="center", fontsize=11, color="0.3")
    source = Path(str(result.input.get("identity", {}).get("source", ""))).name
    fig.suptitle(f"tempofield {result.version} — {source} — frame interval {result.frame_interval_s:g} s"
                 + (f", pixel {ps:g} µm" if ps else ""))
    fig.text(0.5, 0.004, CAUTION, ha="center", va="bottom", fontsize=8, color="0.3")
    fig.tight_layout(rect=(0, 0.015, 1, 0.97))
    fig.savefig(path)
    return Path(path)


def _outline(ax, labels, ps):
    scale = ps or 1.0
    if not np.any(labels > 0):
        return
    for label in np.unique(labels[labels > 0]).tolist():
        mask = labels == label
        ax.contour((np.arange(labels.shape[1]) + 0.5) * scale, (np.arange(labels.shape[0]) + 0.5) * scale,
                   mask.astype(float), levels=[0.5], colors="orange", linewidths=1.0)
        cy, cx = ndi.center_of_mass(mask)
        ax.text((cx + 0.5) * scale, (cy + 0.5) * scale, str(label), color="yellow", fontsize=11,
                ha="center", va="center", weight="bold")


def report_writers(result, stack=None) -> dict:
    """File writers for :meth:`RhythmResult.save`: ``{name: callable(folder)}``."""
    return {REPORT_FILE: lambda folder: render_report(result, Path(folder) / REPORT_FILE, stack)}


def magnified_preview(result, stack, *, alpha: float = 10.0) -> np.ndarray | None:
    """The first frames with the main rhythm's band amplified, or None when no region has a rhythm.

    The band is the largest region's mean rate +-20 %. Only the preview's frames
    are read (at most ``PREVIEW_MAX_FRAMES``), so memory stays small.
    """
    from tempofield.kernels.magnify import magnify

    if not result.references:
        return None
    sizes = {lab: int((result.regions == lab).sum()) for lab in result.references}
    ref = result.references[max(sizes, key=sizes.get)]
    f = ref.rate_mean_bpm / 60.0
    n = min(stack.n_frames, PREVIEW_MAX_FRAMES)
    frames = np.asarray(stack.data[:n].compute(), np.float32)
    return magnify(frames, stack.frame_interval_s, (0.8 * f, 1.2 * f), alpha=alpha)


def preview_writer(result, stack, *, alpha: float = 10.0) -> dict:
    """Writer of ``preview_magnified.tif`` (see :func:`magnified_preview`); nothing without a rhythm."""

    def write(folder):
        import tifffile

        out = magnified_preview(result, stack, alpha=alpha)
        if out is None:
            return
        tifffile.imwrite(Path(folder) / PREVIEW_FILE, out, imagej=True,
                         metadata={"axes": "TYX", "finterval": stack.frame_interval_s})

    return {PREVIEW_FILE: write}
