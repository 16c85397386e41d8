"""Assembling a slice from a SendSlice stream: header checks, chunk placement, final checks.

Every refusal is a :class:`ServiceError` whose code is the one the proto documents for it:
INVALID_ARGUMENT for a malformed header or chunk or a non-finite value, RESOURCE_EXHAUSTED for a
chunk or slice over the limits, DATA_LOSS for a stream that ended before every declared byte
arrived.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import grpc
import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..numerics.excision import EXCISION_MASK_FIELD, ExcisedSphere, excised_node_mask
from ..numerics.reflection import mirror_slice_through_z0
from ..numerics.slices import Patch, Slice, SliceError, VariableSet, optional_fields, required_fields
from ._spec import variable_set_from_wire
from .errors import ServiceError

__all__ = ["IngestLimits", "SliceAssembler", "mirror_through_z0"]

_DTYPES = {pb.PatchHeader.DTYPE_FLOAT64: np.dtype("<f8"), pb.PatchHeader.DTYPE_FLOAT32: np.dtype("<f4")}
_ORDERS = {pb.PatchHeader.MEMORY_ORDER_C: "C", pb.PatchHeader.MEMORY_ORDER_FORTRAN: "F"}
MAX_PATCHES = 4096


@dataclass(frozen=True)
class IngestLimits:
    """Size limits of one SendSlice stream (bytes)."""

    max_chunk_bytes: int = 4 * 1024 * 1024
    max_slice_bytes: int = 2 * 1024**3
    #: Patches one header may declare (ServerOptions.max_patches_per_header).
    max_patches_per_header: int = MAX_PATCHES
    #: Field names one patch may declare (ServerOptions.max_fields_per_patch).
    max_fields_per_patch: int = 64


@dataclass
class _FieldBuffer:
    buffer: np.ndarray  # uint8, the field's bytes
    received: int = 0


@dataclass
class _PatchPlan:
    origin: np.ndarray
    spacing: np.ndarray
    shape: tuple[int, int, int]
    level: int
    dtype: np.dtype
    memory_order: str
    field_bytes: int
    fields: dict[str, _FieldBuffer]


def _names(names, most: int = 5) -> str:
    """A few names for a message: each shortened, the rest counted (messages travel in a trailer)."""
    shown = [repr(n if len(n) <= 64 else n[:61] + "...") for n in list(names)[:most]]
    rest = len(names) - len(shown)
    return ", ".join(shown) + (f" and {rest} more" if rest > 0 else "")


def _vector(v: pb.Vector3, field: str) -> np.ndarray:
    arr = np.array([v.x, v.y, v.z], dtype=float)
    if not np.all(np.isfinite(arr)):
        raise ServiceError.invalid(f"{field}: expected three finite numbers, got {arr.tolist()}")
    return arr


class SliceAssembler:
    """Collects one slice: construct with the header, :meth:`add` every chunk, then :meth:`finish`.

    Args:
        header: the stream's first message.
        run_variable_set: the run's variable set; the header must match it.
        limits: size limits.
        allow_empty: accept a header without patches (a part of a slice sent in parts); then
            only :meth:`finish_patches` may be called.
        excised_spheres: the run's excised spheres: non-finite values are accepted inside them
            (and where a patch's ``excision_mask`` is nonzero), refused elsewhere.
    """

    def __init__(self, header: pb.SliceHeader, run_variable_set: VariableSet, limits: IngestLimits, *,
                 allow_empty: bool = False, excised_spheres: tuple[ExcisedSphere, ...] = ()) -> None:
        self.limits = limits
        self.excised_spheres = tuple(excised_spheres)
        self.run_id = header.run_id
        self.iteration = int(header.iteration)
        if not math.isfinite(header.time_m):
            raise ServiceError.invalid(f"header.time_m: expected a finite number, got {header.time_m}")
        self.time = float(header.time_m)
        self.variable_set = variable_set_from_wire(header.variable_set, "header.variable_set")
        if self.variable_set is not run_variable_set:
            raise ServiceError.invalid(
                f"header.variable_set: {self.variable_set.value} does not match the run's variable set "
                f"{run_variable_set.value}"
            )
        if not header.patches and not allow_empty:
            raise ServiceError.invalid("header.patches: expected at least one patch, got none")
        if len(header.patches) > limits.max_patches_per_header:
            raise ServiceError(
                grpc.StatusCode.RESOURCE_EXHAUSTED,
                f"header.patches: {len(header.patches)} patches is over the server's limit of "
                f"{limits.max_patches_per_header} patches per header (max_patches_per_header)",
                reason="TOO_MANY_PATCHES",
            )
        required = required_fields(self.variable_set)
        allowed = set(required) | set(optional_fields(self.variable_set)) | {EXCISION_MASK_FIELD}
        # Counts first, before any per-field work: every check below is linear in them.
        for index, ph in enumerate(header.patches):
            if len(ph.field_names) > limits.max_fields_per_patch:
                raise ServiceError(
                    grpc.StatusCode.RESOURCE_EXHAUSTED,
                    f"header.patches[{index}].field_names: {len(ph.field_names)} names is over the server's limit "
                    f"of {limits.max_fields_per_patch} fields per patch (max_fields_per_patch)",
                    reason="TOO_MANY_FIELDS",
                )
        declared_total = 0
        self._patches: list[_PatchPlan] = []
        for index, ph in enumerate(header.patches):
            where = f"header.patches[{index}]"
            shape = tuple(int(n) for n in ph.shape)
            if len(shape) != 3 or min(shape) < 2:
                raise ServiceError.invalid(f"{where}.shape: expected three node counts >= 2, got {list(shape)}")
            # Python ints: a product of huge node counts must not wrap around as int64 would.
            if math.prod(shape) > limits.max_slice_bytes:
                raise ServiceError.invalid(
                    f"{where}.shape: {list(shape)} declares {math.prod(shape)} nodes, more than the server's "
                    f"limit of {limits.max_slice_bytes} slice bytes could hold"
                )
            spacing = _vector(ph.spacing_m, f"{where}.spacing_m")
            if np.any(spacing <= 0):
                raise ServiceError.invalid(f"{where}.spacing_m: every component must be > 0, got {spacing.tolist()}")
            origin = _vector(ph.origin_m, f"{where}.origin_m")
            if ph.dtype not in _DTYPES:
                raise ServiceError.invalid(f"{where}.dtype: expected DTYPE_FLOAT64 or DTYPE_FLOAT32, got {ph.dtype}")
            if ph.memory_order not in _ORDERS:
                raise ServiceError.invalid(
                    f"{where}.memory_order: expected MEMORY_ORDER_C or MEMORY_ORDER_FORTRAN, got {ph.memory_order}"
                )
            names = list(ph.field_names)
            seen: set[str] = set()
            duplicates = sorted({n for n in names if n in seen or seen.add(n)})
            if duplicates:
                raise ServiceError.invalid(f"{where}.field_names: {_names(duplicates)} listed more than once")
            missing = [n for n in required if n not in seen]
            if missing:
                raise ServiceError.invalid(
                    f"{where}.field_names: missing {', '.join(missing)}, required by variable set "
                    f"{self.variable_set.value}"
                )
            unknown = [n for n in names if n not in allowed]
            if unknown:
                raise ServiceError.invalid(
                    f"{where}.field_names: unknown field {_names(unknown)} for variable set "
                    f"{self.variable_set.value}; expected {', '.join(required)} and optionally "
                    f"{', '.join(optional_fields(self.variable_set) + (EXCISION_MASK_FIELD,))}"
                )
            dtype = _DTYPES[ph.dtype]
            field_bytes = math.prod(shape) * dtype.itemsize
            declared_total += field_bytes * len(names)
            if declared_total > limits.max_slice_bytes:
                raise ServiceError(
                    grpc.StatusCode.RESOURCE_EXHAUSTED,
                    f"header.patches: the slice holds more than the server's limit of {limits.max_slice_bytes} bytes",
                    reason="SLICE_TOO_LARGE",
                )
            self._patches.append(
                _PatchPlan(origin, spacing, shape, int(ph.level), dtype, _ORDERS[ph.memory_order], field_bytes,
                           {name: _FieldBuffer(np.empty(0, np.uint8)) for name in names})
            )
        if header.total_bytes != declared_total:
            raise ServiceError.invalid(
                f"header.total_bytes: {header.total_bytes} does not match the {declared_total} bytes the "
                f"patches' shapes, dtypes and field names declare"
            )
        self.total_bytes = declared_total
        self.received_bytes = 0
        # Allocate only now that the whole header is valid; np.empty leaves the pages untouched
        # until the chunks fill them (zero-filling first measured several times slower).
        for plan in self._patches:
            for buf in plan.fields.values():
                buf.buffer = np.empty(plan.field_bytes, dtype=np.uint8)

    def add(self, chunk: pb.SliceChunk) -> None:
        """Place one chunk; refuses chunks over the limit, unknown targets and out-of-order offsets."""
        data = chunk.data  # each access of a bytes field copies: read it once
        size = len(data)
        if size > self.limits.max_chunk_bytes:
            raise ServiceError(
                grpc.StatusCode.RESOURCE_EXHAUSTED,
                f"chunk.data: {size} bytes is over the server's limit of {self.limits.max_chunk_bytes} bytes "
                f"per chunk; send chunks of about 1 MiB",
                reason="CHUNK_TOO_LARGE",
            )
        if not 0 <= chunk.patch_index < len(self._patches):
            raise ServiceError.invalid(
                f"chunk.patch_index: {chunk.patch_index} is not a patch of the header (0..{len(self._patches) - 1})"
            )
        plan = self._patches[chunk.patch_index]
        target = plan.fields.get(chunk.field_name)
        where = f"patches[{chunk.patch_index}] field {chunk.field_name!r}"
        if target is None:
            raise ServiceError.invalid(
                f"chunk.field_name: {chunk.field_name!r} is not among the field_names the header declared for "
                f"patches[{chunk.patch_index}]"
            )
        if chunk.offset_bytes != target.received:
            raise ServiceError.invalid(
                f"chunk.offset_bytes: {chunk.offset_bytes} for {where}; expected {target.received} "
                f"(the chunks of a field arrive in order)"
            )
        end = target.received + size
        if end > len(target.buffer):
            raise ServiceError.invalid(
                f"chunk.data: {where} would hold {end} bytes, but the header's shape {list(plan.shape)} of "
                f"{plan.dtype.name} holds {len(target.buffer)} bytes"
            )
        target.buffer[target.received:end] = np.frombuffer(data, dtype=np.uint8)
        target.received = end
        self.received_bytes += size

    def missing_description(self) -> str:
        gaps = []
        for index, plan in enumerate(self._patches):
            for name, buf in plan.fields.items():
                if buf.received < len(buf.buffer):
                    gaps.append(f"patches[{index}] {name!r} has {buf.received} of {len(buf.buffer)} bytes")
        shown = "; ".join(gaps[:4]) + (f"; and {len(gaps) - 4} more fields" if len(gaps) > 4 else "")
        return shown

    def finish(self) -> Slice:
        """The assembled slice. DATA_LOSS if bytes are missing; INVALID_ARGUMENT on a non-finite value.

        Safe to run on a worker thread (numpy releases the GIL for the finiteness check).
        """
        try:
            return Slice(time=self.time, iteration=self.iteration, variable_set=self.variable_set,
                         patches=self.finish_patches(), excised_spheres=self.excised_spheres)
        except SliceError as exc:
            raise ServiceError.invalid(str(exc)) from None

    def finish_patches(self) -> tuple[Patch, ...]:
        """The patches of the stream, checked as :meth:`finish` checks them (possibly none)."""
        if self.received_bytes != self.total_bytes:
            raise ServiceError(
                grpc.StatusCode.DATA_LOSS,
                f"stream ended after {self.received_bytes} of the {self.total_bytes} bytes the header declared: "
                f"{self.missing_description()}",
                reason="STREAM_INCOMPLETE", field="chunk",
            )
        patches = []
        for index, plan in enumerate(self._patches):
            fields = {}
            excised = None  # built only when a field holds a non-finite value
            # The mask first: it says where the other fields may hold non-finite values.
            for name in sorted(plan.fields, key=lambda n: n != EXCISION_MASK_FIELD):
                buf = plan.fields[name]
                flat = buf.buffer.view(plan.dtype)
                if plan.dtype != np.float64:
                    flat = flat.astype(np.float64)
                arr = flat.reshape(plan.shape, order=plan.memory_order)
                finite = np.isfinite(arr)
                if not finite.all() and name != EXCISION_MASK_FIELD:
                    if excised is None:
                        excised = excised_node_mask(plan.origin, plan.spacing, plan.shape, self.excised_spheres,
                                                    fields.get(EXCISION_MASK_FIELD))
                        if excised is None:
                            excised = np.zeros(plan.shape, bool)
                    finite |= excised
                if not finite.all():
                    node = [int(v) for v in np.argwhere(~finite)[0]]
                    if name == EXCISION_MASK_FIELD:
                        where = "(the mask itself must be finite)"
                    elif self.excised_spheres or EXCISION_MASK_FIELD in plan.fields:
                        where = "inside no excised region (spec.excised_spheres, excision_mask)"
                    else:
                        where = ""
                    raise ServiceError.invalid(
                        f"patches[{index}] field {name!r}: {int((~finite).sum())} non-finite value(s)"
                        f"{' ' + where if where else ''}, first at node [i, j, k] = {node}; expected finite numbers"
                    )
                fields[name] = arr
            fields = {name: fields[name] for name in plan.fields}  # the header's order
            try:
                patches.append(
                    Patch(origin=plan.origin, spacing=plan.spacing, shape=plan.shape, level=plan.level,
                          fields=fields, memory_order=plan.memory_order)
                )
            except SliceError as exc:
                raise ServiceError.invalid(f"patches[{index}]: {exc}") from None
        return tuple(patches)


def mirror_through_z0(slice_: Slice) -> Slice:
    """The full slice of a run with bitant symmetry (mirror symmetry through z = 0).

    INVALID_ARGUMENT when a patch reaches below z = 0 or its lowest node lies strictly between
    the plane and one spacing above it (see :mod:`penumbra_server.numerics.reflection`).
    """
    try:
        return mirror_slice_through_z0(slice_)
    except SliceError as exc:
        raise ServiceError.invalid(f"header.patches: the run has symmetry SYMMETRY_BITANT: {exc}") from None
