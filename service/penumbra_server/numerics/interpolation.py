"""Geometry at arbitrary points from patch data: finite differences on a sub-box, then Lagrange
interpolation of fields and derivatives.

Why finite-difference first: differentiating a piecewise interpolant gives derivatives that jump
between cells, so the expansion would jump as the surface moves and Newton would stall. Here the
derivative fields are made on the grid (centred differences of the same order as the
interpolation) and interpolated like any other field, so Theta is continuous in the surface shape.

Only a sub-box of each patch (the region a surface needs plus the stencils) is touched.

``order`` is the number of interpolation nodes per axis (even): order 4 means cubic Lagrange
interpolation (error O(dx^4)) with fourth-order centred differences.

Excised regions (:mod:`.excision`): the excised nodes of each sub-box, widened by the difference
stencil's half-width along each axis (the derivatives there read excised values), are marked
unusable; a point whose interpolation stencil touches one raises :class:`ExcisedDataError`.
Without declared excision nothing is marked and the results are those of plain data.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .excision import ExcisedDataError, widen_along_axes
from .geometry import PointGeometry, physical_from_conformal, symmetric_from_components
from .slices import Slice, SliceError, VariableSet, symmetric_field_names

__all__ = [
    "SUPPORTED_ORDERS",
    "GridGeometry",
    "grid_geometry",
    "describe_uncovered",
    "centred_difference_weights",
    "lagrange_weights",
    "ExcisedDataError",
]

SUPPORTED_ORDERS = (2, 4, 6, 8)

# Centred first-derivative weights for offsets -g..g (g = order / 2).
_CENTRED = {
    2: np.array([-1 / 2, 0.0, 1 / 2]),
    4: np.array([1 / 12, -2 / 3, 0.0, 2 / 3, -1 / 12]),
    6: np.array([-1 / 60, 3 / 20, -3 / 4, 0.0, 3 / 4, -3 / 20, 1 / 60]),
    8: np.array([1 / 280, -4 / 105, 1 / 5, -4 / 5, 0.0, 4 / 5, -1 / 5, 4 / 105, -1 / 280]),
}


def centred_difference_weights(order: int) -> np.ndarray:
    """Weights of the centred first derivative of the given (even) order, offsets -g..g."""
    if order not in _CENTRED:
        raise ValueError(f"order: expected one of {SUPPORTED_ORDERS}, got {order}")
    return _CENTRED[order]


def lagrange_weights(s: np.ndarray, nodes: int) -> np.ndarray:
    """(N, nodes) Lagrange weights at local coordinates s (N,) for nodes at 0, 1, ..., nodes-1."""
    s = np.asarray(s, dtype=float)
    w = np.ones(s.shape + (nodes,))
    for a in range(nodes):
        for b in range(nodes):
            if b != a:
                w[..., a] *= (s - b) / (a - b)
    return w


def _field_layout(variable_set: VariableSet) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """(fields that need derivatives, fields that do not), in stacking order."""
    if variable_set is VariableSet.ADM:
        return symmetric_field_names("gamma"), symmetric_field_names("K")
    return (
        (variable_set.conformal_factor_name,) + symmetric_field_names("gamma_tilde"),
        symmetric_field_names("A_tilde") + ("trace_K",),
    )


@dataclass(frozen=True, eq=False)
class _Block:
    """Fields and derivatives of one patch on the nodes of a sub-box.

    ``values`` has shape (n_values, bx, by, bz): the differentiated fields, then their x, y, z
    derivatives (field-major), then the plain fields. ``origin`` is the position of node [0,0,0].
    ``unusable`` (bx, by, bz) marks nodes whose values read excised data (None: no excision).
    """

    patch_index: int
    level: int
    origin: np.ndarray
    spacing: np.ndarray
    values: np.ndarray
    unusable: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class GridGeometry:
    """A geometry source for points inside the box it was prepared for.

    Call it with points (N, 3) to get :class:`PointGeometry`; points no prepared block covers come
    back with ``covered = False`` and NaN fields. ``lower`` and ``upper`` bound the prepared
    region (points outside it may still be covered by a stencil's reach, but no promise).
    """

    variable_set: VariableSet
    order: int
    lower: np.ndarray
    upper: np.ndarray
    blocks: tuple[_Block, ...]
    patch_boxes: tuple[tuple[np.ndarray, np.ndarray, int], ...]
    differentiated: tuple[str, ...]
    plain: tuple[str, ...]

    def contains(self, points: np.ndarray) -> bool:
        """Whether every point lies inside the prepared region."""
        return bool(np.all(points >= self.lower) and np.all(points <= self.upper))

    def __call__(self, points: np.ndarray) -> PointGeometry:
        points = np.asarray(points, dtype=float).reshape(-1, 3)
        n = points.shape[0]
        nd = len(self.differentiated)
        nv = nd * 4 + len(self.plain)
        values = np.full((nv, n), np.nan)
        source = np.full(n, -1, dtype=int)
        todo = np.ones(n, dtype=bool)
        p = self.order
        for block in self.blocks:
            if not todo.any():
                break
            idx = np.nonzero(todo)[0]
            rel = (points[idx] - block.origin) / block.spacing
            base = np.floor(rel).astype(int) - (p // 2 - 1)
            shape = np.asarray(block.values.shape[1:])
            inside = np.all((base >= 0) & (base + p - 1 <= shape - 1), axis=1)
            if not inside.any():
                continue
            sel = idx[inside]
            b = base[inside]
            s = rel[inside] - b
            wx, wy, wz = (lagrange_weights(s[:, a], p) for a in range(3))
            off = np.arange(p)
            I = (b[:, 0, None] + off)[:, :, None, None]
            J = (b[:, 1, None] + off)[:, None, :, None]
            K = (b[:, 2, None] + off)[:, None, None, :]
            if block.unusable is not None:
                touches = block.unusable[I, J, K].reshape(sel.size, -1).any(axis=1)
                if touches.any():
                    self._raise_excised(block, points[sel][touches])
            stencil = block.values[:, I, J, K]  # (nv, m, p, p, p)
            bad = ~np.isfinite(stencil).reshape(nv, sel.size, -1).all(axis=2)
            if bad.any():
                self._raise_nonfinite(block, bad, points[sel])
            values[:, sel] = np.einsum("vmabc,ma,mb,mc->vm", stencil, wx, wy, wz, optimize=True)
            source[sel] = block.patch_index
            todo[sel] = False
        return self._to_physical(values, source)

    def _raise_excised(self, block: _Block, pts: np.ndarray) -> None:
        x = pts[0]
        raise ExcisedDataError(
            f"{len(pts)} point(s) need data inside an excised region of patches[{block.patch_index}] (level "
            f"{block.level}), e.g. ({x[0]:.6g}, {x[1]:.6g}, {x[2]:.6g}): the interpolation stencil ({self.order} "
            f"nodes per axis) or the derivatives' difference stencils reach excised nodes"
        )

    def _raise_nonfinite(self, block: _Block, bad: np.ndarray, pts: np.ndarray) -> None:
        # Row v of the value stack -> the field it was made from (derivative rows included).
        names = list(self.differentiated) + [f for f in self.differentiated for _ in range(3)] + list(self.plain)
        v, m = np.argwhere(bad)[0]
        x = pts[m]
        raise SliceError(
            f"field {names[v]!r} on patches[{block.patch_index}] (level {block.level}): non-finite values at "
            f"nodes needed for the surface point ({x[0]:.6g}, {x[1]:.6g}, {x[2]:.6g}); expected finite numbers"
        )

    def _to_physical(self, values: np.ndarray, source: np.ndarray) -> PointGeometry:
        nd = len(self.differentiated)
        n = values.shape[1]
        base = values[:nd].T  # (n, nd)
        deriv = values[nd : 4 * nd].T.reshape(n, nd, 3)  # [n, field, k]
        plain = values[4 * nd :].T
        covered = source >= 0
        if self.variable_set is VariableSet.ADM:
            gamma = symmetric_from_components(base)
            dgamma = symmetric_from_components(np.transpose(deriv, (0, 2, 1)))  # [n, k, i, j]
            K = symmetric_from_components(plain)
            return PointGeometry(gamma, dgamma, K, covered, source)
        factor, dfactor = base[:, 0], deriv[:, 0, :]
        if self.variable_set is VariableSet.CONFORMAL_CHI:
            chi, dchi = factor, dfactor
        elif self.variable_set is VariableSet.CONFORMAL_W:
            chi, dchi = factor**2, 2.0 * factor[:, None] * dfactor
        else:  # phi: chi = exp(-4 phi)
            chi = np.exp(-4.0 * factor)
            dchi = -4.0 * chi[:, None] * dfactor
        gamma_tilde = symmetric_from_components(base[:, 1:7])
        dgamma_tilde = symmetric_from_components(np.transpose(deriv[:, 1:7, :], (0, 2, 1)))
        A_tilde = symmetric_from_components(plain[:, :6])
        with np.errstate(divide="ignore", invalid="ignore"):
            gamma, dgamma, K = physical_from_conformal(chi, dchi, gamma_tilde, dgamma_tilde, A_tilde, plain[:, 6])
        return PointGeometry(gamma, dgamma, K, covered, source)


def _prepare_block(slice_: Slice, index: int, lower, upper, order, differentiated, plain) -> _Block | None:
    patch = slice_.patches[index]
    g = order // 2
    pad = order + g
    n = np.asarray(patch.shape)
    lo_idx = np.floor((lower - patch.origin) / patch.spacing).astype(int) - pad
    hi_idx = np.ceil((upper - patch.origin) / patch.spacing).astype(int) + pad
    lo_idx = np.maximum(lo_idx, 0)
    hi_idx = np.minimum(hi_idx, n - 1)
    if np.any(hi_idx - lo_idx < 2 * g + order - 1):
        return None  # the region misses this patch, or too few nodes for a stencil
    window = tuple(slice(int(a), int(b) + 1) for a, b in zip(lo_idx, hi_idx))
    inner = tuple(slice(g, (b - a + 1) - g) for a, b in zip(lo_idx, hi_idx))
    shape_inner = tuple(int(b - a + 1 - 2 * g) for a, b in zip(lo_idx, hi_idx))
    weights = centred_difference_weights(order)
    nd = len(differentiated)
    values = np.empty((4 * nd + len(plain),) + shape_inner)
    with np.errstate(invalid="ignore", over="ignore"):
        for f, name in enumerate(differentiated):
            raw = np.asarray(patch.fields[name][window], dtype=float)
            values[f] = raw[inner]
            for axis in range(3):
                acc = np.zeros(shape_inner)
                for k, w in enumerate(weights):
                    if w == 0.0:
                        continue
                    sl = list(inner)
                    sl[axis] = slice(k, k + shape_inner[axis])
                    acc += w * raw[tuple(sl)]
                values[nd + 3 * f + axis] = acc / patch.spacing[axis]
        for f, name in enumerate(plain):
            values[4 * nd + f] = np.asarray(patch.fields[name][window], dtype=float)[inner]
    origin = patch.origin + (lo_idx + g) * patch.spacing
    excised = slice_.excised_mask(index, window)
    unusable = None
    if excised is not None and excised.any():
        # Derivatives at a node read g nodes either side along each axis.
        unusable = widen_along_axes(excised, g)[inner]
    return _Block(index, patch.level, origin, patch.spacing.copy(), values, unusable)


def grid_geometry(slice_: Slice, lower, upper, *, order: int = 4) -> GridGeometry:
    """Prepare interpolation of the slice's geometry for points inside the box [lower, upper].

    Args:
        slice_: the slice.
        lower, upper: (3,) corners of the region surfaces will be evaluated in, units of M.
        order: interpolation nodes per axis (even, one of :data:`SUPPORTED_ORDERS`).
    """
    if order not in SUPPORTED_ORDERS:
        raise ValueError(f"order: expected one of {SUPPORTED_ORDERS}, got {order}")
    lower = np.asarray(lower, dtype=float).reshape(3)
    upper = np.asarray(upper, dtype=float).reshape(3)
    if np.any(upper <= lower):
        raise ValueError(f"region: upper {upper.tolist()} must exceed lower {lower.tolist()} on every axis")
    differentiated, plain = _field_layout(slice_.variable_set)
    blocks = []
    for index in slice_.patch_order():
        block = _prepare_block(slice_, index, lower, upper, order, differentiated, plain)
        if block is not None:
            blocks.append(block)
    # Usable box of every patch (where a full stencil fits), for "nearest patch" messages.
    g = order // 2
    reach = g + order // 2
    boxes = tuple(
        (p.origin + reach * p.spacing, p.upper - reach * p.spacing, i) for i, p in enumerate(slice_.patches)
    )
    return GridGeometry(slice_.variable_set, order, lower, upper, tuple(blocks), boxes, differentiated, plain)


def describe_uncovered(geometry: GridGeometry, points: np.ndarray) -> str:
    """Which patch came closest to the uncovered points, and how far outside its usable box."""
    best = None
    for lo, hi, index in geometry.patch_boxes:
        outside = np.maximum(np.maximum(lo - points, points - hi), 0.0)
        dist = float(np.max(np.linalg.norm(outside, axis=1)))
        if best is None or dist < best[0]:
            best = (dist, index)
    if best is None:
        return "no patches"
    return f"nearest patch: patches[{best[1]}], the farthest such point lies {best[0]:.4g} M outside its usable box"
