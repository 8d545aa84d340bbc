"""The region inspector: one region of a result, its trace, spectrum, loop, phase and table row.

Pick a region by clicking on a result's regions layer (the label under the
cursor) or with the spin box. The panel shows, in matplotlib figures: the
region's mean trace with its beats, the spectrum of that trace with the peak
the engine picks in the band, the H1 persistence diagram of the region's
rhythm reference, and its phase theta(t) with the instantaneous rate; below
them the region's row of the region table. The row, the figures and the traces
(the mean trace with theta(t) and the rate on every frame, and the beats) can
be exported (CSV, PNG). The region number can only name a region that exists
in the chosen result; a rerun that updates the regions layer in place updates
the inspector too.
The mean trace and spectrum come from :mod:`._inspect` (glue over the
engine's kernels) in a worker thread, so a large lazy stack does not freeze
the viewer.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
from matplotlib.figure import Figure
from napari.qt.threading import thread_worker
from napari.viewer import Viewer
from qtpy.QtCore import Signal
from qtpy.QtWidgets import (
    QComboBox,
    QFileDialog,
    QFormLayout,
    QGridLayout,
    QHBoxLayout,
    QLabel,
    QPushButton,
    QSpinBox,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from tempofield.engine.options import OPTION_BY_NAME
from tempofield.kernels.phase import theta_on_frames

from . import _inspect
from ._layers import META_KEY, RESULT_KEY
from ._widget import default_rate_range_bpm

FIGURES = ("trace", "spectrum", "persistence", "phase")
_REGION_COLUMNS = ("region", "label", "region_label")


@thread_worker(start_thread=False, ignore_errors=True)  # told in the hint line, never a crash
def region_job(frames, regions, label, frame_interval_s, rate_range_bpm, options):
    """Worker: the region's mean trace and spectrum (None, None when there is no raw stack)."""
    if frames is None:
        return label, None, None
    trace = _inspect.region_mean_trace(frames, regions, label)
    try:
        spectrum = _inspect.region_spectrum(trace, frame_interval_s, rate_range_bpm, options)
    except ValueError:  # e.g. a band the recording cannot resolve
        spectrum = None
    return label, trace, spectrum


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name).strip("_") or "result"


