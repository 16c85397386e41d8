"""Geometry at arbitrary points from patch data: finite differences at the grid nodes a surface's
stencils reach, then Lagrange interpolation of fields and derivatives.

Why finite-difference first: differentiating a piecewise interpolant gives derivatives that jump
between cells, so the expansion would jump as the surface moves and Newton would stall. Here the
derivative fields are made on the grid (centred differences of the same order as the
interpolation) and interpolated like any other field, so Theta is continuous in the surface shape.

Nodes are prepared on first touch (:mod:`.node_store`): the values at a node (fields and their
centred differences) are computed the first time an interpolation stencil reaches it and kept in
a contiguous component-last store, so memory and time follow the surface, not the volume.

``order`` is the number of interpolation nodes per axis (even): order 4 means cubic Lagrange
interpolation (error O(dx^4)) with fourth-order centred differences. The default,
:data:`DEFAULT_ORDER` = 6, was chosen by measurement (DEVELOPERS.md, "The finder"): on Kerr-Schild data at
about 20 points per horizon radius it reaches the area accuracy of a tensor-product cubic spline
of the fields, which order 4 misses by a factor of about 15.

ADM input is decomposed at the nodes, before interpolation, into W = psi^-2 = det(gamma)^(-1/6),
the unit-determinant gamma_tilde_ij = W^2 gamma_ij, A_tilde_ij = W^2 (K_ij - gamma_ij K / 3) and
K = gamma^ij K_ij, and converted back at the points like the conformal variable sets. Near a
puncture gamma_ij ~ psi^4 ~ r^-4 is what a polynomial interpolates worst; W ~ r^2 there, and
gamma_tilde_ij and W^2 K_ij stay bounded. W rather than chi = W^2 because it varies less steeply
around the horizon: on Brill-Lindquist data at dx = M/32 the area error from chi was 15 times
that from W (DEVELOPERS.md, "The finder"). Away from punctures the decomposition changes little.

Excised regions (:mod:`.excision`): a node whose difference stencil (half-width order/2 along each
axis) reaches an excised node is unusable; a point whose interpolation stencil touches one raises
:class:`ExcisedDataError`. Without declared excision nothing is marked.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from .direct_stencils import direct_values, direct_where_unprepared
from .excision import ExcisedDataError
from .geometry import PointGeometry, physical_from_conformal
from .node_store import NodeStore, centred_difference_weights, field_layout
from .slices import DegenerateMetricError, Slice, SliceError, VariableSet

__all__ = [
    "SUPPORTED_ORDERS",
    "DEFAULT_ORDER",
    "GridGeometry",
    "grid_geometry",
    "describe_uncovered",
    "centred_difference_weights",
    "lagrange_weights",
    "stencil_weights",
    "ExcisedDataError",
]

SUPPORTED_ORDERS = (2, 4, 6, 8)
#: Interpolation nodes per axis used unless a caller says otherwise (see the module docstring).
DEFAULT_ORDER = 6


def lagrange_weights(s: np.ndarray, nodes: int) -> np.ndarray:
    """(..., nodes) Lagrange weights at local coordinates s (...) for nodes at 0, 1, ..., nodes-1.

    L_a(s) = prod_{b != a} (s - b) / prod_{b != a} (a - b), the numerator as the product of the
    running products from below (b < a) and from above (b > a): about 3 x nodes whole-array
    products instead of nodes^2 small ones."""
    s = np.asarray(s, dtype=float)
    d = [s - b for b in range(nodes)]
    below = [np.ones(s.shape)]
    for a in range(1, nodes):
        below.append(below[-1] * d[a - 1])
    inverse = _inverse_denominators(nodes)
    out = np.empty(s.shape + (nodes,))
    above = None
    for a in range(nodes - 1, -1, -1):
        out[..., a] = (below[a] if above is None else below[a] * above) * inverse[a]
        above = d[a] if above is None else above * d[a]
    return out


@functools.lru_cache(maxsize=8)
def _inverse_denominators(nodes: int) -> np.ndarray:
    """(nodes,) 1 / prod_{b != a} (a - b), read-only."""
    a = np.arange(nodes)
    out = np.array([1.0 / np.prod([k - b for b in a if b != k], dtype=float) for k in a])
    out.setflags(write=False)
    return out


@functools.lru_cache(maxsize=8)
def _lagrange_derivative_coefficients(nodes: int) -> np.ndarray:
    """(nodes - 1, nodes) C with d/ds L_a(s) = sum_k C[k, a] s^k for the Lagrange basis on
    0..nodes-1 (coefficients from the inverse Vandermonde matrix), read-only."""
    vandermonde = np.vander(np.arange(nodes, dtype=float), nodes, increasing=True)
    coefficients = np.linalg.inv(vandermonde)  # row k: coefficient of s^k in each L_a
    out = coefficients[1:] * np.arange(1, nodes)[:, None]
    out.setflags(write=False)
    return out


def lagrange_weight_derivatives(s: np.ndarray, nodes: int) -> np.ndarray:
    """(N, nodes) d/ds of :func:`lagrange_weights` at s (N,) (monomial form: round-off about
    1e-13 relative, ample for a Jacobian's field variation)."""
    s = np.asarray(s, dtype=float)
    powers = s[..., None] ** np.arange(nodes - 1)
    return powers @ _lagrange_derivative_coefficients(nodes)


def stencil_weights(s: np.ndarray, nodes: int) -> np.ndarray:
    """(N, nodes^3) tensor-product Lagrange weights at local coordinates s (N, 3), x slowest."""
    wx, wy, wz = (lagrange_weights(s[:, a], nodes) for a in range(3))
    return (wx[:, :, None, None] * wy[:, None, :, None] * wz[:, None, None, :]).reshape(len(s), -1)


@dataclass(frozen=True, eq=False)
class GridGeometry:
    """A geometry source over a slice's patches.

    Call it with points (N, 3) to get :class:`PointGeometry`; points no patch covers (with a full
    interpolation stencil of nodes that have centred differences) come back with
    ``covered = False`` and NaN fields. ``lower`` and ``upper`` record the region the caller
    expected to use; points elsewhere are served too (nodes are prepared on first touch).

    The node stores are caches of pure functions of the slice: calling the same instance twice
    with the same points gives the same values.

    A point that no patch serves at this order (its stencils do not fit in one patch, e.g. near
    the seam between two ranks' boxes with few ghost nodes), and next to excised regions
    (declared on the slice) a point whose stencils reach excised nodes, is served by
    ``next_lower``, the same interpolation of order - 2 (down to 4), whose stencils are
    narrower; only when the lowest one still reaches excised data does the call raise
    :class:`ExcisedDataError`, and a point no order serves is left uncovered (NaN).
    """

    variable_set: VariableSet
    order: int
    lower: np.ndarray
    upper: np.ndarray
    blocks: tuple[NodeStore, ...]
    patch_boxes: tuple[tuple[np.ndarray, np.ndarray, int], ...]
    differentiated: tuple[str, ...]
    plain: tuple[str, ...]
    slice_: Slice | None = None
    next_lower: "GridGeometry | None" = None

    def contains(self, points: np.ndarray) -> bool:
        """Whether every point lies inside the region given at preparation."""
        return bool(np.all(points >= self.lower) and np.all(points <= self.upper))

    @property
    def prepared_nodes(self) -> int:
        """Nodes whose values have been computed so far (all patches)."""
        return sum(b.count for b in self.blocks)

    def stencils(self, points: np.ndarray):
        """For each patch serving some points (finest first): (store, point indices, flat node
        indices (m, order^3), weights (m, order^3), per-axis weights (m, 3, order), local
        coordinates (m, 3) in node units, stencil corners (m, 3): node indices of each stencil's
        node [0, 0, 0]). Points no patch serves are left out."""
        points = np.asarray(points, dtype=float).reshape(-1, 3)
        todo = np.ones(points.shape[0], dtype=bool)
        p = self.order
        off = np.arange(p)
        out = []
        for store in self.blocks:
            if not todo.any():
                break
            idx = np.nonzero(todo)[0]
            rel = (points[idx] - store.origin) / store.spacing
            with np.errstate(invalid="ignore"):
                base = np.floor(rel).astype(int) - (p // 2 - 1)
            inside = np.all((base >= store.reach) & (base + p - 1 <= store.shape_array - 1 - store.reach), axis=1)
            if not inside.any():
                continue
            # All inside is the usual case: no copies then.
            sel, b, rel = (idx, base, rel) if inside.all() else (idx[inside], base[inside], rel[inside])
            s = rel - b
            strides = np.array([store.shape[1] * store.shape[2], store.shape[2], 1])
            offsets = ((off[:, None, None] * strides[0] + off[None, :, None] * strides[1]) + off[None, None, :]).ravel()
            flat = (b @ strides)[:, None] + offsets[None, :]
            w = lagrange_weights(s, p)  # (m, 3, p): all three axes in one pass
            weights = _tensor_product(w[:, 0], w[:, 1], w[:, 2])
            out.append((store, sel, flat, weights, w, s, b))
            todo[sel] = False
        return out

    def __call__(self, points: np.ndarray, *, prepare: bool = True) -> PointGeometry:
        return self.evaluate(points, prepare=prepare)[0]

    def evaluate(self, points: np.ndarray, shift: np.ndarray | None = None, *, prepare: bool = True):
        """(geometry at ``points``, a callable giving the geometry at ``points + shift`` to first
        order in the shift, or None without ``shift``). The second comes from the derivative of
        the same interpolant along the shift, on the same prepared node rows: no new nodes.
        ``shift`` (N, 3) in M; meant for small shifts (a Jacobian's perturbation).

        The stencil sums are one sparse matrix (points x prepared nodes, order^3 weights a row)
        times the store's rows: each row is read where it lies, with no gathered copy of the
        stencils' rows (which would be order^3 times the output).

        ``prepare=False`` (points evaluated once, e.g. the finder's checks between the nodes):
        points whose stencils reach nodes not yet prepared are interpolated straight from the
        patch arrays (:mod:`.direct_stencils`, same values to round-off) where the data allow it,
        and no node is prepared for them."""
        points = np.asarray(points, dtype=float).reshape(-1, 3)
        n = points.shape[0]
        nv = len(self.differentiated) * 4 + len(self.plain)
        values = np.full((n, nv), np.nan)
        source = np.full(n, -1, dtype=int)
        pending = []  # (store, point indices, per-axis weights, local coordinates, slots or None, corners or None)
        lower = np.zeros(n, dtype=bool)  # points handed to the next lower order
        for store, sel, flat, weights, w, s, corners in self.stencils(points):
            if not prepare and store.direct_capable:
                direct = direct_where_unprepared(store, flat, corners, w)
                if direct is not None:
                    done, direct_values_ = direct
                    values[sel[done]] = direct_values_
                    source[sel[done]] = store.patch_index
                    if shift is not None:
                        pending.append((store, sel[done], w[done], s[done], None, corners[done]))
                    keep = ~done
                    sel, flat, weights, w, s, corners = sel[keep], flat[keep], weights[keep], w[keep], s[keep], corners[keep]
                    if not sel.size:
                        continue
            slots = store.slots(flat, corners)
            flags = np.take(store.flags, slots) if store.any_flagged else None
            if flags is not None and flags.any():
                excised = (flags & NodeStore.EXCISED).any(axis=1)
                if self.next_lower is not None and excised.any() and not (flags[~excised] != 0).any():
                    lower[sel[excised]] = True
                    keep = ~excised
                    sel, weights, slots, w, s = sel[keep], weights[keep], slots[keep], w[keep], s[keep]
                else:
                    self._raise_bad(store, flags, flat, points[sel])
            values[sel] = _stencil_sums(store, weights, slots)
            if shift is not None and sel.size:
                pending.append((store, sel, w, s, slots, None))
            source[sel] = store.patch_index
        if self.next_lower is not None:
            lower |= source < 0  # narrower stencils may fit where these do not
        geometry = self._to_physical(values, source)
        sub = sub_moved = None
        if lower.any():
            idx = np.nonzero(lower)[0]
            sub, sub_moved = self.next_lower.evaluate(points[idx], None if shift is None else shift[idx], prepare=prepare)
            geometry = _merged(geometry, idx, sub)
        if shift is None:
            return geometry, None

        def moved() -> PointGeometry:
            # Made on demand: a rejected trial step never needs it. The store's rows never change
            # once made (growing it moves them, keeping their slots), so the slots still hold.
            dvalues = np.full((n, nv), np.nan)
            for store, sel, w, s, slots, direct_corners in pending:
                ds = shift[sel] / store.spacing  # shift in node units
                dw = lagrange_weight_derivatives(s, self.order) * ds[:, :, None]
                if direct_corners is not None:  # evaluated from the patch arrays: their variation too
                    dvalues[sel] = direct_values(store, direct_corners, w, dw)
                    continue
                # d/ds of wx wy wz along the shift, factored: (dwx wy + wx dwy) wz + (wx wy) dwz.
                shift_weights = _tensor_product_variation(w, dw)
                dvalues[sel] = _stencil_sums(store, shift_weights, slots)
            shifted = self._to_physical(values + dvalues, source)
            return shifted if sub is None else _merged(shifted, idx, sub_moved())

        return geometry, moved

    def _raise_bad(self, store: NodeStore, flags: np.ndarray, flat: np.ndarray, pts: np.ndarray) -> None:
        excised = (flags & NodeStore.EXCISED).any(axis=1)
        if excised.any():
            x = pts[excised][0]
            raise ExcisedDataError(
                f"{int(excised.sum())} point(s) need data inside an excised region of patches[{store.patch_index}] "
                f"(level {store.level}), e.g. ({x[0]:.6g}, {x[1]:.6g}, {x[2]:.6g}): the interpolation stencil "
                f"({self.order} nodes per axis) or the derivatives' difference stencils reach excised nodes"
            )
        m, k = np.argwhere(flags & NodeStore.NON_FINITE)[0]
        x = pts[m]
        field = store.non_finite_field(int(flat[m, k]))
        if not field:
            raise DegenerateMetricError(
                f"the spatial metric gamma_ij on patches[{store.patch_index}] (level {store.level}) is not positive "
                f"definite (det gamma <= 0, e.g. all zero or negative definite) at nodes needed for the surface "
                f"point ({x[0]:.6g}, {x[1]:.6g}, {x[2]:.6g}); expected a positive definite metric"
            )
        raise SliceError(
            f"field {field!r} on patches[{store.patch_index}] (level {store.level}): "
            f"non-finite values at nodes needed for the surface point ({x[0]:.6g}, {x[1]:.6g}, {x[2]:.6g}); "
            f"expected finite numbers"
        )

    def _to_physical(self, values: np.ndarray, source: np.ndarray) -> PointGeometry:
        nd = len(self.differentiated)
        n = values.shape[0]
        base = values[:, :nd]
        deriv = values[:, nd : 4 * nd].reshape(n, nd, 3)  # [n, field, k]
        plain = values[:, 4 * nd :]
        covered = source >= 0
        factor, dfactor = base[:, 0], deriv[:, 0, :]
        if self.variable_set is VariableSet.CONFORMAL_CHI:
            chi, dchi = factor, dfactor
        elif self.variable_set in (VariableSet.CONFORMAL_W, VariableSet.ADM):  # ADM: W made at the nodes
            chi, dchi = factor**2, 2.0 * factor[:, None] * dfactor
        else:  # phi: chi = exp(-4 phi)
            chi = np.exp(-4.0 * factor)
            dchi = -4.0 * chi[:, None] * dfactor
        # One gather per tensor (the symmetric components into (3, 3), derivative index first).
        gamma_tilde, dgamma_tilde, A_tilde = (np.take(values, index, axis=1) for index in _tensor_columns(nd))
        with np.errstate(divide="ignore", invalid="ignore"):
            gamma, dgamma, K = physical_from_conformal(chi, dchi, gamma_tilde, dgamma_tilde, A_tilde, plain[:, 6])
        return PointGeometry(gamma, dgamma, K, covered, source)


@functools.lru_cache(maxsize=4)
def _tensor_columns(nd: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Row columns of gamma_tilde_ij (3, 3), d_k gamma_tilde_ij (3, 3, 3) and A_tilde_ij (3, 3)
    in the node rows' layout (``nd`` differentiated fields, the conformal factor first, then
    the six components xx, xy, xz, yy, yz, zz; derivatives field-major; the plain fields)."""
    component = np.array([[0, 1, 2], [1, 3, 4], [2, 4, 5]])
    gamma = 1 + component
    dgamma = nd + 3 * (1 + component)[None, :, :] + np.arange(3)[:, None, None]
    A = 4 * nd + component
    for index in (gamma, dgamma, A):
        index.setflags(write=False)
    return gamma, dgamma, A


def _tensor_product(wx: np.ndarray, wy: np.ndarray, wz: np.ndarray) -> np.ndarray:
    """(m, p^3) products wx_a wy_b wz_c, x slowest, of per-axis weights (m, p) each: two
    outer products by einsum, written once in the final layout (no transposing copy, half the
    memory traffic of a points-innermost cube; same products)."""
    m, p = wx.shape
    xy = np.einsum("ma,mb->mab", wx, wy).reshape(m, p * p)
    return np.einsum("mq,mc->mqc", xy, wz).reshape(m, p**3)


def _tensor_product_variation(w: np.ndarray, dw: np.ndarray) -> np.ndarray:
    """(m, p^3) first variation of the products wx wy wz (:func:`_tensor_product`) when the
    per-axis weights w (m, 3, p) vary by dw (m, 3, p), factored as (dwx wy + wx dwy) wz +
    (wx wy) dwz; made like :func:`_tensor_product`."""
    m, _, p = w.shape
    xy = np.einsum("ma,mb->mab", w[:, 0], w[:, 1]).reshape(m, p * p)
    dxy = np.einsum("ma,mb->mab", dw[:, 0], w[:, 1])
    dxy += np.einsum("ma,mb->mab", w[:, 0], dw[:, 1])
    cube = np.einsum("mq,mc->mqc", dxy.reshape(m, p * p), w[:, 2])
    cube += np.einsum("mq,mc->mqc", xy, dw[:, 2])
    return cube.reshape(m, p**3)


def _stencil_sums(store: NodeStore, weights: np.ndarray, slots: np.ndarray) -> np.ndarray:
    """(m, values) sum over each stencil of weight times node row: a sparse (m x rows) matrix,
    one row of order^3 weights per point, times the store's rows in place."""
    m, k = weights.shape
    indptr = np.arange(0, m * k + 1, k, dtype=np.int64 if m * k >= 2**31 else np.int32)
    rows = store.values[: store.count]
    matrix = sparse.csr_array((weights.reshape(-1), slots.reshape(-1), indptr), shape=(m, rows.shape[0]))
    return matrix @ rows


def _merged(geometry: PointGeometry, idx: np.ndarray, part: PointGeometry) -> PointGeometry:
    """``geometry`` with the points ``idx`` replaced by ``part``."""
    arrays = {}
    for name in ("gamma", "dgamma", "K", "covered", "source_patch"):
        whole = getattr(geometry, name).copy()
        whole[idx] = getattr(part, name)
        arrays[name] = whole
    return PointGeometry(**arrays)


def grid_geometry(slice_: Slice, lower=None, upper=None, *, order: int = DEFAULT_ORDER) -> GridGeometry:
    """Prepare interpolation of the slice's geometry (nothing is computed until points come).

    Args:
        slice_: the slice.
        lower, upper: (3,) corners of the region surfaces are expected in, units of M (default:
            the slice's bounds); recorded for :meth:`GridGeometry.contains`, not a limit.
        order: interpolation nodes per axis (even, one of :data:`SUPPORTED_ORDERS`).
    """
    if order not in SUPPORTED_ORDERS:
        raise ValueError(f"order: expected one of {SUPPORTED_ORDERS}, got {order}")
    lo_default, hi_default = slice_.bounds()
    lower = np.asarray(lo_default if lower is None else lower, dtype=float).reshape(3)
    upper = np.asarray(hi_default if upper is None else upper, dtype=float).reshape(3)
    if np.any(upper <= lower):
        raise ValueError(f"region: upper {upper.tolist()} must exceed lower {lower.tolist()} on every axis")
    differentiated, plain = field_layout(slice_.variable_set)
    blocks = tuple(NodeStore.for_patch(slice_, index, order) for index in slice_.patch_order())
    # Usable box of every patch (where a full stencil fits), for "nearest patch" messages.
    reach = order // 2 + order // 2
    boxes = tuple(
        (p.origin + reach * p.spacing, p.upper - reach * p.spacing, i) for i, p in enumerate(slice_.patches)
    )
    # Lazily prepared like this one: costs nothing until a point needs it.
    next_lower = grid_geometry(slice_, lower, upper, order=order - 2) if order > 4 else None
    return GridGeometry(slice_.variable_set, order, lower, upper, blocks, boxes, differentiated, plain, slice_,
                        next_lower)


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
