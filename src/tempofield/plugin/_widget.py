"""The analysis panel: choose a stack layer and parameters, run the engine in a thread, show the maps.

The panel gathers the layer, frame interval, pixel size, rate band and the
options of :data:`tempofield.engine.options.OPTIONS` (its fields are built from that
table, never from copies of it), then drives :func:`tempofield.engine.run.iter_analyze`
in a generator ``thread_worker``: every tile the engine finishes is one yield,
one tick of napari's progress bar, and one point where Cancel takes effect.
Result layers are added on the main thread when the worker returns; a rerun
of the same source layer updates its earlier result layers in place (same
layer objects, new data, the user's display choices kept), and a cancelled run
adds nothing. An error is told once: in the panel's status line and as one
notification (with a traceback only for a fault of the program, never for a
problem with the input).
"""

from __future__ import annotations

import inspect
import threading
import time

from napari.qt.threading import thread_worker
from napari.utils import progress
from napari.utils.notifications import notification_manager, show_error, show_warning
from napari.viewer import Viewer
from qtpy.QtCore import QTimer, Signal
from qtpy.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDoubleSpinBox,
    QFormLayout,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QPushButton,
    QSpinBox,
    QVBoxLayout,
    QWidget,
)
from superqt import QCollapsible

from tempofield import open_stack
from tempofield._version import __version__
from tempofield.engine import options as options_mod
from tempofield.engine import presets
from tempofield.engine import run as engine
from tempofield.engine.options import OPTIONS, validate_options, validate_rate_range
from tempofield.errors import CancelledError, TempofieldError
from tempofield.outputs.report import magnified_preview

from ._layers import META_KEY, REGION_CONTOUR_PX, layer_name, result_layer_data

#: Options shown at once; the others sit under "more options".
PRIMARY_OPTIONS = ("pooling_radius_px",)
#: Options set by the specimen list rather than their own field.
COMBO_OPTIONS = ("specimen",)
#: Where the panel starts from other values than the engine's defaults, and why. The
#: references run in the panel's own worker thread (the engine's default, 0 processes):
#: ripser holds Python's GIL only tens of milliseconds at a time, which the viewer
#: absorbs, while a spawned process would re-run a user's script that has no
#: ``__main__`` guard (a second viewer, and a run that never ends).
GUI_DEFAULTS: dict = {}
CUSTOM_BAND = "custom band"
#: Field labels of the options, in words (the engine's option names are for code and the command line).
OPTION_LABELS = {
    "pooling_radius_px": "smoothing radius (px)",
    "false_alarm": "false alarms per pixel",
    "trend_cutoff_fraction": "slow-trend cut-off (x lowest rate)",
    "memory_budget_mb": "working memory (MB)",
    "min_cycles": "fewest cycles in the record",
    "gram_max_pixels": "pixels per region for its beat timing",
    "n_landmarks": "moments compared per region",
    "max_frames_topology": "frames used to find the cycle",
    "min_area_px": "smallest region (px)",
    "locked_detection": "add pixels that follow a region's rhythm",
    "maps_only": "spectral maps only (fast)",
    "specimen": "specimen",
    "rate_unit": "rate unit (bpm or Hz)",
    "magnified_preview": "show a magnified preview",
    "worker_processes": "helper processes",
    "phase_from_kept_spectra": "phase from the first read",
    "tile_loop_map": "loop score per 16 px tile",
}
PREVIEW_TITLE = "magnified preview"


def default_rate_range_bpm() -> tuple[float, float]:
    """The engine's own default band (read from the engine, not copied)."""
    band = getattr(options_mod, "DEFAULT_RATE_RANGE_BPM", None) or \
        inspect.signature(engine.analyze).parameters["rate_range_bpm"].default
    return tuple(float(v) for v in band)