class RegionInspector(QWidget):
    """Dock widget showing one region of a tempofield result."""

    #: Emitted after the figures and table show a region (its label).
    region_shown = Signal(int)

    def __init__(self, napari_viewer: Viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.worker = None
        self.current = None  # (labels layer name, label) shown
        self._shown_data = {}

        form = QFormLayout()
        self.result_box = QComboBox()
        self.result_box.setToolTip("The regions layer of a tempofield result.")
        form.addRow("result", self.result_box)
        self.region_spin = QSpinBox()
        self.region_spin.setRange(0, 0)  # bounded by the chosen result's labels (see _set_bounds)
        self.region_spin.setSpecialValueText("none")
        self.region_spin.setToolTip("Region label; or click a region on the regions layer.")
        form.addRow("region", self.region_spin)
        self.hint = QLabel("Click a region on the regions layer, or choose its label.")
        self.hint.setWordWrap(True)

        self.figures = {name: Figure(figsize=(3.4, 2.4), dpi=90, layout="constrained") for name in FIGURES}
        self.canvases = {name: FigureCanvasQTAgg(fig) for name, fig in self.figures.items()}
        grid = QGridLayout()
        for i, name in enumerate(FIGURES):
            self.canvases[name].setMinimumSize(240, 180)
            grid.addWidget(self.canvases[name], i // 2, i % 2)

        self.table = QTableWidget(0, 2)
        self.table.setHorizontalHeaderLabels(["column", "value"])
        self.table.verticalHeader().setVisible(False)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setMinimumHeight(12 * self.table.verticalHeader().defaultSectionSize())  # a dozen rows at once

        buttons = QHBoxLayout()
        self.export_table_button = QPushButton("Export row (CSV)")
        self.export_traces_button = QPushButton("Export traces (CSV)")
        self.export_figures_button = QPushButton("Export figures (PNG)")
        buttons.addWidget(self.export_table_button)
        buttons.addWidget(self.export_traces_button)
        buttons.addWidget(self.export_figures_button)

        outer = QVBoxLayout(self)
        outer.addLayout(form)
        outer.addWidget(self.hint)
        outer.addLayout(grid)
        outer.addWidget(self.table)
        outer.addLayout(buttons)

        self.region_spin.valueChanged.connect(lambda _v: self.show_region())
        self.result_box.currentTextChanged.connect(lambda _t: self._result_changed())
        self.export_table_button.clicked.connect(lambda: self.export_table())
        self.export_figures_button.clicked.connect(lambda: self.export_figures())
        self.export_traces_button.clicked.connect(lambda: self.export_traces())
        events = self.viewer.layers.events
        for ev in (events.inserted, events.removed):
            ev.connect(self._refresh_results)
        self.viewer.mouse_drag_callbacks.append(self._on_click)
        self._refresh_results()
        self._draw_empty("Run an analysis, then pick a region.")

    # ----------------------------------------------------------------- choosing
    def _regions_layers(self):
        from napari.layers import Labels

        return [layer for layer in self.viewer.layers
                if isinstance(layer, Labels) and RESULT_KEY in layer.metadata]

    def _refresh_results(self, event=None):
        current = self.result_box.currentText()
        for layer in self._regions_layers():  # a rerun updates the layer in place; so does a rename
            if not getattr(layer, "_tempofield_inspected", False):
                layer.events.data.connect(lambda _e: self._result_changed())
                layer.events.name.connect(self._refresh_results)
                layer._tempofield_inspected = True
        names = [layer.name for layer in self._regions_layers()]
        self.result_box.blockSignals(True)
        self.result_box.clear()
        self.result_box.addItems(names)
        if current in names:
            self.result_box.setCurrentText(current)
        elif names:
            self.result_box.setCurrentIndex(len(names) - 1)  # the newest result
        self.result_box.blockSignals(False)
        if self.result_box.currentText() != current:
            self._result_changed()

    def _result_changed(self):
        self.current = None
        self._set_bounds()
        if self.region_spin.value() > 0:
            self.show_region()

    def labels(self) -> list[int]:
        """The region labels of the chosen result (ascending)."""
        layer = self._regions_layer()
        if layer is None:
            return []
        return [int(v) for v in np.unique(np.asarray(layer.data)) if v > 0]

    def _set_bounds(self):
        """The spin box spans the chosen result's labels only; a label that is gone is not kept."""
        labels = self.labels()
        self.region_spin.blockSignals(True)
        self.region_spin.setRange(0, max(labels, default=0))
        self.region_spin.blockSignals(False)
        if not labels:
            self._clear("This result has no beating region." if self._regions_layer() is not None
                        else "Run an analysis, then pick a region.")

    def _regions_layer(self):
        name = self.result_box.currentText()
        return self.viewer.layers[name] if name and name in self.viewer.layers else None

    def _on_click(self, viewer, event):
        if event.type != "mouse_press":
            return
        layer = self._regions_layer()
        if layer is None or not layer.visible:
            return
        value = layer.get_value(event.position, view_direction=event.view_direction,
                                dims_displayed=event.dims_displayed, world=True)
        if value is not None and int(value) > 0:
            self.select_region(int(value))

    def select_region(self, label: int) -> None:
        """Show region ``label`` of the chosen result (one that does not exist clears the figures and says so)."""
        if label not in self.labels():
            self._clear(self._missing_text(label))
            return
        if self.region_spin.value() == label:
            self.show_region()
        else:
            self.region_spin.setValue(label)

    # ----------------------------------------------------------------- computing
    def show_region(self) -> None:
        """Compute (in a worker) and draw the chosen region."""
        layer = self._regions_layer()
        label = self.region_spin.value()
        if layer is None or label <= 0:
            return
        if label not in self.labels():  # between two labels (e.g. 1, 2, 5: 3 and 4 do not exist)
            self._clear(self._missing_text(label))
            return
        result = layer.metadata[RESULT_KEY]
        info = layer.metadata.get(META_KEY, {})
        regions = layer.data
        raw = self._raw_frames(info)
        params = dict(result.parameters or {})
        band = params.get("rate_range_bpm") or default_rate_range_bpm()
        options = {k: v for k, v in params.items() if k in OPTION_BY_NAME}
        if self.worker is not None:
            self.worker.quit()
        self.hint.setText(f"Region {label}: computing its mean trace...")
        worker = region_job(raw, regions, label, result.frame_interval_s, band, options)
        worker.returned.connect(lambda out, lname=layer.name: self._draw(lname, result, *out))
        worker.errored.connect(lambda exc: self._clear(f"Region {label}: {exc}"))
        worker.finished.connect(lambda w=worker: self._worker_done(w))
        self.worker = worker
        worker.start()

    def _worker_done(self, worker):
        if self.worker is worker:
            self.worker = None

    def _raw_frames(self, info):
        source = info.get("source_layer")
        if not source or source not in self.viewer.layers:
            return None
        raw = self.viewer.layers[source]
        data = raw.data[0] if raw.multiscale else raw.data
        channel = info.get("channel")
        if data.ndim == 4 and not raw.rgb:
            data = data[:, channel or 0]
        return data if data.ndim == 3 else None

    def _missing_text(self, label):
        labels = self.labels()
        listed = ", ".join(str(v) for v in labels[:12]) + (", ..." if len(labels) > 12 else "")
        return (f"Region {label} does not exist in this result; its regions are {listed}." if labels
                else "This result has no beating region.")

    # ----------------------------------------------------------------- drawing
    def _clear(self, text):
        """Nothing shown: empty figures and table, and why (so an old region is never left on screen)."""
        if self.worker is not None:
            self.worker.quit()
            self.worker = None
        self.current = None
        self._shown_data = {}
        self.table.setRowCount(0)
        self.hint.setText(text)
        self._draw_empty(text)

    def _draw_empty(self, text):
        for name, fig in self.figures.items():
            fig.clear()
            fig.text(0.5, 0.5, text if name == "trace" else "", ha="center", va="center", wrap=True)
            self.canvases[name].draw_idle()

    def _draw(self, layer_name, result, label, trace, spectrum):
        if self.region_spin.value() != label or self.result_box.currentText() != layer_name:
            return  # the user moved on while this was computed
        ref = (result.references or {}).get(label)
        if ref is None:
            ref = (result.references or {}).get(str(label))
        dt = result.frame_interval_s
        beats = [] if ref is None else list(ref.beat_times_s)

        fig = self.figures["trace"]
        fig.clear()
        ax = fig.add_subplot()
        if trace is not None:
            ax.plot([i * dt for i in range(len(trace))], trace, lw=0.8, color="0.2")
            for b in beats:
                ax.axvline(b, color="tab:red", lw=0.6, alpha=0.6)
        else:
            ax.text(0.5, 0.5, "raw stack not in the viewer", ha="center", va="center", transform=ax.transAxes)
        ax.set(title=f"region {label} mean trace" + (f", {len(beats)} beats" if beats else ""),
               xlabel="time (s)", ylabel="intensity")

        fig = self.figures["spectrum"]
        fig.clear()
        ax = fig.add_subplot()
        if spectrum is not None:
            ax.semilogy(spectrum["rate_bpm_axis"][1:], spectrum["power"][1:] + 1e-12, lw=0.8, color="0.2")
            ax.axvspan(*spectrum["band_bpm"], color="tab:blue", alpha=0.1, label="band")
            if spectrum["detected"]:
                ax.axvline(spectrum["peak_rate_bpm"], color="tab:red", lw=1,
                           label=f"peak {spectrum['peak_rate_bpm']:.1f} bpm")
            ax.set_xlim(0, min(float(spectrum["rate_bpm_axis"][-1]), 2.5 * spectrum["band_bpm"][1]))
            ax.legend(fontsize=7, loc="upper right")
        else:
            ax.text(0.5, 0.5, "no spectrum", ha="center", va="center", transform=ax.transAxes)
        ax.set(title="spectrum of the mean trace", xlabel="rate (bpm)", ylabel="power")

        fig = self.figures["persistence"]
        fig.clear()
        ax = fig.add_subplot()
        diagram = None if ref is None else ref.diagram
        if diagram is not None and len(diagram):
            births, deaths = diagram[:, 0], diagram[:, 1]
            top = max(float(max(deaths)), 1e-9) * 1.05
            ax.plot([0, top], [0, top], color="0.6", lw=0.6)
            ax.scatter(births, deaths, s=10, color="tab:purple")
            ax.set_xlim(0, top)
            ax.set_ylim(0, top)
            ax.set_title(f"H1 diagram, loop score {ref.score:.2f}")
        else:
            ax.text(0.5, 0.5, "no persistence diagram", ha="center", va="center", transform=ax.transAxes)
            ax.set_title("H1 persistence")
        ax.set(xlabel="birth", ylabel="death")

        fig = self.figures["phase"]
        fig.clear()
        ax = fig.add_subplot()
        if ref is not None and len(ref.time_s):
            ax.plot(ref.time_s, ref.theta_rad, lw=0.8, color="tab:green")
            ax.set_ylim(0, 6.2832)
            ax.set_ylabel("θ (rad)", color="tab:green")
            ax2 = ax.twinx()
            ax2.plot(ref.time_s, ref.inst_rate_bpm, lw=0.8, color="tab:orange")
            ax2.set_ylabel("rate (bpm)", color="tab:orange")
            for b in beats:
                ax.axvline(b, color="tab:red", lw=0.5, alpha=0.5)
        else:
            ax.text(0.5, 0.5, "no rhythm reference for this region", ha="center", va="center",
                    transform=ax.transAxes)
        ax.set(title="phase θ(t) and rate", xlabel="time (s)")
        for fig in self.figures.values():
            for a in fig.axes:
                a.title.set_fontsize(8)
                a.xaxis.label.set_fontsize(8)
                a.yaxis.label.set_fontsize(8)
                a.tick_params(labelsize=7)
        for canvas in self.canvases.values():
            canvas.draw_idle()

        row = self._row(result, label, spectrum, ref)
        self.table.setRowCount(len(row))
        for i, (k, v) in enumerate(row.items()):
            self.table.setItem(i, 0, QTableWidgetItem(str(k)))
            self.table.setItem(i, 1, QTableWidgetItem(f"{v:.4g}" if isinstance(v, float) else str(v)))
        self.table.resizeColumnsToContents()
        self.current = (layer_name, label)
        self._shown_data = {"row": row, "trace": trace, "ref": ref, "dt": dt}
        note = "" if self._table_row(result, label) is not None else " (the region table has no row for it yet)"
        self.hint.setText(f"Region {label} of {layer_name!r}{note}.")
        self.region_shown.emit(label)

    @staticmethod
    def _table_row(result, label):
        table = result.region_table
        if table is None or table.empty:
            return None
        for col in _REGION_COLUMNS:
            if col in table.columns:
                rows = table[table[col] == label]
                return None if rows.empty else rows.iloc[0].to_dict()
        return None

    def _row(self, result, label, spectrum, ref) -> dict:
        row = {"region": label}
        table_row = self._table_row(result, label)
        if table_row is not None:
            row.update(table_row)
        if spectrum is not None:
            row["mean_trace_peak_rate_bpm"] = spectrum["peak_rate_bpm"]
            row["mean_trace_peak_score"] = spectrum["peak_score"]
        if ref is not None:  # the same names as the region table's columns
            row.setdefault("loop_score", float(ref.score))
            row.setdefault("beats", len(ref.beat_times_s))
        return row

    # ----------------------------------------------------------------- export
    def _folder(self, folder):
        if folder is None:
            folder = QFileDialog.getExistingDirectory(self, "Export to folder")
            if not folder:
                return None
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        return folder

    def _stem(self):
        layer_name, label = self.current
        return f"{_safe(layer_name)}_region{label}"

    def export_table(self, folder=None) -> Path | None:
        """Write the shown region's row as CSV into ``folder`` (asked for when None)."""
        if self.current is None:
            return None
        folder = self._folder(folder)
        if folder is None:
            return None
        path = folder / f"{self._stem()}.csv"
        pd.DataFrame([self._shown_data["row"]]).to_csv(path, index=False)
        return path

    def export_traces(self, folder=None) -> list[Path]:
        """Write the shown region's traces as two CSV files into ``folder`` (asked for when None).

        ``<stem>_trace.csv``: one row per frame with ``time_s``, ``mean_signal``
        (the region's mean raw value; empty without the raw stack),
        ``theta_rad`` and ``rate_bpm`` (the rhythm reference on that frame;
        beyond the span a sliding-window reference covers, its phase is
        extended with the nearest cycle's rate and its rate held, as the
        engine's lock-in does). ``<stem>_beats.csv``: ``beat``,
        ``time_s`` and ``interval_s`` (from the previous beat).
        """
        if self.current is None:
            return []
        folder = self._folder(folder)
        if folder is None:
            return []
        trace, ref, dt = self._shown_data["trace"], self._shown_data["ref"], self._shown_data["dt"]
        n = len(trace) if trace is not None else (int(np.ceil(ref.time_s[-1] / dt)) + 1 if ref is not None
                                                   and len(ref.time_s) else 0)
        t = np.arange(n) * dt
        frames = pd.DataFrame({"time_s": t,
                               "mean_signal": np.asarray(trace, float) if trace is not None else np.nan})
        if ref is not None and len(ref.time_s):  # on every frame, as the engine's lock-in uses it
            frames["theta_rad"] = np.mod(theta_on_frames(ref.time_s, ref.theta_rad, t), 2 * np.pi)
            frames["rate_bpm"] = np.interp(t, ref.time_s, ref.inst_rate_bpm)
        else:
            frames["theta_rad"] = frames["rate_bpm"] = np.nan
        beat_times = np.asarray(ref.beat_times_s if ref is not None else [], float)
        beats = pd.DataFrame({"beat": np.arange(1, beat_times.size + 1), "time_s": beat_times,
                              "interval_s": np.r_[np.nan, np.diff(beat_times)] if beat_times.size else []})
        paths = [folder / f"{self._stem()}_trace.csv", folder / f"{self._stem()}_beats.csv"]
        frames.to_csv(paths[0], index=False)
        beats.to_csv(paths[1], index=False)
        return paths

    def export_figures(self, folder=None) -> list[Path]:
        """Write the four figures as PNG into ``folder`` (asked for when None)."""
        if self.current is None:
            return []
        folder = self._folder(folder)
        if folder is None:
            return []
        paths = []
        for name, fig in self.figures.items():
            path = folder / f"{self._stem()}_{name}.png"
            fig.savefig(path, dpi=150)
            paths.append(path)
        return paths
