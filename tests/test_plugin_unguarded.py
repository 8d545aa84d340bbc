"""A script without a ``__main__`` guard, written like napari's own examples, must not hang.

The script makes its viewer at module level, docks the analysis panel, asks
for one worker process (so the engine would spawn one, which re-runs an
unguarded script), presses Run and quits when the result layers are in. It
runs as a real subprocess under the test's X server; it must end within a
bound, with the layers added and only one viewer window.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import pytest

pytestmark = pytest.mark.gui

SCRIPT = textwrap.dedent("""
    import napari
    from qtpy.QtCore import QTimer
    from qtpy.QtWidgets import QApplication

    from tempofield.plugin._widget import AnalysisPanel
    from tempofield.plugin._sample_data import scene_layer_data
    from tempofield.scenes import samples

    viewer = napari.Viewer(show=True)
    data, kwargs, _ = scene_layer_data(samples.well_sheet(), "well sheet")[0]
    viewer.add_image(data, **kwargs)
    panel = AnalysisPanel(viewer)
    viewer.window.add_dock_widget(panel, name="rhythm analysis")
    panel.option_widgets["worker_processes"].setValue(1)
    print("STARTED", flush=True)

    def done(source):
        windows = [w for w in QApplication.topLevelWidgets() if w.inherits("QMainWindow") and w.isVisible()]
        names = [layer.name for layer in viewer.layers]
        print("DONE", len(windows), len(names), flush=True)
        QApplication.quit()

    panel.analysis_finished.connect(done)
    panel.analysis_stopped.connect(lambda why: (print("STOPPED", why, flush=True), QApplication.quit()))
    QTimer.singleShot(500, panel.run_button.click)
    napari.run()
""")


def test_an_unguarded_script_runs_the_panel_to_the_end(tmp_path):
    script = tmp_path / "unguarded_example.py"
    script.write_text(SCRIPT)
    env = {**os.environ, "LIBGL_ALWAYS_SOFTWARE": "1"}
    p = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=240, env=env,
                       cwd=tmp_path)
    out = p.stdout
    assert out.count("STARTED") == 1, (out, p.stderr[-2000:])  # the script ran once: no second copy of it
    done = [line for line in out.splitlines() if line.startswith("DONE")]
    assert done, (out, p.stderr[-2000:])
    _, windows, layers = done[0].split()
    assert int(windows) == 1 and int(layers) > 3
