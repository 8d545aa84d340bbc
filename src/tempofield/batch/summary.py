"""The experiment's summary: ``summary.csv``, ``failures.csv`` and ``summary.png``
(a plate map when the names hold well positions).
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import sys
import uuid
from pathlib import Path

import numpy as np
import pandas as pd

from tempofield import __version__
from tempofield.batch.config import FAILURES_CSV, SUMMARY_CSV, SUMMARY_PNG, BatchPlan
from tempofield.batch.tasks import Outcome
from tempofield.outputs.result import REGIONS_FILE, RUN_FILE


def summary_table(plan: BatchPlan, outcomes: list[Outcome]) -> pd.DataFrame:
    """One row per stack and region (one per stack when there is no region table), read from the folders."""
    rows = []
    free = plan.free_columns
    for o in outcomes:
        dest = plan.out / o.item.name
        base = {"name": o.item.name, "status": o.status, "error": o.error, "source": o.item.source,
                "result_folder": o.item.name if o.status != "failed" else ""}
        base.update({c: o.item.columns.get(c, "") for c in free})
        regions = pd.DataFrame()
        if o.status != "failed":
            rec = json.loads((dest / RUN_FILE).read_text())
            shape = (rec.get("input") or {}).get("shape") or [None] + list(rec.get("shape", [None, None]))
            base.update({"frame_interval_s": rec.get("frame_interval_s"), "pixel_size_um": rec.get("pixel_size_um"),
                         "n_frames": shape[0], "height_px": shape[1], "width_px": shape[2]})
            base.update(rec.get("summary") or {})
            base["analysis_s"] = (rec.get("timings") or {}).get("total_s")
            base["tempofield_version"] = rec.get("version", "")
            with contextlib.suppress(FileNotFoundError, pd.errors.EmptyDataError):
                regions = pd.read_csv(dest / REGIONS_FILE)
        if len(regions):
            for _, reg in regions.iterrows():
                rows.append({**base, **{(c if c.startswith("region") else f"region_{c}"): v
                                        for c, v in reg.items()}})
        else:
            rows.append(base)
    table = pd.DataFrame(rows)
    for col in ("n_frames", "height_px", "width_px", "n_regions"):
        if col in table.columns:
            table[col] = pd.to_numeric(table[col], errors="coerce").astype("Int64")
    return table


def failures_table(outcomes: list[Outcome]) -> pd.DataFrame:
    return pd.DataFrame([{"name": o.item.name, "source": o.item.source, "error": o.error}
                         for o in outcomes if o.status == "failed"], columns=["name", "source", "error"])


_WELL = re.compile(r"(?<![A-Za-z0-9])([A-Pa-p])0?(\d{1,2})(?![0-9])")


def parse_well(text) -> tuple[int, int] | None:
    """(row, column) from zero of a plate well written like ``B03``, ``b3`` or ``plate1_C12_t0``."""
    m = _WELL.search(str(text))
    if not m:
        return None
    row, col = ord(m.group(1).upper()) - ord("A"), int(m.group(2)) - 1
    return (row, col) if 0 <= col < 24 else None


def write_summary_figure(table: pd.DataFrame, path: Path) -> Path | None:
    """``summary.png``: rate by condition (or by stack), and a plate heat map when stacks are wells."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    if table.empty:
        return None
    per_stack = table.drop_duplicates("name").set_index("name")
    rate = pd.to_numeric(per_stack.get("rate_median_bpm", pd.Series(np.nan, per_stack.index)), errors="coerce")
    wells = None
    if "well" in per_stack.columns:
        wells = per_stack["well"].map(parse_well)
    elif len(per_stack) >= 2:
        wells = pd.Series(per_stack.index, index=per_stack.index).map(parse_well)
    if wells is not None and (wells.isna().any() or wells.nunique() < 2):
        wells = None
    fig = Figure(figsize=(13 if wells is not None else 7, 4.8), dpi=100)
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, 2 if wells is not None else 1, squeeze=False)[0]
    ax = axes[0]
    if "condition" in per_stack.columns:
        groups = {c: rate[per_stack["condition"] == c].dropna().to_numpy()
                  for c in dict.fromkeys(per_stack["condition"])}
        labels = [str(c) for c in groups]
        for k, vals in enumerate(groups.values()):
            jitter = np.random.default_rng(k).uniform(-0.12, 0.12, vals.size)
            ax.plot(k + jitter, vals, "o", color="C0", alpha=0.8)
            if vals.size:
                ax.hlines(np.median(vals), k - 0.3, k + 0.3, color="k")
        ax.set_xticks(range(len(labels)), labels, rotation=30, ha="right")
        ax.set_xlabel("condition")
        ax.set_title("median rate per stack, by condition (bar: median)")
    else:
        ax.plot(range(len(rate)), rate.to_numpy(), "o")
        ax.set_xticks(range(len(rate)), [str(n) for n in rate.index], rotation=60, ha="right", fontsize=7)
        ax.set_title("median rate per stack")
    failed = per_stack["status"] == "failed"
    if failed.any():
        ax.text(0.01, 0.99, f"{int(failed.sum())} failed stack(s) not shown", transform=ax.transAxes,
                va="top", fontsize=8, color="C3")
    ax.set_ylabel("rate (bpm)")
    if wells is not None:
        rows, cols = zip(*wells)
        n_rows, n_cols = (8, 12) if max(rows) < 8 and max(cols) < 12 else (16, 24)
        grid = np.full((n_rows, n_cols), np.nan)
        for (r, c), val in pd.Series(rate.to_numpy(), index=list(wells)).groupby(level=0).mean().items():
            grid[r, c] = val
        ax = axes[1]
        ax.set_facecolor("0.9")
        im = ax.imshow(grid, cmap="viridis")
        fig.colorbar(im, ax=ax, label="median rate (bpm)")
        for (r, c), bad in zip(wells, failed):
            if bad:
                ax.plot(c, r, "x", color="C3", ms=10, mew=2)
        ax.set_xticks(range(n_cols), [str(c + 1) for c in range(n_cols)], fontsize=7)
        ax.set_yticks(range(n_rows), [chr(ord("A") + r) for r in range(n_rows)], fontsize=7)
        ax.set_title("plate layout (x: failed; blank: not imaged)")
    fig.suptitle(f"tempofield {__version__} batch: {int((~failed).sum())} of {len(per_stack)} stacks analysed")
    fig.tight_layout()
    tmp = path.with_name(f".{path.name}.partial-{uuid.uuid4().hex[:8]}")
    fig.savefig(tmp, format="png")
    os.replace(tmp, path)
    return path


def write_outputs(plan: BatchPlan, outcomes: list[Outcome]) -> pd.DataFrame:
    """Write summary.csv, summary.png and failures.csv (removed when nothing failed), each atomically."""
    table = summary_table(plan, outcomes)
    _write_csv(table, plan.out / SUMMARY_CSV)
    fails = failures_table(outcomes)
    if len(fails):
        _write_csv(fails, plan.out / FAILURES_CSV)
    else:
        (plan.out / FAILURES_CSV).unlink(missing_ok=True)
    try:
        write_summary_figure(table, plan.out / SUMMARY_PNG)
    except Exception as exc:  # noqa: BLE001 - the figure must not cost the table
        print(f"tempofield batch: could not draw {SUMMARY_PNG}: {exc}", file=sys.stderr)
    return table


def _write_csv(table: pd.DataFrame, path: Path) -> None:
    tmp = path.with_name(f".{path.name}.partial-{uuid.uuid4().hex[:8]}")
    table.to_csv(tmp, index=False)
    os.replace(tmp, path)
