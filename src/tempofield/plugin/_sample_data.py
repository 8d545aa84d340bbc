"""Sample data: tempofield's synthetic scenes as napari image layers with physical scale.

Each sample is made by :mod:`tempofield.scenes.samples` / :mod:`tempofield.scenes.synthetic`
with a fixed seed; the layer's scale is (frame interval s, pixel um, pixel um)
and its metadata carries ``frame_interval_s`` and ``pixel_size_um`` so the
analysis panel can prefill them.
"""

from __future__ import annotations

from tempofield.scenes import samples, synthetic


def scene_layer_data(scene, name: str) -> list[tuple]:
    """One image layer tuple for a :class:`tempofield.scenes.synthetic.Scene`."""
    fi, ps = float(scene.frame_interval_s), float(scene.pixel_size_um)
    meta = {"frame_interval_s": fi, "pixel_size_um": ps, "source": f"tempofield sample {name}",
            "tempofield_truth_keys": sorted(scene.truth)}
    return [(scene.frames, {"name": name, "scale": (fi, ps, ps), "metadata": meta,
                            "units": ("second", "micrometer", "micrometer"),
                            "axis_labels": ("t", "y", "x")}, "image")]


def well_sheet():
    """A culture well: a sheet beating at 72 bpm with a wave, a 42 bpm cluster, a faint patch."""
    return scene_layer_data(samples.well_sheet(), "well sheet")


def plane_wave():
    """A straight wave of known speed and direction crossing a sheet at 90 bpm."""
    return scene_layer_data(samples.plane_wave(), "plane wave")


def noise():
    """Camera noise with bleaching and flickering debris: no rhythm anywhere.

    12 s at 25 frames per second, so the default rate band (its slowest rate
    needs 9 s for three cycles) can be searched and found empty.
    """
    return scene_layer_data(synthetic.noise_scene((300, 64, 64), rng=samples.SEED), "noise only")
