"""Excised regions: parts of a slice whose values are not data.

An evolution code that excises the inside of a black hole leaves garbage (often NaN) there. It
declares the region in one of two ways, both plain data carried by the slice:

* spheres (:class:`ExcisedSphere`: centre and radius in M, optional body label), fixed for the
  run and attached to every slice (``Slice.excised_spheres``);
* a per-patch field named :data:`EXCISION_MASK_FIELD`, nonzero at excised nodes.

A node is excised when it lies inside or on a declared sphere or its mask value is nonzero. No
numerics may read an excised value: a centred difference whose stencil reaches an excised node
is invalid too, so the excised nodes are widened by the difference stencil's half-width along
each axis (:func:`widen_along_axes`) before interpolation; an interpolation stencil touching
such a node raises :class:`ExcisedDataError`, which the finder turns into a status of its own.

Pure functions of arrays; nothing here keeps state.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

__all__ = [
    "EXCISION_MASK_FIELD",
    "ExcisedDataError",
    "ExcisedSphere",
    "excised_node_mask",
    "widen_along_axes",
]

#: Name of the optional per-patch field marking excised nodes (float data, nonzero = excised).
EXCISION_MASK_FIELD = "excision_mask"


class ExcisedDataError(ValueError):
    """A point needs data from inside an excised region (or from nodes whose derivatives do)."""


@dataclass(frozen=True)
class ExcisedSphere:
    """An excised ball: every node with |x - centre| <= radius is excised.

    Attributes:
        centre: (x, y, z) coordinate centre, units of M.
        radius: coordinate radius > 0, units of M.
        body: label of the body whose interior it is ("" when not stated).
    """

    centre: tuple[float, float, float]
    radius: float
    body: str = ""

    def __post_init__(self) -> None:
        try:
            centre = tuple(float(v) for v in self.centre)
        except (TypeError, ValueError):
            raise ValueError(f"centre: expected three numbers (x, y, z), got {self.centre!r}") from None
        if len(centre) != 3 or not all(math.isfinite(v) for v in centre):
            raise ValueError(f"centre: expected three finite numbers (x, y, z), got {self.centre!r}")
        radius = float(self.radius)
        if not (math.isfinite(radius) and radius > 0):
            raise ValueError(f"radius: expected a finite radius > 0 in M, got {self.radius!r}")
        object.__setattr__(self, "centre", centre)
        object.__setattr__(self, "radius", radius)
        object.__setattr__(self, "body", str(self.body))


def excised_node_mask(
    origin: np.ndarray,
    spacing: np.ndarray,
    shape: Sequence[int],
    spheres: Sequence[ExcisedSphere] = (),
    mask_field: np.ndarray | None = None,
    window: tuple[slice, slice, slice] | None = None,
) -> np.ndarray | None:
    """Boolean mask of the excised nodes of a patch, or None when nothing is declared on it.

    Args:
        origin, spacing: (3,) the patch's node [0, 0, 0] and node spacing, units of M.
        shape: (nx, ny, nz) of the patch.
        spheres: the declared :class:`ExcisedSphere` s.
        mask_field: the patch's :data:`EXCISION_MASK_FIELD` array of ``shape`` (nonzero or NaN =
            excised), or None.
        window: index slices (step 1) of a sub-box; the mask then has the sub-box's shape.

    Returns:
        bool array indexed [i, j, k] (of the window when given), or None if no sphere and no mask.
    """
    if not spheres and mask_field is None:
        return None
    if window is None:
        window = tuple(slice(0, int(n)) for n in shape)
    starts = [int(w.start or 0) for w in window]
    stops = [int(n if w.stop is None else w.stop) for w, n in zip(window, shape)]
    sub_shape = tuple(b - a for a, b in zip(starts, stops))
    mask = np.zeros(sub_shape, dtype=bool)
    if mask_field is not None:
        mask |= np.asarray(mask_field)[window] != 0  # NaN != 0 too: a garbage mask counts as excised
    if spheres:
        axes = [origin[a] + spacing[a] * np.arange(starts[a], stops[a]) for a in range(3)]
        for sphere in spheres:
            c = sphere.centre
            d2 = ((axes[0] - c[0]) ** 2)[:, None, None] + ((axes[1] - c[1]) ** 2)[None, :, None] \
                + ((axes[2] - c[2]) ** 2)[None, None, :]
            mask |= d2 <= sphere.radius**2
    return mask


def widen_along_axes(mask: np.ndarray, width: int) -> np.ndarray:
    """``mask`` grown by ``width`` nodes along each axis separately (a cross, not a cube): the
    nodes whose centred first differences of half-width ``width`` reach a masked node."""
    width = int(width)
    if width < 0:
        raise ValueError(f"width: expected an integer >= 0, got {width}")
    out = mask.copy()
    for axis in range(mask.ndim):
        n = mask.shape[axis]
        for k in range(1, min(width, n - 1) + 1):
            ahead = [slice(None)] * mask.ndim
            behind = [slice(None)] * mask.ndim
            ahead[axis], behind[axis] = slice(k, None), slice(None, n - k)
            out[tuple(behind)] |= mask[tuple(ahead)]  # node i sees i + k
            out[tuple(ahead)] |= mask[tuple(behind)]  # node i sees i - k
    return out
