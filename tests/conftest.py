"""Shared fixtures: small synthetic stacks and files made fresh for each test session."""

from __future__ import annotations

import numpy as np
import pytest

from tempofield import kernels
from tempofield.scenes import synthetic


@pytest.fixture(scope="session", autouse=True)
def _compiled_loops():
    """Compile tempofield's loops once before any test, so no timed or GUI test pays for it."""
    kernels.warm_up()


@pytest.fixture(scope="session")
def well():
    """A small culture-well scene (sheet at 72 bpm with a wave, cluster at 42 bpm)."""
    return synthetic.well_scene((240, 48, 48), frame_interval_s=0.04, pixel_size_um=4.0, pacemaker=(14.0, 14.0),
                                cluster_center=(35.0, 35.0), cluster_radius_px=6.0, rng=7)


@pytest.fixture
def rng():
    return np.random.default_rng(12345)
