"""Sampling a slice near given points: the grid spacing there, and the shift as an interpolant.

Pure functions of a :class:`~penumbra_server.numerics.slices.Slice`; units of M (the shift is
dimensionless, M per M). The puncture tracks integrate d x^i / dt = -beta^i with the callable
:func:`shift_field` returns.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from .interpolation import lagrange_weights
from .slices import Slice

__all__ = ["SHIFT_NAMES", "carries_shift", "shift_field", "spacing_near"]

#: Field names of the shift's components in a slice.
SHIFT_NAMES = ("shift_x", "shift_y", "shift_z")


def carries_shift(slice_: Slice) -> bool:
    """Whether some patch of ``slice_`` carries all three shift components."""
    return any(all(name in patch.fields for name in SHIFT_NAMES) for patch in slice_.patches)


@dataclass(frozen=True, eq=False)
class _ShiftBlock:
    origin: np.ndarray
    spacing: np.ndarray
    values: np.ndarray  # (3, nx, ny, nz)


def shift_field(slice_: Slice, lower, upper, *, order: int = 4) -> Callable[[np.ndarray], np.ndarray] | None:
    """The shift of ``slice_`` in the box [lower, upper] as a callable points (N, 3) -> (N, 3).

    Each patch carrying shift_x/y/z is cut to the box plus the stencil (copied, so the slice
    can be released); a point is served by the finest patch whose ``order``-node Lagrange stencil
    fits inside the cut (interpolation error O(h^order)); points no patch serves give NaN.
    Returns None when no patch carries the shift inside the box.
    """
    lower = np.asarray(lower, float)
    upper = np.asarray(upper, float)
    blocks = []
    for patch in sorted(slice_.patches, key=lambda p: -p.level):
        if not all(name in patch.fields for name in SHIFT_NAMES):
            continue
        n = np.asarray(patch.shape)
        first = np.clip(np.floor((lower - patch.origin) / patch.spacing).astype(int) - order, 0, n - 1)
        last = np.clip(np.ceil((upper - patch.origin) / patch.spacing).astype(int) + order, 0, n - 1)
        if np.any(last - first + 1 < order):
            continue
        cut = tuple(slice(int(a), int(b) + 1) for a, b in zip(first, last))
        values = np.stack([np.asarray(patch.fields[name])[cut] for name in SHIFT_NAMES])
        blocks.append(_ShiftBlock(patch.origin + first * patch.spacing, patch.spacing.copy(), values))
    if not blocks:
        return None
    half = order // 2

    def shift(points) -> np.ndarray:
        pts = np.atleast_2d(np.asarray(points, float))
        out = np.full((pts.shape[0], 3), np.nan)
        todo = np.ones(pts.shape[0], bool)
        for block in blocks:
            if not todo.any():
                break
            size = np.asarray(block.values.shape[1:])
            s = (pts - block.origin) / block.spacing
            base = np.floor(s).astype(int) - (half - 1)
            fits = todo & np.all(base >= 0, axis=1) & np.all(base + order <= size, axis=1)
            for index in np.nonzero(fits)[0]:
                b = base[index]
                w = [lagrange_weights(np.array([s[index, a] - b[a]]), order)[0] for a in range(3)]
                cube = block.values[:, b[0]:b[0] + order, b[1]:b[1] + order, b[2]:b[2] + order]
                out[index] = np.einsum("cijk,i,j,k->c", cube, w[0], w[1], w[2])
            todo &= ~fits
        return out

    return shift


def spacing_near(slice_: Slice, point) -> float:
    """Largest spacing component of the finest patch containing ``point`` (else the finest), M."""
    p = np.asarray(point, float)
    best = None
    for patch in slice_.patches:
        inside = np.all(p >= patch.origin) and np.all(p <= patch.upper)
        if inside and (best is None or patch.level > best.level):
            best = patch
    if best is None:
        return float(min(np.max(patch.spacing) for patch in slice_.patches))
    return float(np.max(best.spacing))
