"""Slices sent in parts: one part per sender (e.g. per MPI rank), assembled per iteration.

An evolution that runs on many ranks sends, for one iteration, one part per rank: the patches
that rank owns, with the part's index and the number of parts (``SliceHeader.part_index`` and
``part_count``). A run's :class:`PartAssembly` keeps, per iteration, the patches of each part
that arrived, the slice's time and part count, and a deadline timer on the event loop. When the
last part arrives the patches are merged, in part order, into one numerics ``Slice`` and handed
to the run like a whole slice (queue, duplicate check and processing unchanged). When the run's
part deadline passes first, the patches that arrived are handed on with a ``SlicePartsMissing``
report, or the slice is given up when no part carried a patch.

Refusals are :class:`ServiceError` whose reason is one of :data:`REASONS` (upper-cased: the
ErrorInfo reason the client reads) and whose message names the field at fault and what was
expected. A refused part changes nothing: the parts stored before stay pending. What one part
stream is (its label, its checked patches, the refusal reasons) lives in part_intake.py and is
re-exported here.

Durability: with part files attached (:meth:`PartAssembly.attach_files`, part_files.py), each
part is written to the run's spool directory before its answer (``persisted`` set), and a
restarted server rebuilds the pending assemblies from the files (:meth:`PartAssembly.restore`);
a restored iteration gets a full part deadline from the restart (its senders were cut off too).

Cost on the event loop: dictionary look-ups per patch. The one data comparison (a patch that two
parts both carry) runs on a worker thread, as does everything that reads field values.
"""

from __future__ import annotations

import asyncio
import errno
import logging
import math
import time
from dataclasses import dataclass, field
from typing import Protocol

import grpc

from penumbra_shim._wire import horizons_pb2 as pb

from ..numerics.slices import Patch, Slice, VariableSet
from .errors import ServiceError
from .part_files import PartFiles, StoredPart
from .part_intake import (MAX_PART_COUNT, REASONS, PartLabel, ReceivedPart, describe_patch as _describe,
                          part_of, patch_bytes as _patch_bytes, patch_key, prepare_part, refusal as _refusal,
                          same_data as _same_data)

__all__ = ["REASONS", "MAX_PART_COUNT", "PartLabel", "ReceivedPart", "PartSink", "PartAssembly", "part_of",
           "prepare_part", "patch_key"]

log = logging.getLogger("penumbra.server")

class PartSink(Protocol):
    """What a :class:`PartAssembly` needs of its run."""

    def check_accepting(self) -> None:
        """Raise the run's refusal if it takes no more slices."""

    def is_duplicate(self, iteration: int) -> bool:
        """Whether the run accepted a slice of ``iteration`` (whole, or assembled from parts)."""

    def duplicate_response(self, iteration: int, received_bytes: int) -> pb.SendSliceResponse:
        """The reply to a copy of something the run holds (counted as a duplicate)."""

    def accept_assembled(self, slice_: Slice | None, nbytes: int,
                         report: pb.SlicePartsMissing | None) -> pb.SendSliceResponse | None:
        """Take an assembled slice (None: given up) and announce ``report`` (parts missing) if any."""


@dataclass(eq=False)
class _Pending:
    """The parts of one iteration received so far."""

    iteration: int
    time: float
    count: int
    variable_set: VariableSet
    parts: dict[int, tuple[Patch, ...]] = field(default_factory=dict)
    #: patch key -> (the patch kept, index of the part that brought it)
    by_key: dict[tuple, tuple[Patch, int]] = field(default_factory=dict)
    nbytes: int = 0
    patch_bytes: int = 0
    timer: asyncio.TimerHandle | None = None

    def merged(self, excised_spheres: tuple = ()) -> Slice:
        """The slice of every patch received, in part order (one pass; no pairwise checks)."""
        patches = tuple(p for index in sorted(self.parts) for p in self.parts[index])
        return Slice(time=self.time, iteration=self.iteration, variable_set=self.variable_set, patches=patches,
                     excised_spheres=excised_spheres)


