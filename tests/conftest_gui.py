"""Helpers for the napari plugin's GUI tests (imported by tests/test_plugin_*.py).

Not a pytest conftest: the GUI tests import these functions explicitly, so the
engine's test files never touch napari.
"""

from __future__ import annotations

import numpy as np

from tempofield import open_stack
from tempofield.scenes import samples
from tempofield.scenes.synthetic import Scene

#: A small, fast set of options for runs in tests (names from tempofield.engine.options.OPTIONS).
FAST_BAND = (30.0, 240.0)


def small_scene() -> Scene:
    """The shipped well-sheet sample (250 x 80 x 80, 72 bpm sheet, 42 bpm cluster)."""
    return samples.well_sheet()


def big_scene(reps: int = 3) -> Scene:
    """The well-sheet sample tiled reps x reps: a stack long enough to run for a few seconds."""
    s = samples.well_sheet()
    return Scene(np.tile(s.frames, (1, reps, reps)), s.frame_interval_s, s.pixel_size_um, {})


def add_scene(viewer, scene: Scene, name="well sheet"):
    """Add a scene as an image layer the way the sample data contribution does."""
    from tempofield.plugin._sample_data import scene_layer_data

    data, kwargs, _ = scene_layer_data(scene, name)[0]
    return viewer.add_image(data, **kwargs)


def engine_stack(scene: Scene):
    return open_stack(scene.frames, frame_interval_s=scene.frame_interval_s, pixel_size_um=scene.pixel_size_um)


def run_panel(qtbot, panel, timeout_ms=60000):
    """Press Run and wait until the result layers are in the viewer."""
    with qtbot.waitSignal(panel.analysis_finished, timeout=timeout_ms):
        panel.run_button.click()
    qtbot.waitUntil(lambda: not panel.busy, timeout=timeout_ms)


def result_layers(viewer, source):
    return [layer for layer in viewer.layers
            if isinstance(layer.metadata.get("tempofield"), dict)
            and layer.metadata["tempofield"].get("source_layer") == source]
