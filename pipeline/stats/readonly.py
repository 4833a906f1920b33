"""Read-only copies of arrays: what every result object of :mod:`takeup.pipeline.stats` holds."""

from __future__ import annotations

import numpy as np

__all__ = ["readonly_array"]


def readonly_array(a, dtype=float) -> np.ndarray:
    """A copy of ``a`` as an array of ``dtype`` (``None`` keeps the input's) that cannot be written."""
    arr = np.array(a, dtype=dtype, copy=True)
    arr.setflags(write=False)
    return arr
