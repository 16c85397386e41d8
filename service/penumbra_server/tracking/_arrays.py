"""Small array helpers shared by the tracking modules."""

from __future__ import annotations

import numpy as np


def frozen_float_array(values) -> np.ndarray:
    """A read-only float64 copy, so frozen dataclasses stay frozen all the way down."""
    arr = np.array(values, dtype=float, copy=True)
    arr.setflags(write=False)
    return arr
