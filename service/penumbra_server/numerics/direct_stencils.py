"""Interpolated fields and centred differences at points, straight from the patch arrays.

The same numbers as the node rows of :mod:`.node_store` followed by the stencil sums of
:mod:`.interpolation`, to round-off, without preparing (and keeping) a row for every node of
every stencil. Interpolating a centred difference is linear in the raw values:

    sum_i w_i sum_k c_k (f[i + k] - f[i - k]) / dx = sum_t D_t f[t],   D = w C / dx,

with C the (order, order + 2 g) matrix of the difference weights (g = order / 2). So each field
is read once per point in three boxes (the interpolation cube widened by g along x, y or z:
runs of neighbouring memory, as the stencil fill reads them) and contracted axis by axis with
the Lagrange weights, and along the widened axis with D.

Worth it for points evaluated once or twice (the finder's check nodes) whose stencils share few
nodes (fine grids): a point read directly costs about as much as 60 to 100 nodes prepared, a
stencil has order^3 of them. Newton's iterates keep the prepared rows: they are evaluated several
times, and the sparse product on prepared rows is much cheaper than a direct contraction.
Conformal variable sets only (ADM data are decomposed at the nodes, a nonlinear map), and only
where no excision is declared; the caller keeps the node path for everything else.

Shapes: m points, p = order, L = p + 2 g; values per point in the node rows' layout (the 7
differentiated fields, their x, y, z derivatives field-major, the 7 plain fields).
"""

from __future__ import annotations

import functools

import numpy as np

from .node_store import NodeStore, centred_difference_weights
from .stencil_rows import boxes

__all__ = ["direct_values", "direct_where_unprepared"]

#: Points per chunk: bounds a box read (chunk x L p^2 values) to about 1 MiB at order 6.
_CHUNK = 256


@functools.lru_cache(maxsize=8)
def _difference_matrix(order: int) -> np.ndarray:
    """(p, L) C with (w C)_t the weight of box node t (offsets -g..p-1+g about the stencil
    corner) in the interpolated centred difference (before dividing by the spacing)."""
    g = order // 2
    c = centred_difference_weights(order)[g + 1:]
    C = np.zeros((order, order + 2 * g))
    for i in range(order):
        for k in range(1, g + 1):
            C[i, i + g + k] += c[k - 1]
            C[i, i + g - k] -= c[k - 1]
    C.setflags(write=False)
    return C


