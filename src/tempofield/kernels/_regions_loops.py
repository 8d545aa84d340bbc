"""Compiled loop of :mod:`tempofield.kernels.regions`: rate-consistent connected components."""

from __future__ import annotations

import numba
import numpy as np

from tempofield.kernels._jit import JIT, JIT_INLINE


@numba.jit(**JIT_INLINE)
def _root(parent, i):
    while parent[i] != i:
        parent[i] = parent[parent[i]]  # path halving
        i = parent[i]
    return i


@numba.jit(**JIT)
def rate_components(rate, ok, tol, out):
    """Connected components of a rate map: 4-neighbours join when both are ``ok`` and
    their rates differ by at most the smaller of their tolerances.

    Writes ``out`` (Y, X) int64: -1 where not ok, else the component's number,
    components numbered 0, 1, ... in the order of their first pixel (row by
    row), as scipy's ``connected_components`` numbers them. Union-find with
    the smaller pixel index as the root.
    """
    h, w = rate.shape
    parent = np.arange(h * w)
    for y in range(h):
        for x in range(w):
            if not ok[y, x]:
                continue
            i = y * w + x
            for dy, dx in ((0, 1), (1, 0)):
                yy, xx = y + dy, x + dx
                if yy >= h or xx >= w or not ok[yy, xx]:
                    continue
                if abs(rate[y, x] - rate[yy, xx]) <= min(tol[y, x], tol[yy, xx]):
                    a, b = _root(parent, i), _root(parent, yy * w + xx)
                    if a < b:
                        parent[b] = a
                    elif b < a:
                        parent[a] = b
    number = np.full(h * w, -1, np.int64)
    n = 0
    for y in range(h):
        for x in range(w):
            if not ok[y, x]:
                out[y, x] = -1
                continue
            r = _root(parent, y * w + x)
            if number[r] < 0:
                number[r] = n
                n += 1
            out[y, x] = number[r]


def warm_up() -> None:
    """Compile (or load from the cache) this module's loop."""
    rate_components(np.ones((2, 2)), np.ones((2, 2), np.bool_), np.ones((2, 2)), np.empty((2, 2), np.int64))
