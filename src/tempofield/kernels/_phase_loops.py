"""Compiled loop of :mod:`tempofield.kernels.phase`: resultant length over segments."""

from __future__ import annotations

import numba
import numpy as np

from tempofield.kernels._jit import JIT


@numba.jit(**JIT)
def segment_resultant(proj, out):
    """Coherence from lock-in sums: the resultant length of the segment phases.

    ``proj`` (2 + 2K, n) float32 holds each trace's products with the rows of
    :func:`tempofield.kernels.phase.lockin_basis`; rows 2k+2 and 2k+3 are segment k's
    cosine and sine sums, whose phase is atan2(-sine, cosine). Writes ``out``
    (n,) float32: |sum_k e^{i phase_k}| / K, a segment with a zero sum
    counting as nothing.
    """
    n = proj.shape[1]
    k_seg = (proj.shape[0] - 2) // 2
    acc_re = np.zeros(n, np.float32)
    acc_im = np.zeros(n, np.float32)
    for k in range(k_seg):
        re = proj[2 + 2 * k]
        im = proj[3 + 2 * k]
        for j in range(n):
            m = np.sqrt(re[j] * re[j] + im[j] * im[j])
            if m > 0:
                acc_re[j] += re[j] / m
                acc_im[j] -= im[j] / m
    for j in range(n):
        out[j] = min(np.float32(1.0), np.sqrt(acc_re[j] * acc_re[j] + acc_im[j] * acc_im[j]) / np.float32(k_seg))


def warm_up() -> None:
    """Compile (or load from the cache) this module's loop."""
    segment_resultant(np.ones((4, 3), np.float32), np.empty(3, np.float32))
