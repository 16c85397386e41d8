"""One part stream of a slice sent in parts: its label (index and count), its checked patches,
and the refusals of parts (reasons and status codes). The assembly of parts is in parts.py.

Refusals are :class:`ServiceError` whose reason is one of :data:`REASONS` (upper-cased: the
ErrorInfo reason the client reads) and whose message names the field at fault and what was
expected.
"""

from __future__ import annotations

from dataclasses import dataclass

import grpc
import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..numerics.reflection import mirror_patch_through_z0
from ..numerics.slices import Patch, SliceError, VariableSet
from .errors import ServiceError
from .ingest import SliceAssembler

__all__ = ["REASONS", "MAX_PART_COUNT", "PartLabel", "ReceivedPart", "part_of", "prepare_part", "patch_key",
           "refusal", "same_data", "describe_patch", "patch_bytes"]

#: Most parts one slice may be sent in (one per MPI rank; large machines run ~1e5 ranks).
MAX_PART_COUNT = 1 << 20

#: Reasons of the refusals of this module (upper-cased on the wire), with their status codes.
REASONS: dict[str, grpc.StatusCode] = {
    "part_count_negative": grpc.StatusCode.INVALID_ARGUMENT,
    "part_count_too_large": grpc.StatusCode.INVALID_ARGUMENT,
    "part_index_out_of_range": grpc.StatusCode.INVALID_ARGUMENT,
    "whole_slice_without_patches": grpc.StatusCode.INVALID_ARGUMENT,
    "part_time_mismatch": grpc.StatusCode.FAILED_PRECONDITION,
    "part_count_mismatch": grpc.StatusCode.FAILED_PRECONDITION,
    "part_after_assembly": grpc.StatusCode.FAILED_PRECONDITION,
    "part_after_give_up": grpc.StatusCode.FAILED_PRECONDITION,
    "patch_conflict": grpc.StatusCode.ALREADY_EXISTS,
    "parts_too_large": grpc.StatusCode.RESOURCE_EXHAUSTED,
}


def refusal(reason: str, text: str) -> ServiceError:
    return ServiceError(REASONS[reason], text, reason=reason.upper())


@dataclass(frozen=True)
class PartLabel:
    """Which part of its slice a stream carries: ``index`` in 0 .. ``count`` - 1 (count 1: whole)."""

    index: int
    count: int

    @property
    def is_part(self) -> bool:
        return self.count > 1


def part_of(header: pb.SliceHeader) -> PartLabel:
    """The validated part index and count of a SendSlice header (INVALID_ARGUMENT naming the field)."""
    count, index = int(header.part_count), int(header.part_index)
    if count < 0:
        raise refusal("part_count_negative", f"header.part_count: expected 0 or 1 for a whole slice or the "
                                              f"number of parts (2 .. {MAX_PART_COUNT}), got {count}")
    if count > MAX_PART_COUNT:
        raise refusal("part_count_too_large", f"header.part_count: at most {MAX_PART_COUNT} parts, got {count}")
    count = max(count, 1)
    if not 0 <= index < count:
        raise refusal("part_index_out_of_range", f"header.part_index: expected 0 .. {count - 1} for part_count "
                                                  f"{header.part_count}, got {index}")
    if count == 1 and not header.patches:
        raise refusal("whole_slice_without_patches",
                       "header.patches: a whole slice (part_count 0 or 1) needs at least one patch, got none; "
                       "only a part of a slice sent in parts (part_count > 1) may be empty")
    return PartLabel(index, count)


def patch_key(patch: Patch) -> tuple:
    """What makes two patches "the same patch": level, origin, spacing and shape."""
    return (patch.level, *(float(v) for v in patch.origin), *(float(v) for v in patch.spacing), *patch.shape)


def same_data(a: Patch, b: Patch) -> bool:
    return a.fields.keys() == b.fields.keys() and all(np.array_equal(a.fields[n], b.fields[n]) for n in a.fields)


def describe_patch(patch: Patch) -> str:
    return (f"level {patch.level}, origin {np.round(patch.origin, 6).tolist()}, spacing "
            f"{np.round(patch.spacing, 6).tolist()}, shape {list(patch.shape)}")


def patch_bytes(patches) -> int:
    return int(sum(a.nbytes for p in patches for a in p.fields.values()))


@dataclass(frozen=True, eq=False)
class ReceivedPart:
    """One part as it arrived: its slice's identity, its label and its patches (copies dropped),
    with each patch's :func:`patch_key` and field bytes (worked out off the event loop)."""

    iteration: int
    time: float
    variable_set: VariableSet
    label: PartLabel
    patches: tuple[Patch, ...]
    nbytes: int
    keys: tuple[tuple, ...] = ()
    patch_bytes: tuple[int, ...] = ()

    def __post_init__(self) -> None:
        if len(self.keys) != len(self.patches):
            object.__setattr__(self, "keys", tuple(patch_key(p) for p in self.patches))
        if len(self.patch_bytes) != len(self.patches):
            object.__setattr__(self, "patch_bytes", tuple(patch_bytes((p,)) for p in self.patches))


def prepare_part(assembler: SliceAssembler, label: PartLabel, *, bitant: bool) -> ReceivedPart:
    """The checked patches of one part stream (run on a worker thread: it reads every value).

    DATA_LOSS / INVALID_ARGUMENT as :meth:`SliceAssembler.finish`; with ``bitant`` symmetry each
    patch is mirrored through z = 0. A patch the part carries twice is kept once if its data are
    identical, else ALREADY_EXISTS.
    """
    patches = assembler.finish_patches()
    if bitant:
        mirrored = []
        for index, patch in enumerate(patches):
            try:
                mirrored.extend(mirror_patch_through_z0(patch, index=index))
            except SliceError as exc:
                raise ServiceError.invalid(f"header.patches: the run has symmetry SYMMETRY_BITANT: {exc}") from None
        patches = tuple(mirrored)
    seen: dict[tuple, Patch] = {}
    kept, keys = [], []
    for patch in patches:
        key = patch_key(patch)
        first = seen.get(key)
        if first is None:
            seen[key] = patch
            kept.append(patch)
            keys.append(key)
        elif not same_data(first, patch):
            raise refusal("patch_conflict", f"header.patches: part {label.index} carries the patch ({describe_patch(patch)}) "
                                             f"twice with different data; expected one copy")
    return ReceivedPart(iteration=assembler.iteration, time=assembler.time, variable_set=assembler.variable_set,
                        label=label, patches=tuple(kept), nbytes=assembler.received_bytes, keys=tuple(keys))
