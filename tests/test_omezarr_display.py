"""maps.ome.zarr carries display hints that other OME-Zarr viewers use.

Validated with an independent model of the OME-NGFF 0.5 metadata,
``ome-zarr-models`` (PyPI; the OME-Zarr models of the NGFF specification):
the image with its ``omero`` channel metadata, and the ``labels`` group.
"""

from __future__ import annotations

import numpy as np
import pytest
import zarr

import tempofield
from tempofield.scenes import synthetic

ome_models = pytest.importorskip("ome_zarr_models.v05.image")


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    s = synthetic.well_scene((300, 48, 48), rng=2)
    res = tempofield.analyze(tempofield.open_stack(s.frames, frame_interval_s=0.04, pixel_size_um=4.0), (30, 150))
    res.rate_bpm[0, 0], res.rate_bpm[0, 1] = 5.0, 900.0  # two planted outliers
    folder = tmp_path_factory.mktemp("r") / "out"
    res.save(folder)
    return res, folder


def test_maps_validate_and_carry_display_windows(saved):
    res, folder = saved
    group = zarr.open_group(str(folder / "maps.ome.zarr"), mode="r")
    image = ome_models.Image.from_zarr(group)  # raises on metadata that breaks the specification
    omero = image.attributes.ome.omero
    channels = omero["channels"] if isinstance(omero, dict) else omero.channels
    channels = [c if isinstance(c, dict) else c.model_dump() for c in channels]
    labels = [c["label"] for c in channels]
    assert "regions" not in labels and "rate_bpm" in labels  # the regions are a label image only
    assert image.labels is not None and "regions" in image.labels.attributes.ome.labels
    rate = channels[labels.index("rate_bpm")]
    finite = res.rate_bpm[np.isfinite(res.rate_bpm)]
    assert rate["window"]["start"] == pytest.approx(np.percentile(finite, 1), rel=1e-5)
    assert rate["window"]["end"] == pytest.approx(np.percentile(finite, 99), rel=1e-5)
    assert rate["window"]["end"] < 800 and rate["window"]["max"] == pytest.approx(900.0)
    phase = channels[labels.index("phase_rad")]
    assert (phase["window"]["start"], phase["window"]["end"]) == pytest.approx((0.0, 2 * np.pi))
    assert len({c["color"] for c in channels}) >= 6  # not all grey
    units = dict(group.attrs["tempofield"]["units"])
    assert all(units[name] for name in labels), units  # a unit on every channel


def test_regions_come_back_from_the_label_image(saved):
    res, folder = saved
    back = tempofield.load_result(folder)
    np.testing.assert_array_equal(back.regions, res.regions)
    np.testing.assert_array_equal(back.rate_bpm, res.rate_bpm)