@thread_worker(start_thread=False, ignore_errors=True)  # errors are told by the panel, once
def analysis_job(stack, rate_range_bpm, cancel, options):
    """Generator worker: each engine tick is yielded (progress + cancel point).

    Returns ``(result, preview)``: the magnified preview's frames when the
    ``magnified_preview`` option is on and a rhythm was found, else None.
    """
    result = yield from engine.iter_analyze(stack, rate_range_bpm, cancel=cancel, **options)
    preview = None
    if options.get("magnified_preview") and not cancel():
        preview = magnified_preview(result, stack)
    return result, preview


#: Axis labels napari layers use for time and for channels (lower case).
TIME_LABELS = ("t", "time", "frame", "frames")
CHANNEL_LABELS = ("c", "ch", "channel", "channels")

#: Time and length units to seconds and micrometres (what a layer's ``units`` may say).
_TO_SECONDS = {"second": 1.0, "s": 1.0, "millisecond": 1e-3, "ms": 1e-3, "microsecond": 1e-6, "us": 1e-6,
               "minute": 60.0, "min": 60.0, "hour": 3600.0, "h": 3600.0}
_TO_UM = {"micrometer": 1.0, "micron": 1.0, "um": 1.0, "µm": 1.0, "nanometer": 1e-3, "nm": 1e-3,
          "millimeter": 1e3, "mm": 1e3, "meter": 1e6, "m": 1e6, "centimeter": 1e4, "cm": 1e4}


def _unit_name(unit) -> str:
    text = str(unit or "").strip().lower()
    return "" if text in ("pixel", "px", "dimensionless", "") else text


def layer_axes(layer) -> str:
    """The layer's axes as letters (T, C, Y, X, S for RGB samples), from its axis labels where they say.

    The time axis is the one labelled t/time/frame, else the first; a channel
    axis is the one labelled c/channel, else the axis left over in a 4-D layer;
    the last two non-time axes are Y and X.
    """
    nd = layer.ndim
    labels = [str(a).strip().lower() for a in getattr(layer, "axis_labels", ())] or [""] * nd
    time = next((i for i, a in enumerate(labels) if a in TIME_LABELS), 0)
    rest = [i for i in range(nd) if i != time]
    letters = [""] * nd
    letters[time] = "T"
    spatial = rest[-2:]
    for i, letter in zip(spatial, "YX"):
        letters[i] = letter
    for i in rest[:-2]:
        letters[i] = "C"
    out = "".join(letters)
    return out + "S" if layer.rgb else out


def _axis_physical(layer, axis: int, table: dict) -> float | None:
    """The scale of one axis in the table's unit (seconds or micrometres), or None when it was never set."""
    scale = float(layer.scale[axis])
    if scale == 1.0:  # napari's default: never set, whatever unit the axis names
        return None
    units = getattr(layer, "units", None)
    name = _unit_name(units[axis]) if units is not None and len(units) > axis else ""
    return scale * table.get(name, 1.0)  # a scale without a known unit: taken as seconds / micrometres


def stack_layer_frame_interval(layer) -> float | None:
    """Frame interval of a layer, seconds: its metadata, else its time axis's scale in its unit (ms -> s)."""
    fi = layer.metadata.get("frame_interval_s")
    if fi:
        return float(fi)
    return _axis_physical(layer, layer_axes(layer).index("T"), _TO_SECONDS)


def stack_layer_pixel_size(layer) -> float | None:
    """Pixel size of a layer, micrometres: its metadata, else its x axis's scale in its unit (nm -> µm)."""
    ps = layer.metadata.get("pixel_size_um")
    if ps:
        return float(ps)
    return _axis_physical(layer, layer_axes(layer).index("X"), _TO_UM)


def is_stack_layer(layer) -> bool:
    """Image layers that can be analysed: (T, Y, X), (T, C, Y, X) or RGB (T, Y, X, S), axes in any order
    their labels say."""
    return not_a_stack_reason(layer) is None


