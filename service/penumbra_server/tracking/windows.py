"""Data windows: the boxes of grid data the server needs in the next slice.

Units: geometric (G = c = 1), lengths in the run's mass scale M.

The box itself (:class:`DataWindow`); how large the server makes each one is the rule of
:mod:`penumbra_server.tracking.data_windows`. Windows that overlap are merged into their
bounding box (:func:`merge_overlapping_windows`), so no node travels twice;
:func:`window_coverage` measures how much of a window a set of patches covers.

The shim crops slices to these windows with :func:`penumbra_shim.cropping.crop_patches`
(numpy only); it is not imported here so the server's tracking code does not load the shim
package (which carries the gRPC client).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from ._arrays import frozen_float_array, merge_until_disjoint

__all__ = [
    "merge_overlapping_windows",
    "WindowError",
    "DataWindow",
    "window_coverage",
]


class WindowError(ValueError):
    """Bad input to a data-window function. The message names the field at fault."""


@dataclass(frozen=True, eq=False)
class DataWindow:
    """An axis-aligned box of data wanted in the next slice.

    Attributes:
        name: what it serves: a body name, "common", or names joined by "+" when merged.
        lower, upper: (3,) corners, units of M (lower < upper).
        reason: how its size was reached.
        growth: how many times it was grown after missing data.
    """

    name: str
    lower: np.ndarray
    upper: np.ndarray
    reason: str
    growth: int = 0

    def __post_init__(self) -> None:
        lower, upper = np.asarray(self.lower, float), np.asarray(self.upper, float)
        if lower.shape != (3,) or upper.shape != (3,):
            raise WindowError(f"window {self.name!r}: lower/upper must have shape (3,)")
        if not (np.all(np.isfinite(lower)) and np.all(np.isfinite(upper)) and np.all(lower < upper)):
            raise WindowError(f"window {self.name!r}: expected finite corners with lower < upper, got "
                              f"{lower.tolist()} and {upper.tolist()}")
        object.__setattr__(self, "lower", frozen_float_array(lower))
        object.__setattr__(self, "upper", frozen_float_array(upper))

    @property
    def centre(self) -> np.ndarray:
        return 0.5 * (self.lower + self.upper)

    @property
    def half_width(self) -> np.ndarray:
        return 0.5 * (self.upper - self.lower)

    def contains(self, points) -> np.ndarray:
        """(n,) whether each of the (n, 3) points lies in the closed box."""
        p = np.atleast_2d(np.asarray(points, float))
        return np.all((p >= self.lower) & (p <= self.upper), axis=1)


def _overlap(a: DataWindow, b: DataWindow) -> bool:
    return bool(np.all(a.lower <= b.upper) and np.all(b.lower <= a.upper))


def merge_overlapping_windows(windows) -> list[DataWindow]:
    """Merge overlapping windows into their bounding boxes until none overlap (no node is sent
    twice); a merged window is named after its parts ("A+B"), each part once."""

    def merge(a: DataWindow, b: DataWindow) -> DataWindow:
        parts = a.name.split("+") + [n for n in b.name.split("+") if n not in a.name.split("+")]
        return DataWindow(
            name="+".join(parts),
            lower=np.minimum(a.lower, b.lower), upper=np.maximum(a.upper, b.upper),
            reason=f"bounding box of overlapping windows ({a.reason}) and ({b.reason})",
            growth=max(a.growth, b.growth),
        )

    return merge_until_disjoint(windows, _overlap, merge)


def window_coverage(window: DataWindow, patches: Sequence, *, samples_per_axis: int = 9) -> float:
    """Fraction of a lattice of sample points in ``window`` that lies inside some patch.

    ``patches`` are objects (or mappings) with ``origin``, ``spacing`` and ``shape``; a patch
    covers the closed box between its first and last node. 1.0 means fully covered (to the
    lattice's resolution, ``samples_per_axis`` points per axis including the corners).
    """
    n = int(samples_per_axis)
    if n < 2:
        raise WindowError(f"samples_per_axis: expected at least 2, got {samples_per_axis!r}")
    axes = [np.linspace(window.lower[a], window.upper[a], n) for a in range(3)]
    pts = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    covered = np.zeros(pts.shape[0], bool)
    for index, patch in enumerate(patches):
        get = (lambda k: patch[k]) if isinstance(patch, Mapping) else (lambda k: getattr(patch, k))
        try:
            origin = np.asarray(get("origin"), float)
            spacing = np.asarray(get("spacing"), float)
            shape = np.asarray(get("shape"), float)
        except (KeyError, AttributeError):
            raise WindowError(f"patches[{index}]: expected origin, spacing and shape") from None
        upper = origin + spacing * (shape - 1)
        tol = 1e-9 * spacing
        covered |= np.all((pts >= origin - tol) & (pts <= upper + tol), axis=1)
    return float(covered.mean())
