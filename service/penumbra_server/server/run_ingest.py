"""How slices enter a run: the acceptance checks, the keep-newest queue (a full queue skips its
oldest slice), the spool write before acknowledging, slices replayed from the spool after a
restart and slices assembled from parts.

A mixin of :class:`~penumbra_server.server.runs.RunRecord` (its state is set up there); every
method runs on the event loop thread.
"""

from __future__ import annotations

import asyncio
import errno
import logging
import time

import grpc

from penumbra_shim._wire import horizons_pb2 as pb

from .. import crash_points
from ..numerics.slices import Slice
from .errors import ServiceError
from .run_events import parts_missing_emission, skip_emission
from .run_types import QueuedSlice

__all__ = ["RunIngest"]

log = logging.getLogger("penumbra.server")


class RunIngest:
    """The ingest side of a run (mixed into RunRecord)."""

    def check_accepting(self) -> None:
        if self.failed_reason:
            raise ServiceError(grpc.StatusCode.FAILED_PRECONDITION,
                               f"run_id: run {self.run_id} stopped after an archive failure: {self.failed_reason}",
                               reason="RUN_FAILED")
        if not self.is_open:
            raise ServiceError(grpc.StatusCode.FAILED_PRECONDITION,
                               f"run_id: run {self.run_id} is closed; open a new run to send more slices",
                               reason="RUN_CLOSED")

    def is_duplicate(self, iteration: int) -> bool:
        return iteration in self.accepted_iterations

    def duplicate_response(self, iteration: int, received_bytes: int) -> pb.SendSliceResponse:
        self.slices_duplicate += 1
        return pb.SendSliceResponse(run_id=self.run_id, iteration=iteration,
                                    outcome=pb.SendSliceResponse.OUTCOME_DUPLICATE,
                                    received_bytes=received_bytes, queue_position=-1, parts_received=1,
                                    parts_expected=1)

    @property
    def queued_bytes(self) -> int:
        """Bytes of the slices waiting in this run's queue (the one being processed not counted)."""
        return sum(item.nbytes for item in self._queue)

    def accept(self, item: QueuedSlice) -> pb.SendSliceResponse:
        """Queue an assembled slice under the keep-newest policy; never waits."""
        self.check_accepting()
        if self.is_duplicate(item.iteration):  # another stream finished the same slice first
            return self.duplicate_response(item.iteration, item.nbytes)
        self.accepted_iterations.add(item.iteration)
        self.slices_received += 1
        if item.iteration > self.last_received[0]:
            self.last_received = (item.iteration, item.slice_.time)
        skipped: list[QueuedSlice] = []
        while len(self._queue) >= self.settings.queue_depth:
            skipped.append(self._queue.popleft())
        self._queue.append(item)
        self._queue_changed.set()
        for old in skipped:
            self.slices_skipped += 1
            self._submit(skip_emission(self, old, superseded_by=item))
        return pb.SendSliceResponse(
            run_id=self.run_id,
            iteration=item.iteration,
            outcome=pb.SendSliceResponse.OUTCOME_ACCEPTED,
            received_bytes=item.nbytes,
            queue_position=len(self._queue) - 1,
            skipped_iterations=[old.iteration for old in skipped],
            parts_received=1,
            parts_expected=1,
        )

    async def accept_persisted(self, item: QueuedSlice) -> pb.SendSliceResponse:
        """Write ``item`` to the run's spool (flushed to the disk), then :meth:`accept` it: an
        acknowledged slice survives a crash of the server. Duplicates are answered at once."""
        self.check_accepting()
        if self.is_duplicate(item.iteration):
            return self.duplicate_response(item.iteration, item.nbytes)
        if self.spool is None:
            return self.accept(item)
        try:
            await self._in_archive_thread(self.spool.write, item)
        except OSError as exc:  # not on disk: not acknowledged (the client keeps the slice)
            full = exc.errno in (errno.ENOSPC, errno.EDQUOT)
            raise ServiceError(grpc.StatusCode.RESOURCE_EXHAUSTED if full else grpc.StatusCode.INTERNAL,
                               f"iteration: slice {item.iteration} could not be written to the run's spool "
                               f"{self.spool.directory}: {exc.strerror or exc}; it was not accepted",
                               reason="SPOOL_WRITE_FAILED") from None
        self.highest_held = max(self.highest_held, item.iteration)
        crash_points.reached("spool-before-ack")
        response = self.accept(item)
        response.persisted = response.outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED
        return response

    def requeue(self, item: QueuedSlice) -> None:
        """Queue a slice replayed from the spool after a restart (acknowledged before the crash):
        counted as received, never skipped on the way in (the spool holds at most a queue's worth)."""
        self.accepted_iterations.add(item.iteration)
        self.slices_received += 1
        self.slices_replayed += 1
        self.highest_held = max(self.highest_held, item.iteration)
        if item.iteration > self.last_received[0]:
            self.last_received = (item.iteration, item.slice_.time)
        self._queue.append(item)
        self._queue_changed.set()

    def _log_spool_failure(self, written: asyncio.Future) -> None:
        if not written.cancelled() and written.exception() is not None:
            log.error("run %s: spooling an assembled slice failed: %s", self.run_id, written.exception())

    def accept_assembled(self, slice_: Slice | None, nbytes: int,
                         report: pb.SlicePartsMissing | None) -> pb.SendSliceResponse | None:
        """Take a slice assembled from parts (parts.PartSink): announce ``report`` (parts missing)
        first, then queue the slice as :meth:`accept` does; ``slice_`` None: given up, nothing queued."""
        if report is not None:
            self._submit(parts_missing_emission(self, report))
            if slice_ is not None:
                self.slices_incomplete += 1
        if slice_ is None:
            return None
        item = QueuedSlice(slice_=slice_, nbytes=nbytes, arrival_unix_s=time.time())
        response = self.accept(item)
        if self.spool is not None and response.outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED:
            # Kept whole from now on (its part files go after this write, parts.py). The archive
            # thread runs jobs in order, so this write precedes the slice's release.
            self.highest_held = max(self.highest_held, item.iteration)
            written = asyncio.get_running_loop().run_in_executor(self.archive_thread, self.spool.write, item)
            written.add_done_callback(self._log_spool_failure)
        return response