def not_a_stack_reason(layer) -> str | None:
    """Why an image layer cannot be analysed, or None when it can (results' own layers: 'a result')."""
    from napari.layers import Image

    if not isinstance(layer, Image):
        return "not an image"
    if META_KEY in layer.metadata:
        return "a result"
    if layer.ndim < 3:
        return "a single 2-D image: no time axis"
    if layer.ndim > 4:
        return f"{layer.ndim} axes: choose a channel or plane first"
    return None


class AnalysisPanel(QWidget):
    """Dock widget: run tempofield on an image layer and overlay the maps on it."""

    #: Emitted on the main thread after the result layers were added (the source layer's name).
    analysis_finished = Signal(str)
    #: Emitted when a run ends without a result ("cancelled" or the error message).
    analysis_stopped = Signal(str)

    def __init__(self, napari_viewer: Viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.worker = None
        self.last_result = None
        self._cancel = threading.Event()
        self._pbar = None
        self._run_started = 0.0
        self._stop_reported = False
        self._pending: list[tuple] = []
        self._pending_done = None
        self._reused: dict = {}
        self._chosen = None  # the stack layer chosen (the object: it keeps its place across renames)

        form = QFormLayout()
        self.layer_box = QComboBox()
        self.layer_box.setToolTip("Image layer with frames along the first axis: (T, Y, X) or (T, C, Y, X).")
        form.addRow("stack layer", self.layer_box)
        self.channel_spin = QSpinBox()
        self.channel_spin.setToolTip("Channel to analyse, for a (T, C, Y, X) layer.")
        form.addRow("channel", self.channel_spin)
        self.frame_interval = QDoubleSpinBox()
        self.frame_interval.setDecimals(6)
        self.frame_interval.setRange(0.0, 1e5)
        self.frame_interval.setSingleStep(0.001)
        self.frame_interval.setSpecialValueText("required")
        self.frame_interval.setSuffix(" s")
        self.frame_interval.setToolTip("Seconds between frames (prefilled from the layer's metadata or time scale).")
        form.addRow("frame interval", self.frame_interval)
        self.pixel_size = QDoubleSpinBox()
        self.pixel_size.setDecimals(4)
        self.pixel_size.setRange(0.0, 1e5)
        self.pixel_size.setSpecialValueText("unknown")
        self.pixel_size.setSuffix(" µm")
        self.pixel_size.setToolTip("Pixel edge in micrometres; 'unknown' keeps distances in pixels.")
        form.addRow("pixel size", self.pixel_size)

        self.preset_box = QComboBox()
        self.preset_box.addItem(CUSTOM_BAND)
        for i, p in enumerate(presets.SPECIMENS.values(), start=1):
            self.preset_box.addItem(p.name)
            self.preset_box.setItemData(i, f"{p.description}: {p.rate_range_bpm[0]:g}-{p.rate_range_bpm[1]:g} bpm "
                                           f"(plausible {p.plausible_bpm[0]:g}-{p.plausible_bpm[1]:g}); {p.source}",
                                        3)  # Qt.ToolTipRole
        form.addRow("specimen", self.preset_box)
        band = QHBoxLayout()
        lo, hi = default_rate_range_bpm()
        self.rate_lo, self.rate_hi = QDoubleSpinBox(), QDoubleSpinBox()
        for box, value in ((self.rate_lo, lo), (self.rate_hi, hi)):
            box.setRange(0.0, 1e6)
            box.setDecimals(1)
            box.setValue(value)
            box.setSuffix(" bpm")
            # wide enough for the longest value with its unit ("1200.0 bpm" was cut to "240.0 bpr")
            box.setMinimumWidth(box.fontMetrics().horizontalAdvance("99999.9 bpm") + 28)
            band.addWidget(box)
        self.rate_lo.setToolTip("Lowest rate to look for, beats per minute.")
        self.rate_hi.setToolTip("Highest rate to look for, beats per minute (below the Nyquist rate).")
        form.addRow("rate band", band)

        self.option_widgets: dict[str, QWidget] = {}
        more = QFormLayout()
        for opt in OPTIONS:
            widget = self._option_widget(opt)
            self.option_widgets[opt.name] = widget
            if opt.name in COMBO_OPTIONS:
                continue  # set through the specimen list above
            (form if opt.name in PRIMARY_OPTIONS else more).addRow(OPTION_LABELS.get(opt.name, opt.name), widget)
        more_box = QWidget()
        more_box.setLayout(more)
        self.more_options = QCollapsible("more options")
        self.more_options.addWidget(more_box)

        buttons = QHBoxLayout()
        self.run_button = QPushButton("Run")
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setEnabled(False)
        buttons.addWidget(self.run_button)
        buttons.addWidget(self.cancel_button)
        self.status = QLabel("")
        self.status.setWordWrap(True)

        outer = QVBoxLayout(self)
        outer.addLayout(form)
        outer.addWidget(self.more_options)
        outer.addLayout(buttons)
        outer.addWidget(self.status)
        outer.addStretch(1)

        self.layer_box.currentTextChanged.connect(self._prefill_from_layer)
        self.preset_box.currentTextChanged.connect(self._apply_preset)
        self.rate_lo.valueChanged.connect(self._band_edited)
        self.rate_hi.valueChanged.connect(self._band_edited)
        self.run_button.clicked.connect(self.run)
        self.cancel_button.clicked.connect(self.cancel)
        events = self.viewer.layers.events
        for ev in (events.inserted, events.removed, events.reordered):
            ev.connect(self._refresh_layers)
        self._refresh_layers()

    # ----------------------------------------------------------------- fields
    @staticmethod
    def _option_widget(opt):
        default = GUI_DEFAULTS.get(opt.name, opt.default)
        if opt.kind is bool:
            w = QCheckBox()
            w.setChecked(bool(default))
        elif opt.kind is int:
            w = QSpinBox()
            w.setRange(-(2**31 - 1), 2**31 - 1)
            w.setValue(int(default))
        elif opt.kind is float:
            w = QLineEdit(f"{default:g}")
        else:
            w = QLineEdit(str(default))
        w.setToolTip(f"{opt.help} Allowed: {opt.allowed}.")
        return w

    def _refresh_layers(self, event=None):
        """Keep the list current (added, removed, renamed, reordered layers) without touching the fields
        while the chosen layer stays the same object; 2-D images are listed, greyed, with why."""
        for layer in self.viewer.layers:  # a rename must refresh the list too
            if not getattr(layer, "_tempofield_watched", False):
                layer.events.name.connect(self._refresh_layers)
                layer._tempofield_watched = True
        chosen = self._chosen
        stacks = [layer for layer in self.viewer.layers if is_stack_layer(layer)]
        others = [(layer, not_a_stack_reason(layer)) for layer in self.viewer.layers
                  if not is_stack_layer(layer) and not_a_stack_reason(layer) == "a single 2-D image: no time axis"]
        self.layer_box.blockSignals(True)
        self.layer_box.clear()
        self.layer_box.addItems([layer.name for layer in stacks])
        for layer, why in others:
            self.layer_box.addItem(f"{layer.name} (not analysable: {why})")
            item = self.layer_box.model().item(self.layer_box.count() - 1)
            item.setEnabled(False)
        if chosen is not None and any(layer is chosen for layer in stacks):
            self.layer_box.setCurrentText(chosen.name)
        elif stacks:
            self.layer_box.setCurrentIndex(0)
        self.layer_box.blockSignals(False)
        now = self._layer(self.layer_box.currentText())
        if now is not chosen:
            self._prefill_from_layer(self.layer_box.currentText())

    def _prefill_from_layer(self, name):
        layer = self._layer(name)
        self._chosen = layer
        if layer is None:
            return
        self.frame_interval.setValue(stack_layer_frame_interval(layer) or 0.0)
        self.pixel_size.setValue(stack_layer_pixel_size(layer) or 0.0)
        axes = layer_axes(layer)
        n_channels = layer.data.shape[axes.index("C")] if "C" in axes else 1
        self.channel_spin.setRange(0, n_channels - 1)
        self.channel_spin.setEnabled(n_channels > 1)

    def _apply_preset(self, name):
        preset = presets.SPECIMENS.get(name)
        if "specimen" in self.option_widgets:  # the engine also checks plausibility against it
            self.set_options(specimen=preset.name if preset else "")
        if preset is None:
            return
        for box, value in zip((self.rate_lo, self.rate_hi), preset.rate_range_bpm):
            box.blockSignals(True)
            box.setValue(value)
            box.blockSignals(False)

    def _band_edited(self, _value):
        if self.preset_box.currentText() != CUSTOM_BAND:
            self.preset_box.setCurrentText(CUSTOM_BAND)  # an edited band is no longer the preset's

    def _layer(self, name):
        return self.viewer.layers[name] if name and name in self.viewer.layers else None

    # ----------------------------------------------------------------- parameters
    def set_layer(self, name: str) -> None:
        """Choose the stack layer by name (and prefill its frame interval and pixel size)."""
        self.layer_box.setCurrentText(name)
        self._prefill_from_layer(name)

    def set_options(self, **values) -> None:
        """Set option fields by name (as in :data:`tempofield.engine.options.OPTIONS`)."""
        for name, value in values.items():
            w = self.option_widgets[name]
            if isinstance(w, QCheckBox):
                w.setChecked(bool(value))
            elif isinstance(w, QSpinBox):
                w.setValue(int(value))
            else:
                w.setText(str(value))

    def options(self) -> dict:
        """The options as entered, validated by :func:`tempofield.engine.options.validate_options`."""
        raw = {}
        for name, w in self.option_widgets.items():
            if isinstance(w, QCheckBox):
                raw[name] = w.isChecked()
            elif isinstance(w, QSpinBox):
                raw[name] = w.value()
            else:
                raw[name] = w.text().strip()
        return validate_options(raw)

    def rate_range_bpm(self) -> tuple[float, float]:
        return validate_rate_range((self.rate_lo.value(), self.rate_hi.value()))

    def make_stack(self):
        """Open the chosen layer (and channel) as an engine :class:`~tempofield.Stack`."""
        layer = self._layer(self.layer_box.currentText())
        if layer is None:
            raise TempofieldError("choose an image layer with frames along the first axis, e.g. a sample "
                                "from File > Open Sample > tempofield.")
        fi = self.frame_interval.value()
        if fi <= 0:
            raise TempofieldError(f"layer {layer.name!r} has no frame interval; enter the seconds between "
                                "frames in 'frame interval' (50 frames per second is 0.02 s).")
        ps = self.pixel_size.value() or None
        data = layer.data[0] if layer.multiscale else layer.data
        axes = layer_axes(layer)
        channel = self.channel_spin.value() if "C" in axes else None
        return open_stack(data, frame_interval_s=fi, pixel_size_um=ps, axes=axes, channel=channel)

    # ----------------------------------------------------------------- running
    def run(self) -> None:
        """Start an analysis of the chosen layer in a worker thread."""
        if self.busy:
            return
        try:
            stack = self.make_stack()
            band = self.rate_range_bpm()
            opts = self.options()
        except TempofieldError as exc:
            self.status.setText(f"Not started: {exc}")
            show_warning(f"tempofield: not started: {exc}")
            return
        layer = self._layer(self.layer_box.currentText())
        source = layer.name
        place = {"scale": tuple(layer.scale[-2:]), "translate": tuple(layer.translate[-2:]),
                 "units": tuple(str(u) for u in layer.units[-2:]),
                 "extra_meta": {"channel": self.channel_spin.value() if self.channel_spin.isEnabled() else None,
                                "plugin_version": __version__}}
        self._cancel = threading.Event()
        self._stop_reported = False
        worker = analysis_job(stack, band, self._cancel.is_set, opts)
        worker.yielded.connect(self._on_tick)
        worker.returned.connect(lambda out: self._on_result(*out, source, place))
        worker.errored.connect(self._on_error)
        worker.aborted.connect(lambda: self._on_stopped("cancelled"))
        worker.finished.connect(self._on_finished)
        self.worker = worker
        self._pbar = progress(total=0, desc=f"tempofield: {source}")
        self.run_button.setEnabled(False)
        self.cancel_button.setEnabled(True)
        self.status.setText(f"Analysing {source!r} ({band[0]:g}-{band[1]:g} bpm)...")
        self._run_started = time.perf_counter()
        worker.start()

    def cancel(self) -> None:
        """Stop the running analysis at the engine's next tile; no result layers are added."""
        if self.worker is None:
            return
        self._cancel.set()
        self.worker.quit()
        self.status.setText("Cancelling...")

    def _on_tick(self, tick):
        pbar = self._pbar  # updating the bar may process events, and the run may end meanwhile
        if pbar is None:
            return
        if pbar.total != tick.total:
            pbar.total = tick.total
        pbar.set_description(f"tempofield: {tick.stage}")
        if self._pbar is pbar:
            pbar.update(tick.done - pbar.n)
        stopping = self._stop_reported or (self._cancel is not None and self._cancel.is_set())
        if tick.total and not stopping:  # progress in the panel itself (napari's activity dock is hidden)
            self.status.setText(f"Analysing: {tick.stage}, {tick.done} of {tick.total} "
                                f"({100 * tick.done / tick.total:.0f} %)")

    def _on_result(self, result, preview, source, place):
        self.last_result = result
        pending = list(result_layer_data(result, source, **place))
        if preview is not None:
            raw = self._layer(source)
            pending.append((preview, {
                "name": layer_name(source, PREVIEW_TITLE), "colormap": "gray", "visible": False,
                "scale": tuple(raw.scale) if raw is not None and raw.ndim == 3 else None,
                "metadata": {META_KEY: {"map": "magnified_preview", "source_layer": source,
                                        "run_id": pending[0][1]["metadata"][META_KEY]["run_id"]}}}, "image"))
        # The earlier run's layers of this source, by what they show: they are updated in place.
        self._reused = {key: layer for layer in self.viewer.layers
                        if (key := self._result_key(layer)) is not None and key[0] == source}
        # One layer per turn of the event loop: napari needs a few hundred ms to
        # build each layer's visual, and the viewer should not freeze for all of them.
        self._pending = pending
        self._pending_done = (result, source)
        self._add_next_layer()

    @staticmethod
    def _result_key(layer):
        """(source layer, map, layer type) of a result layer made by this panel or the reader, else None."""
        info = layer.metadata.get(META_KEY)
        if not (isinstance(info, dict) and "run_id" in info and info.get("map")):
            return None
        return info.get("source_layer"), info["map"], type(layer).__name__.lower()

    def _add_next_layer(self):
        if self._pending:
            data, kwargs, layer_type = self._pending.pop(0)
            key = (self._pending_done[1], kwargs["metadata"][META_KEY]["map"], layer_type)
            old = self._reused.pop(key, None)
            if old is not None:
                update_layer(old, data, kwargs, layer_type)
            else:
                kwargs = {k: v for k, v in kwargs.items() if v is not None}
                layer = getattr(self.viewer, f"add_{layer_type}")(data, **kwargs)
                if layer_type == "labels":  # outlines over the maps
                    layer.contour = REGION_CONTOUR_PX
                    layer.opacity = 1.0
                    layer.visible = True
                elif layer_type == "image" and hasattr(layer, "colorbar") and key[1] != "magnified_preview":
                    layer.colorbar.visible = True  # the map's colour bar, with its unit
            QTimer.singleShot(0, self._add_next_layer)
            return
        for layer in self._reused.values():  # maps the new run does not make (e.g. no velocity now)
            if layer in self.viewer.layers:
                self.viewer.layers.remove(layer)
        self._reused = {}
        result, source = self._pending_done
        rate = [layer for layer in self.viewer.layers
                if (key := self._result_key(layer)) is not None and key[:2] == (source, "rate_bpm")]
        if rate:  # hovering then reads the rate, not the raw intensity (the panel keeps its own choice of stack)
            self.viewer.layers.selection.active = rate[-1]
        self.status.setText(f"Done in {time.perf_counter() - self._run_started:.1f} s: {done_words(result)}")
        self._pending_done = None
        self._set_idle()
        self.analysis_finished.emit(source)

    def remove_result_layers(self, source: str) -> None:
        """Remove the result layers made from ``source`` by an earlier run."""
        for layer in list(self.viewer.layers):
            key = self._result_key(layer)
            if key is not None and key[0] == source:
                self.viewer.layers.remove(layer)

    def _on_error(self, exc):
        if isinstance(exc, CancelledError):
            self._on_stopped("cancelled")
            return
        if isinstance(exc, TempofieldError):  # a problem with the input or the settings: its message, no traceback
            self._on_stopped(str(exc))
            show_error(f"tempofield: {exc}")
        else:  # a fault of the program: the one notification carries the traceback for a bug report
            self._on_stopped(f"{type(exc).__name__}: {exc}")
            notification_manager.receive_error(type(exc), exc, exc.__traceback__)

    def _on_stopped(self, why):
        if self._stop_reported:  # a cancel may arrive both as an abort and as CancelledError
            return
        self._stop_reported = True
        self.status.setText("Cancelled; no result layers were added." if why == "cancelled" else f"Failed: {why}")
        self.analysis_stopped.emit(why)

    def _on_finished(self):
        self.worker = None
        if self._pbar is not None:
            self._pbar.close()
            self._pbar = None
        self.cancel_button.setEnabled(False)
        if self._pending_done is None:
            self._set_idle()

    def _set_idle(self):
        self.run_button.setEnabled(True)
        self.cancel_button.setEnabled(False)

    @property
    def busy(self) -> bool:
        """True while an analysis runs or its layers are being added."""
        return self.worker is not None or self._pending_done is not None


def done_words(result) -> str:
    """The status line after a run: the headline numbers, or plainly that no rhythm was found."""
    summary = result.summary()
    n = summary["n_regions"]
    if n == 0:
        return (f"no rhythm found: no beating region ({100 * summary['rhythmic_fraction']:.1f}% of the pixels "
                "passed the single-pixel test, which pure noise also does at the false-alarm rate).")
    return (f"median rate {summary['rate_median_bpm']:.1f} bpm over {100 * summary['rhythmic_fraction']:.0f}% "
            f"of the frame, {n} region(s).")


def update_layer(layer, data, kwargs: dict, layer_type: str) -> None:
    """Give an existing result layer a new run's data, limits and provenance, in place.

    The user's display choices (visibility, colormap, opacity, name) stay; the
    world transform follows the new source, so the maps keep overlaying it.
    """
    if layer_type == "vectors":
        feature = kwargs["edge_color"]
        layer.data = data
        layer.features = kwargs["features"]
        layer.edge_color = feature
        layer.edge_contrast_limits = kwargs["edge_contrast_limits"]
    else:
        layer.data = data
        if layer_type == "image":
            lo, hi = kwargs.get("contrast_limits") or (float(data.min()), float(data.max()))
            layer.contrast_limits_range = (lo, hi)
            layer.contrast_limits = (lo, hi)
    for name in ("scale", "translate"):
        if kwargs.get(name) is not None:
            setattr(layer, name, kwargs[name])
    layer.metadata = kwargs["metadata"]


__all__ = ["AnalysisPanel", "analysis_job", "update_layer"]
