"""Small conversions of wire values shared by the shim's result types."""

from __future__ import annotations

import numpy as np

from ._wire import horizons_pb2 as pb

__all__ = ["NAN", "triple", "vectors"]

NAN = float("nan")


def triple(v: pb.Vector3) -> np.ndarray:
    """(3,) array of a Vector3."""
    return np.array([v.x, v.y, v.z])


def vectors(values) -> np.ndarray:
    """(n, 3) array of repeated Vector3s."""
    return np.array([[v.x, v.y, v.z] for v in values], dtype=float).reshape(-1, 3)