def _last(a: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Contract the last axis of a (m, ..., n) with w (m, n), per point (batched products)."""
    m = a.shape[0]
    return (a.reshape(m, -1, a.shape[-1]) @ w[:, :, None]).reshape(a.shape[:-1])


def _first(a: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Contract axis 1 of a (m, n, ...) with w (m, n), per point."""
    m, n = a.shape[:2]
    return (w[:, None, :] @ a.reshape(m, n, -1)).reshape((m,) + a.shape[2:])


def _varied(contract, a, da, w, dw):
    """(contract(a, w), its first variation) with a varied by da and w by dw (either None)."""
    value = contract(a, w)
    variation = None if da is None else contract(da, w)
    if dw is not None:
        extra = contract(a, dw)
        variation = extra if variation is None else variation + extra
    return value, variation


def direct_values(store: NodeStore, corners: np.ndarray, w: np.ndarray, dw: np.ndarray | None = None) -> np.ndarray:
    """(m, 35) interpolated row values at the points whose stencils start at ``corners`` (m, 3)
    with per-axis Lagrange weights ``w`` (m, 3, p). With ``dw`` (m, 3, p), the weights' first
    variation (e.g. along a shift), returns instead the values' first variation (m, 35): the
    derivative of the same interpolant along the shift."""
    p, g = store.order, store.reach
    out = np.empty((corners.shape[0], store.n_values))
    for start in range(0, corners.shape[0], _CHUNK):
        part = slice(start, start + _CHUNK)
        out[part] = _chunk_values(store, corners[part], w[part], None if dw is None else dw[part], p, g)
    return out


def _chunk_values(store, corners, w, dw, p, g):
    m = corners.shape[0]
    L = p + 2 * g
    C = _difference_matrix(p)
    wx, wy, wz = w[:, 0], w[:, 1], w[:, 2]
    D = [w[:, a] @ C / store.spacing[a] for a in range(3)]  # (m, L) each
    if dw is None:
        dwx = dwy = dwz = None
        dD = [None] * 3
    else:
        dwx, dwy, dwz = dw[:, 0], dw[:, 1], dw[:, 2]
        dD = [dw[:, a] @ C / store.spacing[a] for a in range(3)]
    centre = slice(g, g + p)
    differentiated = store._raw_differentiated
    nd = len(differentiated)
    out = np.empty((m, store.n_values))

    def dot(pair, weights, dweights):
        return _varied(lambda a, v: np.einsum("ma,ma->m", a, v), pair[0], pair[1], weights, dweights)

    def pick(result):
        return result[0] if dw is None else result[1]

    # Boxes are read in runs of neighbouring memory (:func:`.stencil_rows.boxes`).
    lo = [corners - np.array(offset) for offset in ((g, 0, 0), (0, g, 0), (0, 0, g))]
    for f, name in enumerate(differentiated):
        flat, strides = store._raw[name]
        # x box (m, L, p, p): z, then y; gives the field and its x difference.
        box = boxes(flat, strides, lo[0], (L, p, p)).astype(float, copy=False)
        xzy = _varied(_last, *_varied(_last, box, None, wz, dwz), wy, dwy)
        centre_pair = (xzy[0][:, centre], None if xzy[1] is None else xzy[1][:, centre])
        out[:, f] = pick(dot(centre_pair, wx, dwx))
        out[:, nd + 3 * f] = pick(dot(xzy, D[0], dD[0]))
        # y box (m, p, L, p): z, then x.
        box = boxes(flat, strides, lo[1], (p, L, p)).astype(float, copy=False)
        yzx = _varied(_first, *_varied(_last, box, None, wz, dwz), wx, dwx)
        out[:, nd + 3 * f + 1] = pick(dot(yzx, D[1], dD[1]))
        # z box (m, p, p, L): x, then y.
        box = boxes(flat, strides, lo[2], (p, p, L)).astype(float, copy=False)
        zxy = _varied(_first, *_varied(_first, box, None, wx, dwx), wy, dwy)
        out[:, nd + 3 * f + 2] = pick(dot(zxy, D[2], dD[2]))
    for f, name in enumerate(store._raw_plain):
        box = boxes(*store._raw[name], corners, (p, p, p)).astype(float, copy=False)
        pzy = _varied(_last, *_varied(_last, box, None, wz, dwz), wy, dwy)
        out[:, 4 * nd + f] = pick(dot(pzy, wx, dwx))
    return out


#: Read single-use points' stencils from the patch arrays when at least this share of their nodes
#: is missing (distinct missing nodes over stencils x order^3). Measured (order 6): a point read
#: directly costs about 60 to 100 microseconds, a node prepared about 1, so direct reading wins
#: once the stencils share their nodes less than about 2.5 times.
_DIRECT_SHARE = 0.4


def direct_where_unprepared(store: NodeStore, flat: np.ndarray, corners: np.ndarray, w: np.ndarray):
    """(mask of the points evaluated, their values) for the points whose stencils reach nodes
    not yet prepared, straight from the patch arrays; None when every node is prepared or the
    stencils overlap so much that preparing their nodes is cheaper. Points
    whose direct values are not finite are left to the node path (which flags and reports
    them)."""
    unprepared, share = store.unprepared_stencils(flat)
    if share < _DIRECT_SHARE:
        return None  # none missing, or dense stencils: preparing their shared nodes is cheaper
    picked = np.nonzero(unprepared)[0]
    # Neighbouring stencils read neighbouring memory: visit them in the patch's memory order.
    picked = picked[np.argsort(flat[picked, 0], kind="stable")]
    found = direct_values(store, corners[picked], w[picked])
    finite = np.isfinite(found).all(axis=1)
    done = np.zeros(flat.shape[0], dtype=bool)
    done[picked[finite]] = True
    out = np.empty((flat.shape[0], found.shape[1]))
    out[picked] = found
    return done, out[done]
