"""The one dtype policy of tempofield's kernels.

float32 stays float32; float64 stays float64 where a kernel asks for it (Gram
matrices, distances); every integer or boolean input becomes float32 before any
arithmetic, so uint16 camera data never wraps around.
"""

from __future__ import annotations

import numpy as np


def as_float(block, dtype=np.float32) -> np.ndarray:
    """Return ``block`` as a floating-point array of ``dtype``, copying only if needed."""
    return np.asarray(block, dtype=dtype)
