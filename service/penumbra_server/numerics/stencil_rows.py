"""Node rows (fields and centred differences) of whole interpolation stencils, read from the
patch arrays as runs of neighbouring memory.

Used by :class:`~.node_store.NodeStore` where stencils share few nodes (fine grids, a surface that
moved): there the cost of preparing a stencil is reading its data from memory, so the reads
are made as few and as long as the data allow. Each field is read in whole memory rows (runs
along its fastest axis, p or p + 2 g values long) by one fancy index over a row view of the
array, instead of value by value: three boxes per differentiated field (the stencil's cube
widened by g = p / 2 along each axis) and the cube itself for the plain fields. Each box is
laid out with its widened axis first, so a centred difference is a few whole-array operations
on contiguous slabs.

The arithmetic of a difference is that of the node-by-node fill (:meth:`NodeStore._fill_chunk`),
term by term (c_1 (f[+1] - f[-1]) + c_2 (...) + ..., then divided by the spacing), so a node's
row is the same floating-point numbers whichever path made it.

Shapes: m stencils of p^3 nodes (x slowest, the layout of :meth:`GridGeometry.stencils`);
rows (m, p^3, 4 n_d + n_plain): the n_d differentiated fields, their x, y, z derivatives
field-major, the plain fields.
"""

from __future__ import annotations

import numpy as np

__all__ = ["memory_layout", "stencil_rows", "boxes"]


def memory_layout(flat: np.ndarray, strides: np.ndarray, shape: tuple[int, int, int]) -> tuple[np.ndarray, tuple[int, int, int]]:
    """(C-contiguous 3-D view of a field's flat C- or F-order data, physical axis of each of its
    axes). ``flat`` and ``strides`` (elements per physical axis) as kept by the node store: an
    F-order field is viewed transposed, so its fastest axis (x) comes last."""
    if strides[2] == 1:
        return flat.reshape(shape), (0, 1, 2)
    return flat.reshape(shape[::-1]), (2, 1, 0)


def _row_view(flat: np.ndarray, length: int) -> np.ndarray:
    """1-D view whose item n is the run flat[n: n + length] (one opaque item, overlapping its
    neighbours): fancy indexing it copies whole runs instead of single values."""
    return np.ndarray(shape=(flat.size - length + 1,), dtype=np.dtype(("V", flat.itemsize * length)),
                      buffer=flat, strides=(flat.itemsize,))


def boxes(flat: np.ndarray, strides: np.ndarray, corners: np.ndarray, shape: tuple[int, int, int]) -> np.ndarray:
    """(m, *shape) values of the boxes of ``shape`` (nodes per physical axis) whose node [0, 0, 0]
    is ``corners`` (m, 3), read in runs along the field's fastest axis. ``flat``, ``strides``:
    the field's flat C- or F-order data and element strides per physical axis; every box must
    lie inside the array. A view of the copied runs with the axes in physical order."""
    fast = int(np.argmin(strides))
    a, b = (axis for axis in range(3) if axis != fast)
    starts = ((corners @ strides)[:, None, None] + (np.arange(shape[a]) * strides[a])[None, :, None]
              + (np.arange(shape[b]) * strides[b])[None, None, :])
    runs = _row_view(flat, shape[fast])[starts].view(flat.dtype).reshape(corners.shape[0], shape[a], shape[b], shape[fast])
    return np.moveaxis(runs, 3, 1 + fast)


def _difference(box: np.ndarray, c: np.ndarray, p: int, g: int, spacing: float) -> np.ndarray:
    """Centred difference along axis 1 of ``box`` (fields, p + 2 g, ...) at its p middle planes,
    divided by ``spacing``: the node fill's arithmetic term by term (in place, in two buffers)."""
    derivative = np.subtract(box[:, g + 1: g + 1 + p], box[:, g - 1: g - 1 + p])
    derivative *= c[0]
    term = np.empty_like(derivative)
    for k in range(2, g + 1):
        np.subtract(box[:, g + k: g + k + p], box[:, g - k: g - k + p], out=term)
        term *= c[k - 1]
        derivative += term
    derivative /= spacing
    return derivative


def _groups(fields) -> list[tuple[tuple[int, int, int], list[int]]]:
    """(layout, indices of the fields with it): fields of one layout are processed stacked."""
    groups: dict = {}
    for index, (array, axes) in enumerate(fields):
        groups.setdefault((axes, array.shape), []).append(index)
    return [(key[0], indices) for key, indices in groups.items()]


