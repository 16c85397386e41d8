"""How a run's events are committed: pending emissions (run_events.py) are taken in batches,
given consecutive sequence numbers, written in one archive commit on the run's archive thread,
and only then appended to the event log (an event is announced only once it is archived).
Spooled slices whose fate is archived are released here. An archive failure stops the run
taking slices (``failed_reason``) and announces nothing of the failed batch. A commit is archived
once it is durable in the archive's journal; the journal is folded into the zarr arrays after
the announcement, when the writer's fold policy asks, or when the run stays idle that long.

A mixin of :class:`~penumbra_server.server.runs.RunRecord` (its state is set up there).
"""

from __future__ import annotations

import asyncio
import logging
import time
from typing import Callable

import grpc

from penumbra_shim._wire import horizons_pb2 as pb

from .. import crash_points
from .errors import ServiceError
from .run_events import Committed, Emission, merge_batch

__all__ = ["RunCommits"]

log = logging.getLogger("penumbra.server")


class RunCommits:
    """The commit side of a run (mixed into RunRecord)."""

    def publish(self, fill: Callable[[pb.RunEvent], None], *, time_m: float = 0.0, iteration: int = 0,
                attrs: dict | None = None,
                rows: Callable[[int, float, pb.RunEvent], dict[str, list[dict]]] | None = None) -> asyncio.Future:
        """Emit an event of another kind (the hook for custom tracking and link records).

        ``fill(event)`` sets the event's kind (e.g. a guidance message); the event gets the next
        seq and is announced after the commit that also writes ``attrs`` to the archive root and
        ``rows(seq, archived_unix_s, event)`` (group path -> rows), if given.
        Returns a future resolving to the announced event. Call on the event loop thread.
        """
        def build(seq: int, now: float) -> Committed:
            event = pb.RunEvent(seq=seq, run_id=self.run_id, time_m=time_m, iteration=iteration)
            fill(event)
            return Committed(event, attrs=dict(attrs or {}), group_rows=rows(seq, now, event) if rows is not None else {})

        return self._submit(Emission(build)).done

    def _submit(self, emission: Emission) -> Emission:
        self._pending.append(emission)
        self._pending_changed.set()
        return emission

    async def _emit(self, emission: Emission) -> pb.RunEvent:
        """Commit one event and wait until it is archived and announced."""
        return await self._submit(emission).done

    async def _in_archive_thread(self, fn, *args, **kwargs):
        loop = asyncio.get_running_loop()
        return await loop.run_in_executor(self.archive_thread, lambda: fn(*args, **kwargs))

    async def _committer(self) -> None:
        while True:
            while not self._pending:
                self._pending_changed.clear()
                if not self.writer.unfolded_commits:
                    await self._pending_changed.wait()
                    continue
                try:  # an idle run's journal is folded after the policy's age, not left behind
                    await asyncio.wait_for(self._pending_changed.wait(), self.writer.fold_policy.after_s)
                except asyncio.TimeoutError:
                    await self._fold()
            batch, self._pending = self._pending, []
            merged = merge_batch(batch, first_seq=self.log.next_seq, now=time.time())
            try:
                # Durable in the archive's journal when this returns; folded into the arrays
                # after the events are announced (below), never on the way to them.
                await self._in_archive_thread(self.writer.commit, slice_rows=merged.slice_rows,
                                              surface_rows=merged.surface_rows, group_rows=merged.group_rows,
                                              attrs=merged.attrs, fold=False)
            except asyncio.CancelledError:
                for emission in batch:
                    emission.done.cancel()
                raise
            except Exception as exc:
                # Nothing of this batch is announced: it is not archived. Stop taking slices.
                log.exception("run %s: archive commit failed", self.run_id)
                self.failed_reason = f"{type(exc).__name__}: {exc}"
                for emission in batch:
                    if not emission.done.done():
                        emission.done.set_exception(ServiceError(grpc.StatusCode.INTERNAL, self.failed_reason,
                                                                            reason="ARCHIVE_FAILED"))
                continue
            if self.spool is not None and merged.slice_rows:
                # The slices' fates are archived: their spool files may go.
                crash_points.reached("commit-before-release")
                done = [int(row["iteration"]) for row in merged.slice_rows if "iteration" in row]
                self.highest_held = max([self.highest_held, *done])
                await self._in_archive_thread(self.spool.release, done)
            emitted = time.time()
            for emission, event in zip(batch, merged.events):
                event.emit_time_unix_s = emitted
                if emission.apply is not None:
                    emission.apply(event)
                self.log.append(event)
                if not emission.done.done():
                    emission.done.set_result(event)
            if self.writer.fold_due():
                await self._fold()

    async def _fold(self) -> None:
        """Fold the archive's journal into its zarr arrays (on the archive thread). A failure is
        logged and left to the next fold: every commit is durable in the journal already."""
        try:
            await self._in_archive_thread(self.writer.fold)
        except asyncio.CancelledError:
            raise
        except Exception:
            log.exception("run %s: folding the archive journal failed; it is tried again later", self.run_id)
