"""Synthetic scenes with ground truth (beating sheets, waves, noise), and the
writer of the shipped sample stacks."""

from __future__ import annotations

import lazy_loader

__getattr__, __dir__, __all__ = lazy_loader.attach(
    __name__, submodules=[
    "synthetic", "samples",
    ])
