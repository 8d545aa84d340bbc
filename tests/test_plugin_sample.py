"""Sample data contributions: tempofield's synthetic scenes with their physical scale.

The reference is tempofield.scenes.samples / tempofield.scenes.synthetic (the same scenes, same seed).
"""

from __future__ import annotations

import numpy as np
import pytest

import tempofield
from tempofield.plugin import _sample_data
from tempofield.scenes import samples, synthetic


@pytest.mark.parametrize("fn, scene", [(_sample_data.well_sheet, samples.well_sheet),
                                       (_sample_data.plane_wave, samples.plane_wave)])
def test_samples_are_the_shipped_scenes_with_scale_and_metadata(fn, scene):
    (data, attrs, kind), = fn()
    ref = scene()
    assert kind == "image"
    np.testing.assert_array_equal(data, ref.frames)
    assert attrs["scale"] == (ref.frame_interval_s, ref.pixel_size_um, ref.pixel_size_um)
    assert attrs["metadata"]["frame_interval_s"] == ref.frame_interval_s
    assert attrs["metadata"]["pixel_size_um"] == ref.pixel_size_um


def test_noise_sample_has_no_rhythm_truth():
    """The noise sample is synthetic.noise_scene with the samples' seed; its truth says there is no
    rhythm anywhere (no rate, no region), and the analysis of the sample finds no region."""
    (data, attrs, _), = _sample_data.noise()
    ref = synthetic.noise_scene((300, 64, 64), rng=samples.SEED)
    np.testing.assert_array_equal(data, ref.frames)
    meta = attrs["metadata"]
    assert meta["frame_interval_s"] == ref.frame_interval_s
    assert meta["tempofield_truth_keys"] == ["rate_bpm", "regions"]
    truth = ref.truth
    assert truth["rate_bpm"].shape == truth["regions"].shape == data.shape[1:]
    assert np.all(np.isnan(truth["rate_bpm"]))
    assert not np.any(truth["regions"])
    stack = tempofield.open_stack(data, frame_interval_s=meta["frame_interval_s"], pixel_size_um=meta["pixel_size_um"])
    res = tempofield.analyze(stack, (30, 150))
    assert res.regions.max() == 0 and len(res.region_table) == 0 and not res.references
    assert np.isfinite(res.rate_bpm).mean() <= 0.01


@pytest.mark.gui
def test_open_sample_in_a_viewer(make_napari_viewer):
    viewer = make_napari_viewer()
    viewer.open_sample("tempofield", "well_sheet")
    layer = viewer.layers["well sheet"]
    ref = samples.well_sheet()
    np.testing.assert_allclose(layer.scale, (ref.frame_interval_s, ref.pixel_size_um, ref.pixel_size_um))
    assert layer.metadata["frame_interval_s"] == ref.frame_interval_s
    assert [str(u) for u in layer.units] == ["second", "micrometer", "micrometer"]
