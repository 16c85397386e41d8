"""Small array helpers shared by the tracking modules."""

from __future__ import annotations

import numpy as np


def frozen_float_array(values) -> np.ndarray:
    """A read-only float64 copy, so frozen dataclasses stay frozen all the way down."""
    arr = np.array(values, dtype=float, copy=True)
    arr.setflags(write=False)
    return arr


def merge_until_disjoint(items, overlaps, merge) -> list:
    """Replace any two items that ``overlaps(a, b)`` by ``merge(a, b)`` until no pair overlaps.

    Order is kept: a merged item takes the place of the first of the pair. Quadratic per pass,
    fine for the handful of bodies and windows of a run.
    """
    items = list(items)
    merged = True
    while merged:
        merged = False
        for i in range(len(items)):
            for j in range(i + 1, len(items)):
                if overlaps(items[i], items[j]):
                    items[i] = merge(items[i], items[j])
                    del items[j]
                    merged = True
                    break
            if merged:
                break
    return items
