"""Turn what a caller hands the numerics (a :class:`Slice` or a geometry source) into a geometry
source that reports coverage, preparing grid sub-boxes only around where surfaces actually are.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .geometry import GeometrySource, PointGeometry
from .interpolation import GridGeometry, describe_uncovered, grid_geometry
from .slices import Slice

__all__ = ["TrackedSource", "as_tracked_source"]


@dataclass(eq=False)
class TrackedSource:
    """A geometry source that counts its evaluations and, for slices, re-prepares its sub-box
    when the points move out of it.

    Local to one find or measurement call; never shared between calls.
    """

    slice_: Slice | None
    exact: GeometrySource | None
    order: int
    margin_fraction: float = 0.25
    evaluations: int = 0
    _grid: GridGeometry | None = field(default=None, repr=False)

    def __call__(self, points: np.ndarray) -> PointGeometry:
        self.evaluations += 1
        if self.exact is not None:
            return self.exact(points)
        if self._grid is None or not self._grid.contains(points):
            lo, hi = points.min(axis=0), points.max(axis=0)
            pad = self.margin_fraction * np.max(hi - lo) + 1e-12
            self._grid = grid_geometry(self.slice_, lo - pad, hi + pad, order=self.order)
        return self._grid(points)

    def describe_uncovered(self, points: np.ndarray) -> str:
        """Human-readable note on points the data does not cover."""
        if self._grid is None:
            return "the geometry source reported no data there"
        return describe_uncovered(self._grid, points)


def as_tracked_source(data, *, order: int = 4) -> TrackedSource:
    """Wrap a slice, a reference spacetime (anything with ``.geometry(points)``) or a callable
    geometry source for one numerics call."""
    if isinstance(data, Slice):
        return TrackedSource(slice_=data, exact=None, order=order)
    if callable(getattr(data, "geometry", None)):  # a reference spacetime: exact evaluation
        return TrackedSource(slice_=None, exact=data.geometry, order=order)
    if callable(data):
        return TrackedSource(slice_=None, exact=data, order=order)
    raise TypeError(f"data: expected a Slice or a callable geometry source, got {type(data).__name__}")
