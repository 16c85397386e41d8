"""Field values and centred differences at the nodes of one patch, computed on first touch.

A :class:`NodeStore` maps a patch node (flat index, C order over the patch shape) to a row of a
contiguous component-last array: the differentiated fields, their x, y, z derivatives
(field-major) and the plain fields. A node's row is computed the first time an interpolation
stencil reaches it, from the raw patch arrays at the node and its difference stencil (a cross of
half-width order/2), or, where stencils share few nodes, for whole stencils at once from runs of
neighbouring memory (:mod:`.stencil_rows`, the same numbers); the patch arrays are read in place,
never copied.

The store is a cache of a pure function of the slice (the same node always gets the same row);
it lives as long as the :class:`~.interpolation.GridGeometry` that owns it, i.e. one find or
measurement.

ADM data are decomposed at the nodes (see :mod:`.interpolation`): rows hold W = psi^-2,
gamma_tilde_ij, their derivatives, A_tilde_ij and trace K; the conformal sets keep their own
conformal factor (chi, W or phi).
"""

from __future__ import annotations

import numpy as np

from .excision import EXCISION_MASK_FIELD
from .slices import Slice, VariableSet, symmetric_field_names
from .stencil_rows import memory_layout, stencil_rows

__all__ = ["NodeStore", "centred_difference_weights", "field_layout"]

# Centred first-derivative weights for offsets -g..g (g = order / 2).
_CENTRED = {
    2: np.array([-1 / 2, 0.0, 1 / 2]),
    4: np.array([1 / 12, -2 / 3, 0.0, 2 / 3, -1 / 12]),
    6: np.array([-1 / 60, 3 / 20, -3 / 4, 0.0, 3 / 4, -3 / 20, 1 / 60]),
    8: np.array([1 / 280, -4 / 105, 1 / 5, -4 / 5, 0.0, 4 / 5, -1 / 5, 4 / 105, -1 / 280]),
}

_ADM_DIFFERENTIATED = ("W",) + symmetric_field_names("gamma_tilde")
_PLAIN = symmetric_field_names("A_tilde") + ("trace_K",)


def centred_difference_weights(order: int) -> np.ndarray:
    """Weights of the centred first derivative of the given (even) order, offsets -g..g."""
    if order not in _CENTRED:
        raise ValueError(f"order: expected one of {tuple(_CENTRED)}, got {order}")
    return _CENTRED[order]


def field_layout(variable_set: VariableSet) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """(fields that get derivatives, fields that do not), in row order. For ADM these are the
    conformal fields made at the nodes."""
    if variable_set is VariableSet.ADM:
        return _ADM_DIFFERENTIATED, _PLAIN
    return (variable_set.conformal_factor_name,) + symmetric_field_names("gamma_tilde"), _PLAIN