def _columns(indices: list[int], first: int = 0, step: int = 1, offset: int = 0):
    """Row columns first + step * index + offset of the fields ``indices``: a slice when they
    are a run (the usual case: one layout for all fields), which assigns faster than an index
    array."""
    if indices == list(range(indices[0], indices[-1] + 1)):
        start = first + step * indices[0] + offset
        return slice(start, start + step * (len(indices) - 1) + 1, step)
    return first + step * np.array(indices) + offset


def _runs(fields, indices, starts: np.ndarray, length: int) -> np.ndarray:
    """(fields, *starts.shape, length) runs of ``length`` values from each field at ``starts``
    (flat indices into the fields' C-contiguous arrays), as float."""
    parts = []
    for index in indices:
        flat = fields[index][0].reshape(-1)
        parts.append(_row_view(flat, length)[starts].view(flat.dtype).reshape(starts.shape + (length,)))
    return np.stack(parts).astype(float, copy=False)


def stencil_rows(differentiated, plain, corners: np.ndarray, order: int, spacing: np.ndarray,
                 difference_weights: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """(m, p^3, 4 n_d + n_plain) rows of the nodes of the stencils starting at ``corners``.

    Args:
        differentiated, plain: sequences of (C-contiguous 3-D array, physical axis of each of
            its axes) from :func:`memory_layout`, the fields that get derivatives and those that
            do not.
        corners: (m, 3) node indices of each stencil's node [0, 0, 0]; every box must lie
            inside the arrays (the caller checks the reach).
        order: p, nodes per stencil axis (even); g = p / 2.
        spacing: (3,) grid spacing in M per physical axis.
        difference_weights: the centred first-derivative weights of offsets +1..+g.
        out: optional (m, p^3, values) array to fill.
    """
    p, g = order, order // 2
    L = p + 2 * g
    m = corners.shape[0]
    nd = len(differentiated)
    n_values = 4 * nd + len(plain)
    if out is None:
        out = np.empty((m, p**3, n_values))
    cube = out.reshape(m, p, p, p, n_values)
    near, wide = np.arange(p), np.arange(L) - g
    c = difference_weights
    with np.errstate(invalid="ignore", over="ignore"):
        for axes, indices in _groups(differentiated):
            shape = differentiated[indices[0]][0].shape
            s0, s1 = shape[1] * shape[2], shape[2]
            base = corners[:, list(axes)] @ np.array([s0, s1, 1])  # corner in the arrays' own axes
            # The output cube seen in the arrays' axes (F-order fields are viewed transposed);
            # the fields last, as the row holds them.
            dest = cube if axes == (0, 1, 2) else cube.transpose(0, 3, 2, 1, 4)
            columns = _columns(indices)
            # Box widened along the arrays' first axis, that axis first: (fields, L, m, p, p).
            box = _runs(differentiated, indices, base[None, :, None] + (wide * s0)[:, None, None] + (near * s1)[None, None, :], p)
            dest[..., columns] = box[:, g: g + p].transpose(2, 1, 3, 4, 0)
            derivative = _difference(box, c, p, g, spacing[axes[0]])
            dest[..., _columns(indices, nd, 3, axes[0])] = derivative.transpose(2, 1, 3, 4, 0)
            # Widened along the second axis, that axis first: (fields, L, m, p [first axis], p).
            box = _runs(differentiated, indices, base[None, :, None] + (wide * s1)[:, None, None] + (near * s0)[None, None, :], p)
            derivative = _difference(box, c, p, g, spacing[axes[1]])
            dest[..., _columns(indices, nd, 3, axes[1])] = derivative.transpose(2, 3, 1, 4, 0)
            # Widened along the fastest axis: runs of L, turned to put that axis first.
            starts = base[:, None, None] + (near * s0)[None, :, None] + (near * s1)[None, None, :] - g
            box = _runs(differentiated, indices, starts, L)  # (fields, m, p, p, L)
            box = np.ascontiguousarray(np.moveaxis(box, 4, 1))  # (fields, L, m, p, p)
            derivative = _difference(box, c, p, g, spacing[axes[2]])
            dest[..., _columns(indices, nd, 3, axes[2])] = derivative.transpose(2, 3, 4, 1, 0)
        for axes, indices in _groups(plain):
            shape = plain[indices[0]][0].shape
            s0, s1 = shape[1] * shape[2], shape[2]
            base = corners[:, list(axes)] @ np.array([s0, s1, 1])
            dest = cube if axes == (0, 1, 2) else cube.transpose(0, 3, 2, 1, 4)
            starts = base[:, None, None] + (near * s0)[None, :, None] + (near * s1)[None, None, :]
            dest[..., _columns(indices, 4 * nd)] = np.moveaxis(_runs(plain, indices, starts, p), 0, 4)
    return out
