"""Turn what a caller hands the numerics (a :class:`Slice`, a prepared :class:`GridGeometry` or a
geometry source) into a geometry source that reports coverage. Grid nodes are prepared only where
surfaces' stencils reach (:mod:`.node_store`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .geometry import GeometrySource, PointGeometry
from .interpolation import DEFAULT_ORDER, GridGeometry, describe_uncovered, grid_geometry
from .slices import Slice

__all__ = ["TrackedSource", "as_tracked_source"]


@dataclass(eq=False)
class TrackedSource:
    """A geometry source that counts its evaluations; for slices it prepares one
    :class:`GridGeometry` on first use (nodes are then computed on first touch).

    Local to one find or measurement call, or handed from a find to the measurement of its
    surface (``FindResult.geometry``) so the nodes already prepared are reused.
    """

    slice_: Slice | None
    exact: GeometrySource | None
    order: int
    margin_fraction: float = 0.25
    evaluations: int = 0
    _grid: GridGeometry | None = field(default=None, repr=False)

    def _prepared(self, points: np.ndarray) -> GridGeometry:
        if self._grid is None:
            lo, hi = points.min(axis=0), points.max(axis=0)
            pad = self.margin_fraction * np.max(hi - lo) + 1e-12
            self._grid = grid_geometry(self.slice_, lo - pad, hi + pad, order=self.order)
        return self._grid

    def __call__(self, points: np.ndarray, *, prepare: bool = True) -> PointGeometry:
        """Geometry at ``points``. ``prepare=False``: points evaluated once (checks), whose
        unprepared stencils are read straight from the patch arrays (see
        :meth:`GridGeometry.evaluate`)."""
        self.evaluations += 1
        if self.exact is not None:
            return self.exact(points)
        return self._prepared(points).evaluate(points, prepare=prepare)[0]

    def evaluate(self, points: np.ndarray, shift: np.ndarray):
        """(geometry at ``points``, a callable giving the geometry at ``points + shift``). For
        grid data the second is the first-order shift of the same interpolant, made on the
        stencil values already gathered (one gather for both); for exact sources the callable
        evaluates again (counted when called)."""
        self.evaluations += 1
        if self.exact is not None:
            def shifted():
                self.evaluations += 1
                return self.exact(points + shift)

            return self.exact(points), shifted
        return self._prepared(points).evaluate(points, shift)

    @property
    def grid(self) -> GridGeometry | None:
        """The prepared grid geometry (None for exact sources or before the first call)."""
        return self._grid

    def describe_uncovered(self, points: np.ndarray) -> str:
        """Human-readable note on points the data does not cover."""
        if self._grid is None:
            return "the geometry source reported no data there"
        return describe_uncovered(self._grid, points)


def as_tracked_source(data, *, order: int = DEFAULT_ORDER) -> TrackedSource:
    """Wrap a slice, a prepared :class:`GridGeometry` or :class:`TrackedSource` (reused: its
    prepared nodes are kept), a reference spacetime (anything with ``.geometry(points)``) or a
    callable geometry source for one numerics call."""
    if isinstance(data, TrackedSource):
        return TrackedSource(slice_=data.slice_, exact=data.exact, order=data.order, _grid=data._grid)
    if isinstance(data, GridGeometry):
        return TrackedSource(slice_=data.slice_, exact=None, order=data.order, _grid=data)
    if isinstance(data, Slice):
        return TrackedSource(slice_=data, exact=None, order=order)
    if callable(getattr(data, "geometry", None)):  # a reference spacetime: exact evaluation
        return TrackedSource(slice_=None, exact=data.geometry, order=order)
    if callable(data):
        return TrackedSource(slice_=None, exact=data, order=order)
    raise TypeError(f"data: expected a Slice or a callable geometry source, got {type(data).__name__}")
