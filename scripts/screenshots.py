"""Render the README screenshots of the napari plugin from the sample data.

Opens a real napari viewer (under Xvfb when there is no display: an Xvfb
server is started for the run and stopped afterwards), loads the synthetic
well-sheet sample, runs the analysis panel with its defaults, picks a region
in the region inspector, and writes:

    docs/screenshots/viewer_rate_overlay.png    the window: rate map over the raw stack, analysis panel
    docs/screenshots/viewer_phase_overlay.png   the canvas: phase map over the raw stack
    docs/screenshots/viewer_delay_overlay.png   the canvas: activation delay map with its colour bar
    docs/screenshots/region_inspector.png       the region inspector dock

Usage: ``python scripts/screenshots.py [--out docs/screenshots]``.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import time
import warnings
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _run_under_xvfb(argv) -> int:
    """Run this script again under a fresh Xvfb server, then stop the server."""
    exe = shutil.which("Xvfb")
    if exe is None:
        sys.exit("no display and no Xvfb: install xvfb (see scripts/system-packages.txt) or set DISPLAY")
    for n in range(91, 120):
        if Path(f"/tmp/.X11-unix/X{n}").exists() or Path(f"/tmp/.X{n}-lock").exists():
            continue
        server = subprocess.Popen([exe, f":{n}", "-screen", "0", "1600x1000x24", "-nolisten", "tcp"],
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(1.0)
        if server.poll() is not None:
            continue
        try:
            # A child process, so Qt disconnects from the server before the server stops.
            return subprocess.call([sys.executable, __file__, *argv], env={**os.environ, "DISPLAY": f":{n}"})
        finally:
            server.terminate()
            server.wait(10)
    sys.exit("could not start Xvfb on a free display")


def _wait(app, condition, timeout_s=120.0):
    end = time.monotonic() + timeout_s
    while not condition():
        if time.monotonic() > end:
            raise TimeoutError("the viewer did not finish in time")
        app.processEvents()
        time.sleep(0.01)


def _hide_toasts(viewer, app):
    """Close napari's notification pop-ups so they do not cover the pictures."""
    from napari._qt.dialogs.qt_notification import NapariQtNotification

    for toast in viewer.window._qt_window.findChildren(NapariQtNotification):
        toast.close()
    for _ in range(10):
        app.processEvents()


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(ROOT / "docs" / "screenshots"), help="output folder")
    args = parser.parse_args(argv)
    if not (os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")):
        return _run_under_xvfb(sys.argv[1:] if argv is None else argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    # Notes about napari's Qt5 support are not about tempofield; keep their toasts out of the pictures.
    warnings.filterwarnings("ignore", message="System theme detection")
    warnings.filterwarnings("ignore", message="napari support for the PyQt5")
    import napari
    from napari.utils.notifications import notification_manager
    from qtpy.QtWidgets import QApplication

    from tempofield.plugin._inspector import RegionInspector
    from tempofield.plugin._widget import AnalysisPanel

    viewer = napari.Viewer(title="tempofield", show=True)
    app = QApplication.instance()
    viewer.window.resize(1400, 900)
    viewer.open_sample("tempofield", "well_sheet")
    raw = viewer.layers["well sheet"]
    panel = AnalysisPanel(viewer)
    viewer.window.add_dock_widget(panel, name="Rhythm analysis", area="right")
    done = []
    panel.analysis_finished.connect(done.append)
    panel.analysis_stopped.connect(lambda why: sys.exit(f"analysis failed: {why}"))
    panel.run_button.click()
    _wait(app, lambda: done and not panel.busy)
    viewer.dims.set_current_step(0, 40)
    viewer.reset_view()
    _wait(app, lambda: True)
    for _ in range(20):
        app.processEvents()
    _hide_toasts(viewer, app)
    paths = []
    path = out / "viewer_rate_overlay.png"
    viewer.screenshot(str(path), canvas_only=False, flash=False)
    paths.append(path)

    rate = viewer.layers[f"rate (bpm) · {raw.name}"]
    phase = viewer.layers[f"phase (rad) · {raw.name}"]
    rate.visible, phase.visible = False, True
    phase.opacity = 0.85
    for _ in range(10):
        app.processEvents()
    path = out / "viewer_phase_overlay.png"
    viewer.screenshot(str(path), canvas_only=True, flash=False)
    paths.append(path)
    delay = viewer.layers[f"delay (s) · {raw.name}"]
    phase.visible, delay.visible = False, True
    delay.opacity = 0.9
    viewer.layers.selection.active = delay
    for _ in range(10):
        app.processEvents()
    path = out / "viewer_delay_overlay.png"
    viewer.screenshot(str(path), canvas_only=True, flash=False)
    paths.append(path)
    delay.visible, rate.visible = False, True
    viewer.layers.selection.active = rate

    inspector = RegionInspector(viewer)
    viewer.window.add_dock_widget(inspector, name="Region inspector", area="right")
    shown = []
    inspector.region_shown.connect(shown.append)
    inspector.select_region(1)
    _wait(app, lambda: shown)
    inspector.resize(760, 720)
    for _ in range(20):
        app.processEvents()
    path = out / "region_inspector.png"
    inspector.grab().save(str(path))
    paths.append(path)
    for p in paths:
        print(p)
    for record in notification_manager.records:
        print("napari notification:", str(record.message)[:200])
    viewer.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
