"""Data windows: the boxes of grid data the server needs in the next slice.

Units: geometric (G = c = 1), lengths in the run's mass scale M.

Around each forecast surface the window is the bounding box of the forecast path over the
interval, grown by the horizon's largest coordinate radius, the largest forecast uncertainty
and a stencil margin of ``margin_points`` grid points of the finest spacing near the body
(default 8: a 4th-order interpolation stencil reaches 2-3 nodes beyond a point and the
4th-order centred first differences taken on the grid before interpolating reach 2 more; the
rest is slack for the surface moving during the finder's iterations). A pending
common-surface search adds the box around its guess sphere with the same margin. Windows that
overlap are merged into their bounding box, so no node travels twice.

When a slice lacked data a surface needed, :func:`grow_windows` widens the windows concerned;
:func:`window_coverage` measures how much of a window a set of patches covers.

The shim crops slices to these windows with :func:`penumbra_shim.cropping.crop_patches`
(numpy only); it is not imported here so the server's tracking code does not load the shim
package (which carries the gRPC client).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Iterable, Mapping, Sequence

import numpy as np

from ._arrays import frozen_float_array, merge_until_disjoint

from .common import CommonSearchAdvice
from .forecast import Forecast

__all__ = [
    "merge_overlapping_windows",
    "WindowError",
    "DataWindow",
    "WindowSet",
    "data_windows",
    "grow_windows",
    "window_coverage",
    "DEFAULT_MARGIN_POINTS",
]

#: Default stencil margin, in grid points of the finest spacing near the surface (module doc).
DEFAULT_MARGIN_POINTS = 8


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


@dataclass(frozen=True, eq=False)
class WindowSet:
    """The windows wanted for the next slice.

    Attributes:
        windows: the boxes (non-overlapping after merging).
        valid_from, valid_until: the forecast interval they were built for, units of M.
        margin_points: the stencil margin used, in grid points.
    """

    windows: tuple[DataWindow, ...]
    valid_from: float
    valid_until: float
    margin_points: int

    def bounds(self) -> np.ndarray:
        """(m, 2, 3) array of (lower, upper) per window, the form the shim's crop accepts."""
        return np.array([[w.lower, w.upper] for w in self.windows], dtype=float).reshape(-1, 2, 3)

    def names(self) -> tuple[str, ...]:
        return tuple(w.name for w in self.windows)

    def volume(self) -> float:
        return float(sum(np.prod(w.upper - w.lower) for w in self.windows))


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


def _per_body(value, bodies: Sequence[str], name: str) -> dict[str, float]:
    if isinstance(value, Mapping):
        missing = [b for b in bodies if b not in value]
        if missing:
            raise WindowError(f"{name}: no value for body/bodies {missing}")
        out = {b: float(value[b]) for b in bodies}
    else:
        out = {b: float(value) for b in bodies}
    for b, v in out.items():
        if not (np.isfinite(v) and v > 0):
            raise WindowError(f"{name}[{b!r}]: expected a positive number, got {v!r}")
    return out


def data_windows(
    forecast: Forecast,
    *,
    radii: Mapping[str, float],
    spacing: float | Mapping[str, float],
    margin_points: int = DEFAULT_MARGIN_POINTS,
    common: CommonSearchAdvice | None = None,
    merge_overlapping: bool = True,
) -> WindowSet:
    """Windows around each forecast surface and any pending common-surface search.

    Args:
        forecast: the bodies' forecast over the interval until the next guidance.
        radii: body -> horizon's largest coordinate radius, units of M.
        spacing: finest grid spacing near each surface (one number or body -> number), M.
        margin_points: stencil margin in grid points of that spacing.
        common: the common-horizon advice; a window is added when ``common.search``.
        merge_overlapping: merge overlapping windows into their bounding box.
    """
    if not isinstance(forecast, Forecast):
        raise WindowError(f"forecast: expected a Forecast, got {type(forecast).__name__}")
    if int(margin_points) < 0:
        raise WindowError(f"margin_points: expected an integer >= 0, got {margin_points!r}")
    margin_points = int(margin_points)
    r = _per_body(radii, forecast.bodies, "radii")
    h = _per_body(spacing, forecast.bodies, "spacing")
    windows = []
    for index, body in enumerate(forecast.bodies):
        path = forecast.positions[index]
        unc = forecast.uncertainty[index]
        # No estimate (single sample): allow one more horizon radius of motion.
        u = float(np.max(unc)) if np.all(np.isfinite(unc)) else r[body]
        grow = r[body] + u + margin_points * h[body]
        windows.append(DataWindow(
            name=body, lower=path.min(axis=0) - grow, upper=path.max(axis=0) + grow,
            reason=(f"forecast path of {body} grown by r_max {r[body]:.4g} + uncertainty {u:.4g} + "
                    f"{margin_points} x {h[body]:.4g} M stencil margin"),
        ))
    if common is not None and common.search:
        h_min = min(h.values())
        grow = common.radius + margin_points * h_min
        windows.append(DataWindow(
            name="common", lower=common.centre - grow, upper=common.centre + grow,
            reason=(f"common-surface guess radius {common.radius:.4g} M + {margin_points} x {h_min:.4g} M "
                    f"stencil margin"),
        ))
    if merge_overlapping:
        windows = merge_overlapping_windows(windows)
    return WindowSet(windows=tuple(windows), valid_from=float(forecast.times[0]),
                     valid_until=float(forecast.times[-1]), margin_points=margin_points)


def grow_windows(window_set: WindowSet, *, lacking: Iterable[str], factor: float = 1.5) -> WindowSet:
    """Widen the named windows (their half-widths times ``factor`` about their centres).

    Args:
        window_set: the windows sent for the slice that lacked data.
        lacking: names of the windows whose surfaces lacked data (a merged window is named
            by any of its parts, e.g. "A" finds "A+B").
        factor: growth of the half-width (> 1).

    Returns:
        A new :class:`WindowSet` (re-merged where grown windows now overlap).
    """
    factor = float(factor)
    if not (np.isfinite(factor) and factor > 1):
        raise WindowError(f"factor: expected a number > 1, got {factor!r}")
    lacking = list(lacking)
    names = {w.name: set(w.name.split("+")) for w in window_set.windows}
    unknown = [n for n in lacking if not any(n == full or n in parts for full, parts in names.items())]
    if unknown:
        raise WindowError(f"lacking: no window named {unknown}; windows are {list(names)}")
    out = []
    for w in window_set.windows:
        if any(n == w.name or n in names[w.name] for n in lacking):
            half = w.half_width * factor
            out.append(replace(w, lower=w.centre - half, upper=w.centre + half, growth=w.growth + 1,
                               reason=f"{w.reason}; grown x{factor:g} after missing data"))
        else:
            out.append(w)
    return replace(window_set, windows=tuple(merge_overlapping_windows(out)))


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