class PartAssembly:
    """The slices of one run that are arriving in parts. Call everything on the event loop thread.

    Args:
        sink: the run (see :class:`PartSink`).
        run_id: for messages.
        deadline_s: seconds from an iteration's first part until what arrived is handed on.
        excised_spheres: the run's excised spheres, carried by every merged slice.
    """

    def __init__(self, sink: PartSink, *, run_id: str, deadline_s: float, excised_spheres: tuple = ()) -> None:
        if not (math.isfinite(deadline_s) and deadline_s > 0):
            raise ValueError(f"deadline_s: expected a finite number of seconds > 0, got {deadline_s}")
        self.sink = sink
        self.run_id = run_id
        self.deadline_s = float(deadline_s)
        #: The run's excised spheres, carried by every merged slice (numerics.excision).
        self.excised_spheres = tuple(excised_spheres)
        self._pending: dict[int, _Pending] = {}
        #: Part files (attach_files): None keeps parts in memory only.
        self._files: PartFiles | None = None
        self._executor = None
        self._spooled_path = None
        #: One part at a time from its first check to its store: a part's disk write is awaited
        #: between the two, and no other part may change the iteration meanwhile.
        self._receiving = asyncio.Lock()
        #: Iterations given up (no patch arrived before the deadline): later parts are refused.
        self.given_up: set[int] = set()
        #: Iterations assembled from every one of their parts by this process: a later copy of
        #: one of their parts is a duplicate (e.g. a part resent because a kill cut off its answer).
        self.completed: set[int] = set()

    @property
    def pending_iterations(self) -> list[int]:
        return sorted(self._pending)

    def pending_summary(self) -> list[tuple[int, list[int], int]]:
        """(iteration, part indices held, part count) of each pending slice, in iteration order."""
        return [(it, sorted(p.parts), p.count) for it, p in sorted(self._pending.items())]

    def attach_files(self, files: PartFiles, executor, spooled_path) -> None:
        """Keep every part in ``files`` before answering it; ``executor`` runs the disk work in
        order with the run's other spool writes (the run's archive thread); ``spooled_path(it)``
        is the spool file of the assembled slice of ``it``, after which the parts may go."""
        self._files, self._executor, self._spooled_path = files, executor, spooled_path

    async def _on_disk(self, function, *args):
        return await asyncio.get_running_loop().run_in_executor(self._executor, function, *args)

    def _release_later(self, iteration: int, *, given_up: bool) -> None:
        """Queue the removal of ``iteration``'s part files behind its assembled slice's spool write
        (the same single-threaded executor runs both, in order)."""
        if self._files is None:
            return
        if given_up:
            job = self._executor.submit(self._files.release, iteration)
        else:
            job = self._executor.submit(self._files.release_if_spooled, iteration, self._spooled_path(iteration))
        job.add_done_callback(lambda done: self._log_release_failure(done, iteration))

    def _log_release_failure(self, done, iteration: int) -> None:
        if not done.cancelled() and done.exception() is not None:  # the files stay; a restart removes them
            log.error("run %s: removing the part files of iteration %d failed: %s", self.run_id, iteration,
                      done.exception())

    # -- checks -------------------------------------------------------------------------------

    def check(self, iteration: int, time_m: float, label: PartLabel) -> bool:
        """Refuse a stream that cannot join its iteration; True when this part is held already.

        A whole slice (count 1) is refused only while parts of its iteration are pending. A part
        of a slice this process assembled complete is held (a copy); a part of a slice accepted
        whole, processed without it or given up is refused.
        """
        pending = self._pending.get(iteration)
        if not label.is_part:
            if pending is not None:
                raise _refusal("part_count_mismatch",
                               f"header.part_count: iteration {iteration} is arriving in {pending.count} parts "
                               f"({len(pending.parts)} held); a whole slice (part_count 0 or 1) cannot join them")
            return False
        if iteration in self.given_up:
            raise _refusal("part_after_give_up",
                           f"header.iteration: the slice of iteration {iteration} was already given up (no part "
                           f"that arrived before it was handed on carried a patch); part {label.index} came too "
                           f"late")
        if pending is None:
            if iteration in self.completed:
                return True
            if self.sink.is_duplicate(iteration):
                raise _refusal("part_after_assembly",
                               f"header.iteration: the slice of iteration {iteration} was already assembled (or "
                               f"accepted whole) and handed on for processing; part {label.index} came too late")
            return False
        if label.count != pending.count:
            raise _refusal("part_count_mismatch",
                           f"header.part_count: expected {pending.count}, as the parts of iteration {iteration} "
                           f"received before, got {label.count}")
        if time_m != pending.time:
            raise _refusal("part_time_mismatch",
                           f"header.time_m: expected {pending.time!r} M, the time of the parts of iteration "
                           f"{iteration} received before, got {time_m!r} M")
        return label.index in pending.parts

    def duplicate_response(self, iteration: int, label: PartLabel, received_bytes: int = 0) -> pb.SendSliceResponse:
        """The reply to a part already held (counted by the run as a duplicate)."""
        response = self.sink.duplicate_response(iteration, received_bytes)
        pending = self._pending.get(iteration)
        response.parts_received = len(pending.parts) if pending is not None else label.count
        response.parts_expected = label.count
        return response

    # -- receiving ----------------------------------------------------------------------------

    async def receive(self, part: ReceivedPart, *, max_bytes: int) -> pb.SendSliceResponse:
        """Store one part; when it completes its slice, hand the slice to the run.

        Returns OUTCOME_PART_ACCEPTED (waiting for parts), OUTCOME_DUPLICATE (held already), or
        the run's reply to the assembled slice. Refusals leave every stored part in place.
        """
        async with self._receiving:
            return await self._receive(part, max_bytes=max_bytes)

    async def _receive(self, part: ReceivedPart, *, max_bytes: int) -> pb.SendSliceResponse:
        iteration, label = part.iteration, part.label
        identical: set[tuple] = set()  # keys already compared equal to the stored patch
        while True:
            self.sink.check_accepting()
            if self.check(iteration, part.time, label):
                return self.duplicate_response(iteration, label, part.nbytes)
            pending = self._pending.get(iteration)
            if pending is None:
                break
            to_compare = []
            for key, patch in zip(part.keys, part.patches):
                held = pending.by_key.get(key)
                if held is not None and key not in identical:
                    to_compare.append((key, held, patch))
            if not to_compare:
                break
            # Field-by-field comparison reads both copies: off the event loop. Other parts may
            # arrive meanwhile, so every check is made again afterwards.
            same = await asyncio.to_thread(lambda: [_same_data(held[0], patch) for _, held, patch in to_compare])
            for (key, (stored, owner), patch), equal in zip(to_compare, same):
                if not equal:
                    raise _refusal("patch_conflict",
                                   f"header.patches: part {label.index} of iteration {iteration} carries the patch "
                                   f"({_describe(patch)}) that part {owner} carried with different data; expected "
                                   f"identical data or a different patch")
                identical.add(key)
        kept = [i for i, key in enumerate(part.keys) if pending is None or key not in pending.by_key]
        kept_bytes = sum(part.patch_bytes[i] for i in kept)
        held_bytes = pending.patch_bytes if pending is not None else 0
        if held_bytes + kept_bytes > max_bytes:
            raise _refusal("parts_too_large",
                           f"header.patches: the parts of iteration {iteration} would hold {held_bytes + kept_bytes} "
                           f"bytes, over the server's slice limit of {max_bytes} bytes")
        if self._files is not None:
            await self._keep(part, tuple(part.patches[i] for i in kept), pending)
        # From here on no await: the checks above still hold.
        if pending is None:
            pending = _Pending(iteration=iteration, time=part.time, count=label.count, variable_set=part.variable_set)
            self._pending[iteration] = pending
            loop = asyncio.get_running_loop()
            pending.timer = loop.call_later(self.deadline_s, self._expire, pending)
        for i in kept:
            pending.by_key[part.keys[i]] = (part.patches[i], label.index)
        pending.parts[label.index] = tuple(part.patches[i] for i in kept)
        pending.nbytes += part.nbytes
        pending.patch_bytes += kept_bytes
        persisted = self._files is not None
        if len(pending.parts) < pending.count:
            return pb.SendSliceResponse(
                run_id=self.run_id, iteration=iteration, outcome=pb.SendSliceResponse.OUTCOME_PART_ACCEPTED,
                received_bytes=part.nbytes, queue_position=-1, parts_received=len(pending.parts),
                parts_expected=pending.count, persisted=persisted)
        self._take(pending)
        response = self._hand_on(pending, missing=[], why="")
        if response is None:  # every part arrived empty: nothing to process
            response = pb.SendSliceResponse(run_id=self.run_id, iteration=iteration,
                                            outcome=pb.SendSliceResponse.OUTCOME_PART_ACCEPTED, queue_position=-1)
        response.received_bytes = part.nbytes
        response.parts_received = pending.count
        response.parts_expected = pending.count
        # Every part of the slice is on disk (the assembled slice's own spool write follows).
        response.persisted = persisted and response.outcome in (pb.SendSliceResponse.OUTCOME_ACCEPTED,
                                                                 pb.SendSliceResponse.OUTCOME_PART_ACCEPTED)
        return response

    async def _keep(self, part: ReceivedPart, patches: tuple[Patch, ...], pending: _Pending | None) -> None:
        """Write ``part`` (its ``patches`` not held already) to its part file, then check again
        that it may still join its iteration (its deadline may have passed during the write);
        a part that may not is refused and its file removed. ServiceError when the write fails."""
        from .. import crash_points

        label = part.label
        stored = StoredPart(iteration=part.iteration, time=part.time, variable_set=part.variable_set,
                            index=label.index, count=label.count, patches=patches, nbytes=part.nbytes,
                            arrival_unix_s=time.time())
        try:
            path = await self._on_disk(self._files.write, stored)
        except OSError as exc:  # not on disk: not acknowledged (the sender keeps the part)
            full = exc.errno in (errno.ENOSPC, errno.EDQUOT)
            raise ServiceError(grpc.StatusCode.RESOURCE_EXHAUSTED if full else grpc.StatusCode.INTERNAL,
                               f"header.part_index: part {label.index} of iteration {part.iteration} could not be "
                               f"written to the run's spool {self._files.directory}: {exc.strerror or exc}; it "
                               f"was not accepted", reason="SPOOL_WRITE_FAILED") from None
        try:
            self.sink.check_accepting()
            self.check(part.iteration, part.time, label)
            if self._pending.get(part.iteration) is not pending:  # defensive: the lock keeps it so
                raise _refusal("part_after_assembly", f"header.iteration: the parts of iteration {part.iteration} "
                                                      f"were handed on while part {label.index} was being stored")
        except ServiceError:
            await self._on_disk(path.unlink, True)
            raise
        crash_points.reached("part-spooled-before-ack")

    # -- handing on ---------------------------------------------------------------------------

    def _take(self, pending: _Pending) -> None:
        del self._pending[pending.iteration]
        if pending.timer is not None:
            pending.timer.cancel()
            pending.timer = None

    def _hand_on(self, pending: _Pending, *, missing: list[int], why: str) -> pb.SendSliceResponse | None:
        """Give the run what arrived (complete when ``missing`` is empty); a report when incomplete or empty."""
        has_patches = any(pending.parts.values())
        if not missing and has_patches:
            self.completed.add(pending.iteration)
            response = self.sink.accept_assembled(pending.merged(self.excised_spheres), pending.nbytes, None)
            self._release_later(pending.iteration, given_up=False)
            return response
        received = sum(len(p) for p in pending.parts.values())
        if not has_patches:
            self.given_up.add(pending.iteration)
            what = (f"the {len(pending.parts)} part(s) that arrived carried no patch: the slice is given up"
                    if missing else "every part arrived and none carried a patch: nothing to process")
        else:
            what = f"processing the {received} patch(es) of the {len(pending.parts)} part(s) that arrived"
        shown = ", ".join(map(str, missing[:20])) + (f" and {len(missing) - 20} more" if len(missing) > 20 else "")
        text = f"iteration {pending.iteration}: {why + '; ' if why else ''}"
        text += f"{len(missing)} of {pending.count} parts missing ({shown}); {what}" if missing else what
        report = pb.SlicePartsMissing(
            iteration=pending.iteration, time_m=pending.time, parts_expected=pending.count,
            missing_part_indices=missing, patches_received=received, message=text,
            disposition=(pb.SlicePartsMissing.DISPOSITION_PROCESSED if has_patches
                         else pb.SlicePartsMissing.DISPOSITION_GIVEN_UP))
        merged = pending.merged(self.excised_spheres) if has_patches else None
        response = self.sink.accept_assembled(merged, pending.nbytes, report)
        self._release_later(pending.iteration, given_up=not has_patches)
        return response

    def _hand_on_incomplete(self, pending: _Pending, why: str) -> None:
        missing = [i for i in range(pending.count) if i not in pending.parts]
        try:
            self._hand_on(pending, missing=missing, why=why)
        except ServiceError as exc:  # the run stopped taking slices meanwhile
            log.warning("run %s: iteration %d not handed on: %s", self.run_id, pending.iteration, exc.message)
        except Exception:
            log.exception("run %s: handing on the parts of iteration %d failed", self.run_id, pending.iteration)

    def _expire(self, pending: _Pending) -> None:
        """The deadline timer of ``pending`` (on the event loop)."""
        if self._pending.get(pending.iteration) is not pending:
            return
        self._take(pending)
        self._hand_on_incomplete(pending, f"part_deadline_s = {self.deadline_s:g} s passed since its first part")

    def restore(self, stored: dict[int, list[StoredPart]]) -> None:
        """Rebuild the pending slices of a restarted server from their part files (call on the
        event loop before the run takes parts). A complete slice (a kill after its last part was
        kept) is handed on at once; an incomplete one waits a full part deadline from now."""
        loop = asyncio.get_running_loop()
        for iteration, parts in sorted(stored.items()):
            first = parts[0]
            pending = _Pending(iteration=iteration, time=first.time, count=first.count,
                               variable_set=first.variable_set)
            for part in parts:
                pending.parts[part.index] = part.patches
                for patch in part.patches:
                    pending.by_key.setdefault(patch_key(patch), (patch, part.index))
                pending.nbytes += part.nbytes
                pending.patch_bytes += _patch_bytes(part.patches)
            if len(pending.parts) == pending.count:
                self._hand_on_complete(pending)
                continue
            self._pending[iteration] = pending
            pending.timer = loop.call_later(self.deadline_s, self._expire, pending)

    def _hand_on_complete(self, pending: _Pending) -> None:
        try:
            self._hand_on(pending, missing=[], why="")
        except Exception:
            log.exception("run %s: handing on the restored parts of iteration %d failed", self.run_id,
                          pending.iteration)

    def flush(self, why: str) -> None:
        """Hand on every pending slice with what arrived (the run is closing)."""
        for iteration in sorted(self._pending):
            pending = self._pending[iteration]
            self._take(pending)
            self._hand_on_incomplete(pending, why)

    def cancel(self) -> None:
        """Drop every pending part and stop the timers (the server is stopping)."""
        for pending in list(self._pending.values()):
            self._take(pending)