def _flat_view(arr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(1-D view of a C- or F-contiguous array, element strides per axis); copies only a
    non-contiguous array."""
    if not (arr.flags.c_contiguous or arr.flags.f_contiguous):
        arr = np.ascontiguousarray(arr)
    order = "C" if arr.flags.c_contiguous else "F"
    return arr.reshape(-1, order=order), np.asarray(arr.strides) // arr.itemsize


def _distinct(values: np.ndarray, scratch: np.ndarray) -> np.ndarray:
    """The distinct entries of ``values`` (1-D node indices), without sorting: ``scratch`` (an
    int32 array over all nodes, entries for ``values`` overwritten) marks one representative of
    each. O(n) where np.unique sorts or hashes."""
    order = np.arange(values.size, dtype=np.int32)
    scratch[values] = order  # repeated indices: one of the writes wins
    return values[scratch[values] == order]


def _adm_to_conformal(gamma: np.ndarray, K: np.ndarray | None):
    """gamma (6, ...) and K (6, ...) components -> W = psi^-2 = det^(-1/6), gamma_tilde (6, ...)
    = W^2 gamma, A_tilde (6, ...) = W^2 (K - gamma K / 3), trace K. K may be None (only W and
    gamma_tilde wanted)."""
    xx, xy, xz, yy, yz, zz = gamma
    cof = np.array([yy * zz - yz * yz, xz * yz - xy * zz, xy * yz - xz * yy,
                    xx * zz - xz * xz, xy * xz - xx * yz, xx * yy - xy * xy])  # adjugate, same order
    det = xx * cof[0] + xy * cof[1] + xz * cof[2]
    with np.errstate(divide="ignore", invalid="ignore"):
        chi = np.cbrt(1.0 / det)
        W = np.sqrt(chi)
        gamma_tilde = gamma * chi
        if K is None:
            return W, gamma_tilde, None, None
        inv = cof / det
        mult = np.array([1.0, 2.0, 2.0, 1.0, 2.0, 1.0]).reshape((6,) + (1,) * (K.ndim - 1))
        trace_K = np.sum(mult * inv * K, axis=0)
        A_tilde = chi * (K - gamma * (trace_K / 3.0))
    return W, gamma_tilde, A_tilde, trace_K


class NodeStore:
    """Rows of values at the nodes of one patch, filled on first touch (see the module doc)."""

    EXCISED = np.uint8(1)  # the node or its difference stencil reads excised data
    NON_FINITE = np.uint8(2)  # a value of the row is NaN or infinite

    def __init__(self, slice_: Slice, index: int, order: int):
        patch = slice_.patches[index]
        self.patch_index = index
        self.level = patch.level
        self.origin = patch.origin
        self.spacing = patch.spacing
        self.shape = tuple(int(n) for n in patch.shape)
        self.shape_array = np.asarray(self.shape)
        self.order = order
        self.reach = order // 2  # nodes within this distance of a face have no centred difference
        self.variable_set = slice_.variable_set
        self._spheres = slice_.excised_spheres
        self._mask = patch.fields.get(EXCISION_MASK_FIELD)
        vs = slice_.variable_set
        if vs is VariableSet.ADM:
            self._raw_differentiated = symmetric_field_names("gamma")
            self._raw_plain = symmetric_field_names("K")
        else:
            self._raw_differentiated = (vs.conformal_factor_name,) + symmetric_field_names("gamma_tilde")
            self._raw_plain = _PLAIN
        self._raw = {name: _flat_view(patch.fields[name]) for name in self._raw_differentiated + self._raw_plain}
        self._arrays = {name: patch.fields[name] for name in self._raw}  # as given, for box reads
        self._layouts: dict | None = None  # name -> memory_layout, for the stencil fill
        self.n_differentiated = 7
        self.n_values = 4 * 7 + 7
        self._slot_array: np.ndarray | None = None  # flat node -> row (-1: not made), on first use
        # The differentiated fields themselves (conformal, for ADM: decomposed once per node, not
        # once per stencil that reads it), on first touch by a difference stencil.
        self._base_slot_array: np.ndarray | None = None  # as _slot, for the differentiated fields alone
        self._base = np.empty((0, 7))
        self._base_count = 0
        self.values = np.empty((0, self.n_values))
        self.flags = np.empty(0, dtype=np.uint8)
        self.count = 0
        self.any_flagged = False  # some row is excised or not finite (else the check is skipped)

    # Node maps over the whole patch (4 bytes a node), made when a point first reaches the patch:
    # a store no point reaches (a patch elsewhere, a lower order never needed) costs nothing.
    @property
    def _slot(self) -> np.ndarray:
        if self._slot_array is None:
            self._slot_array = np.full(int(np.prod(self.shape)), -1, dtype=np.int32)
        return self._slot_array

    @property
    def _base_slot(self) -> np.ndarray:
        if self._base_slot_array is None:
            self._base_slot_array = np.full(int(np.prod(self.shape)), -1, dtype=np.int32)
        return self._base_slot_array

    @property
    def direct_capable(self) -> bool:
        """Whether points may be interpolated straight from the raw arrays
        (:mod:`.direct_stencils`): conformal data, no excision declared."""
        return self.variable_set is not VariableSet.ADM and not self._spheres and self._mask is None

    @classmethod
    def for_patch(cls, slice_: Slice, index: int, order: int) -> "NodeStore":
        return cls(slice_, index, order)

    def slots(self, flat: np.ndarray, corners: np.ndarray | None = None) -> np.ndarray:
        """Rows of the nodes ``flat`` (any shape of flat C-order node indices), computing the
        missing ones first. The nodes must have a full difference stencil inside the patch.

        With ``corners`` (m, 3), ``flat`` (m, order^3) are interpolation stencils (cubes of
        order nodes a side from each corner, x slowest) and conformal data fill by whole
        stencils (:meth:`_fill_stencils`)."""
        slots = np.take(self._slot, flat)
        missing = slots < 0
        if missing.any():
            nodes = _distinct(flat[missing], self._slot)
            touched = missing.any(axis=1) if corners is not None else None
            if (corners is not None and self.variable_set is not VariableSet.ADM
                    and nodes.size >= self._STENCIL_FILL_SHARE * flat.shape[1] * np.count_nonzero(touched)):
                self._slot[nodes] = -1  # undo _distinct's scratch marks
                self._grow(nodes.size)
                # No node missing twice (fine grids): no stencil shares a missing node.
                self._fill_stencils(corners[touched], flat[touched], nodes.size == np.count_nonzero(missing))
            else:
                self._fill(nodes)
            slots = np.take(self._slot, flat)
        return slots

    def unprepared_stencils(self, flat: np.ndarray) -> tuple[np.ndarray, float]:
        """For interpolation stencils ``flat`` (m, order^3): which reach a node not yet prepared
        (m,) bool, and the distinct such nodes as a share of those stencils' nodes (1: no node
        shared between them, small: heavily overlapping stencils)."""
        missing = np.take(self._slot, flat) < 0
        touched = missing.any(axis=1)
        if not touched.any():
            return touched, 0.0
        nodes = _distinct(flat[missing], self._slot)
        self._slot[nodes] = -1  # undo _distinct's scratch marks
        return touched, nodes.size / (flat.shape[1] * np.count_nonzero(touched))

    #: Fill whole stencils when at least this share of the touched stencils' nodes is missing
    #: (sparse stencils: a fine grid, or a surface that moved); otherwise node by node. Measured:
    #: a stencil costs about as much as 80 to 100 nodes filled one by one.
    _STENCIL_FILL_SHARE = 0.4

    #: Stencils filled per chunk: bounds the temporaries (chunk x order^3 x values, about 2 MiB at
    #: order 6, and the boxes read) to what stays in cache between reading and storing.
    _STENCIL_CHUNK = 32

    def _fill_stencils(self, corners: np.ndarray, flat: np.ndarray, distinct: bool = False) -> None:
        """Fill the missing nodes of whole interpolation stencils (conformal data), reading each
        field in whole memory rows (:func:`.stencil_rows.stencil_rows`): several times fewer
        reads than gathering each node's difference cross, and the rows are the node fill's
        arithmetic on the same values, so a node's row never depends on which path made it.
        ``distinct``: the caller knows that no missing node is repeated in ``flat``."""
        if self._layouts is None:
            self._layouts = {name: memory_layout(*self._raw[name], self.shape) for name in self._raw}
        differentiated = [self._layouts[name] for name in self._raw_differentiated]
        plain = [self._layouts[name] for name in self._raw_plain]
        weights = centred_difference_weights(self.order)[self.reach + 1:]
        p3 = self.order**3
        for start in range(0, corners.shape[0], self._STENCIL_CHUNK):
            chunk_flat = flat[start: start + self._STENCIL_CHUNK].reshape(-1)
            chunk_corners = corners[start: start + self._STENCIL_CHUNK]
            missing = np.take(self._slot, chunk_flat) < 0
            if not missing.any():
                continue  # earlier stencils of this call made them all
            if missing.all() and (distinct or self._all_distinct(chunk_flat)):
                # Every node new, none shared (fine grids): the rows are made in the store itself.
                q = chunk_flat.size
                self._grow(q)
                rows = self.values[self.count: self.count + q]
                stencil_rows(differentiated, plain, chunk_corners, self.order, self.spacing, weights,
                             out=rows.reshape(-1, p3, self.n_values))
                self._append(chunk_flat, rows, written=True)
            else:
                rows = stencil_rows(differentiated, plain, chunk_corners, self.order, self.spacing, weights)
                self._store_new(chunk_flat, rows.reshape(-1, self.n_values))

    def _all_distinct(self, flat: np.ndarray) -> bool:
        """Whether the missing nodes ``flat`` (1-D) hold no repeats (their slots are scratch)."""
        order = np.arange(flat.size, dtype=np.int32)
        self._slot[flat] = order
        distinct = bool((self._slot[flat] == order).all())
        self._slot[flat] = -1
        return distinct

    def _store_new(self, flat: np.ndarray, rows: np.ndarray) -> None:
        """Keep the rows (len(flat), values) of the nodes in ``flat`` (one each, repeats allowed)
        not yet stored."""
        new = np.nonzero(self._slot[flat] < 0)[0]
        if new.size == 0:
            return
        # One representative of each repeated node (the scratch marks are overwritten in _append).
        order = np.arange(new.size, dtype=np.int32)
        self._slot[flat[new]] = order
        new = new[self._slot[flat[new]] == order]
        self._grow(new.size)
        self._append(flat[new], rows[new])

    def _append(self, nodes: np.ndarray, rows: np.ndarray, written: bool = False) -> None:
        """Record the rows (q, values) of the distinct new ``nodes`` as the next q rows of the
        store (``written``: they are already there)."""
        q = nodes.size
        # All finite (one sum) is the rule; the per-row check only when the sum is not finite.
        if np.isfinite(rows.sum()):
            flags = np.zeros(q, dtype=np.uint8)
        else:
            flags = np.where(np.isfinite(rows).all(axis=1), 0, self.NON_FINITE).astype(np.uint8)
        if self._spheres or self._mask is not None:
            excised = self._excised(np.stack(np.unravel_index(nodes, self.shape), axis=1), self._taps())
            flags[excised] = self.EXCISED
        if not written:
            self.values[self.count: self.count + q] = rows
        self.flags[self.count: self.count + q] = flags
        self.any_flagged |= bool(flags.any())
        self._slot[nodes] = np.arange(self.count, self.count + q, dtype=np.int32)
        self.count += q

    def _grow(self, extra: int) -> None:
        need = self.count + extra
        if need <= self.values.shape[0]:
            return
        capacity = max(need + need // 4, 4096)  # geometric: many small batches grow rarely
        if self.count == 0:
            # The first batch: resized in place from empty (nothing to keep; the arrays stay the
            # same objects, as a caller holding ``values`` from before the first fill expects).
            self.values.resize((capacity, self.n_values), refcheck=False)
            self.flags.resize(capacity, refcheck=False)
            return
        # Later batches: fresh arrays, the rows made so far copied (resizing a large populated
        # block in place measured 4 times slower: 22 to 43 MB, 28 against 7 ms). No view of the
        # store outlives a call (np.take copies; the sparse sums read ``values`` after the fill).
        values = np.empty((capacity, self.n_values))
        values[: self.count] = self.values[: self.count]
        flags = np.empty(capacity, dtype=np.uint8)
        flags[: self.count] = self.flags[: self.count]
        self.values, self.flags = values, flags

    def _offsets(self, nodes_ijk: np.ndarray, strides: np.ndarray, taps: np.ndarray) -> np.ndarray:
        """(n_taps, q) flat offsets into a raw array of the taps (n_taps, 3) about each node."""
        return (taps @ strides)[:, None] + (nodes_ijk @ strides)[None, :]

    def _taps(self) -> np.ndarray:
        """(1 + 6 g, 3) node offsets of the difference cross: the centre, then axis by axis
        -g..g without 0."""
        g = self.reach
        taps = [np.zeros(3, int)]
        for axis in range(3):
            for k in range(-g, g + 1):
                if k:
                    t = np.zeros(3, int)
                    t[axis] = k
                    taps.append(t)
        return np.array(taps)

    def _base_rows(self, flat_taps: np.ndarray) -> np.ndarray:
        """(n, 7) differentiated fields (chi or the conformal factor, gamma_tilde) at flat node
        indices, decomposing ADM data once per node."""
        slots = np.take(self._base_slot, flat_taps)
        missing = slots < 0
        if missing.any():
            new = np.sort(_distinct(flat_taps[missing], self._base_slot))
            ijk = np.stack(np.unravel_index(new, self.shape), axis=1)
            zero = np.zeros((1, 3), int)
            raw = np.empty((len(self._raw_differentiated), new.size))
            for f, name in enumerate(self._raw_differentiated):
                raw[f] = self._read(name, ijk, zero)[0]
            if self.variable_set is VariableSet.ADM:
                W, gamma_tilde, _, _ = _adm_to_conformal(raw, None)
                raw = np.concatenate([W[None], gamma_tilde])
            need = self._base_count + new.size
            if need > self._base.shape[0]:
                self._base.resize((max(need, 2 * self._base.shape[0], 8192), 7), refcheck=False)
            self._base[self._base_count: need] = raw.T
            self._base_slot[new] = np.arange(self._base_count, need, dtype=np.int32)
            self._base_count = need
            slots = np.take(self._base_slot, flat_taps)
        return np.take(self._base, slots, axis=0)

    def _read(self, name: str, nodes_ijk: np.ndarray, taps: np.ndarray) -> np.ndarray:
        flat, strides = self._raw[name]
        return np.take(flat, self._offsets(nodes_ijk, strides, taps)).astype(float, copy=False)

    #: Nodes filled per chunk: bounds the temporaries (taps x chunk x fields) to a few MiB.
    _CHUNK = 8192

    def _fill(self, flat_nodes: np.ndarray) -> None:
        self._grow(flat_nodes.size)
        flat_nodes = np.sort(flat_nodes)  # neighbouring nodes read neighbouring memory
        taps = self._taps()
        for start in range(0, flat_nodes.size, self._CHUNK):
            self._fill_chunk(flat_nodes[start: start + self._CHUNK], taps)

    def _fill_chunk(self, flat_nodes: np.ndarray, taps: np.ndarray) -> None:
        q = flat_nodes.size
        ijk = np.stack(np.unravel_index(flat_nodes, self.shape), axis=1)
        centre = taps[:1]
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            if self.variable_set is VariableSet.ADM:
                shape_strides = np.array([self.shape[1] * self.shape[2], self.shape[2], 1])
                flat_taps = self._offsets(ijk, shape_strides, taps)  # (taps, q) C-order node indices
                diff_fields = np.moveaxis(self._base_rows(flat_taps), -1, 0)  # (7, taps, q)
            else:  # conformal data: the stencils read the patch arrays directly
                diff_fields = np.array([self._read(n, ijk, taps) for n in self._raw_differentiated])
            plain = np.array([self._read(n, ijk, centre)[0] for n in self._raw_plain])  # (6 or 7, q)
            if self.variable_set is VariableSet.ADM:
                gamma = np.array([self._read(n, ijk, centre)[0] for n in self._raw_differentiated])
                _, _, A_tilde, trace_K = _adm_to_conformal(gamma, plain)
                plain = np.concatenate([A_tilde, trace_K[None]])
            rows = np.empty((q, self.n_values))
            rows[:, :7] = diff_fields[:, 0].T
            g = self.reach
            c = centred_difference_weights(self.order)[g + 1:]
            for axis in range(3):
                first = 1 + 2 * g * axis  # taps of this axis: offsets -g..-1, then 1..g
                derivative = 0.0
                for k in range(1, g + 1):  # the arithmetic of _fill_stencils, term by term
                    derivative = derivative + c[k - 1] * (diff_fields[:, first + g + k - 1] - diff_fields[:, first + g - k])
                rows[:, 7 + axis: 28: 3] = (derivative / self.spacing[axis]).T  # field-major, then x, y, z
            rows[:, 28:] = plain.T
        flags = np.where(np.isfinite(rows).all(axis=1), 0, self.NON_FINITE).astype(np.uint8)
        excised = self._excised(ijk, taps)
        if excised is not None:
            flags[excised] = self.EXCISED
        self.values[self.count: self.count + q] = rows
        self.flags[self.count: self.count + q] = flags
        self.any_flagged |= bool(flags.any())
        self._slot[flat_nodes] = np.arange(self.count, self.count + q, dtype=np.int32)
        self.count += q

    def _excised(self, ijk: np.ndarray, taps: np.ndarray) -> np.ndarray | None:
        """(q,) whether a node's difference cross reaches an excised node (None: none declared)."""
        if not self._spheres and self._mask is None:
            return None
        where = ijk[None, :, :] + taps[:, None, :]  # (taps, q, 3)
        hit = np.zeros(where.shape[:2], dtype=bool)
        if self._mask is not None:
            hit |= self._mask[where[..., 0], where[..., 1], where[..., 2]] != 0  # NaN counts as excised
        if self._spheres:
            x = self.origin + where * self.spacing
            for sphere in self._spheres:
                hit |= np.sum((x - np.asarray(sphere.centre)) ** 2, axis=-1) <= sphere.radius**2
        return hit.any(axis=0)

    def non_finite_field(self, flat_node: int) -> str:
        """Name of the first raw field holding NaN or infinity where the node's row reads ("" when
        every input is finite and only the decomposition is not: det(gamma) <= 0 there)."""
        ijk = np.array(np.unravel_index(flat_node, self.shape)).reshape(1, 3)
        taps = self._taps()
        for name in self._raw_differentiated:
            if not np.isfinite(self._read(name, ijk, taps)).all():
                return name
        for name in self._raw_plain:
            if not np.isfinite(self._read(name, ijk, taps[:1])).all():
                return name
        return ""  # finite inputs, non-finite result: the metric is degenerate (det <= 0)
