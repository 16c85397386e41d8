"""One run on the server: its backlog queue, the processing of each slice, the commits of its
events and its lifecycle (open, close, shutdown).

Everything on the event loop thread except the archive writes (one worker thread), the finds
(the :class:`FinderExecutor`, via search.py) and the steering's decisions (a worker thread).
The order of one run's events is the order of its commits: a per-run committer takes every
pending emission (run_events.py), assigns consecutive sequence numbers, writes their rows in one
archive commit on the archive thread, and only then appends the events to the log (an event is
announced as archived only after it is written). A processed slice hands all its events (surfaces,
tracking notices, slice_processed) to the committer at once: one archive commit per slice; the
processor records the outcomes in the decision state (surface states, steering) at once and
goes on to the next slice while the commit is written (write-behind, a bounded lag). With
``slices_in_flight`` above 1 the finds of later slices start before earlier ones are applied
(pipeline.py); outcomes are still applied in iteration order. Made and
restored by run_manager.py and restore.py; parts.py and link_records.py hang off it.
"""

from __future__ import annotations

import asyncio
import errno
import logging
import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Callable

import grpc

from penumbra_shim._wire import horizons_pb2 as pb

from .. import crash_points
from ..archive import ArchiveWriter
from ..numerics.slices import Slice
from ._spec import RunSettings
from ._tracking_convert import warning_notice
from .errors import ServiceError
from .events import EventLog
from .executors import FinderExecutor
from .jobs import SurfaceOutcome
from .link_records import LinkRecords
from .parts import PartAssembly
from .pipeline import InFlight, drive_pipeline, may_overlap
from .run_types import ManagerOptions, QueuedSlice
from .run_events import (AnnouncedSurface, Committed, announced_view, Emission, merge_batch, notice_emission, parts_missing_emission, skip_emission, slice_emission,
                         state_emission, surface_emission)
from .scheduler import SurfacePlan, SurfacePlanner
from .inner_planning import inner_common_plans, search_in_order
from .search import search_plan
from .spool import RunSpool
from .steering import RunSteering
from .surface_state import SurfaceState, record_outcome

__all__ = ["RunRecord", "QueuedSlice", "ManagerOptions"]

log = logging.getLogger("penumbra.server")


#: Processed slices whose commit may still be pending while the next slice is processed.
_COMMITS_BEHIND = 2


def _retrieve(future: asyncio.Future) -> None:
    """Mark a write-behind commit's outcome as seen (a failure is already logged and kept in
    the run's failed_reason by the committer)."""
    if not future.cancelled():
        future.exception()


class RunRecord:
    """One run: spec, archive, queue, processing task, events, latest surfaces."""

    def __init__(
        self,
        *,
        run_id: str,
        settings: RunSettings,
        writer: ArchiveWriter,
        executor: FinderExecutor,
        archive_thread: ThreadPoolExecutor,
        options: ManagerOptions,
        planner: SurfacePlanner,
        created_unix_s: float,
        next_seq: int = 1,
        spool: RunSpool | None = None,
    ) -> None:
        self.run_id = run_id
        self.settings = settings
        self.writer = writer
        self.executor = executor
        self.archive_thread = archive_thread
        self.options = options
        self.planner = planner
        #: What the run knows about each surface (surface_state.py), shared with the steering.
        self.states: dict[str, SurfaceState] = {}
        #: What GetLatestSurfaces shows of each surface: its state as of the last archived
        #: commit (the states above run ahead while a slice's commit is pending). A label
        #: absent here has nothing unarchived: its state is shown.
        self.announced: dict[str, AnnouncedSurface] = {}
        #: The surfaces of the archive, in order: the expected bodies, then those planners added.
        self.surface_labels: list[str] = list(settings.labels)
        #: Last solution of each surface followed in the displacement representation (the inner
        #: common MOTS), the seed of its next search (inner_planning.py).
        self.displaced: dict[str, object] = {}
        #: Tracks, forecasts, common-horizon watch, guidance and windows (steering.py).
        self.steering = RunSteering(settings, interpolation_order=options.interpolation_order,
                                    common_horizon=options.common_horizon, states=self.states)
        attach = getattr(planner, "attach", None)
        if callable(attach):
            attach(self.steering)
        #: The latest announced refinement_guidance and data_windows_wanted events.
        self.latest_guidance_event: pb.RunEvent | None = None
        self.latest_windows_event: pb.RunEvent | None = None
        self.created_unix_s = created_unix_s
        self.closed_unix_s = 0.0
        self.state = pb.Run.STATE_OPEN
        self.log = EventLog(first_seq=next_seq, limit=options.event_log_limit,
                            subscriber_capacity=options.subscriber_queue_size)
        self.accepted_iterations: set[int] = set()
        self.slices_received = 0
        self.slices_processed = 0
        self.slices_skipped = 0
        self.slices_duplicate = 0
        #: Slices sent in parts and processed with parts missing.
        self.slices_incomplete = 0
        #: Slices arriving in parts, per iteration, until complete or past the part deadline.
        self.parts = PartAssembly(self, run_id=run_id, deadline_s=settings.part_deadline_s,
                                  excised_spheres=settings.excised_spheres)
        #: (iteration, time) of the newest slice accepted; the lag of a watcher's view.
        self.last_received: tuple[int, float] = (-1, float("nan"))
        self.state_events: list[dict] = list(writer.attrs.get("state_events", []))
        self.failed_reason = ""
        #: Rejected slices and the client's recorded outages (link_records.py).
        self.link = LinkRecords()
        #: Called after each processed slice with (run, queued slice, outcomes): a hook for
        #: custom tracking. Exceptions are logged, never raised into the run.
        self.slice_observers: list[Callable[["RunRecord", QueuedSlice, list[SurfaceOutcome]], None]] = []
        #: Acknowledged slices kept on disk until archived (spool.py); None: memory only.
        self.spool = spool
        #: Highest iteration archived or spooled (-1: none); slices replayed from the spool at startup.
        self.highest_held = -1
        self.slices_replayed = 0
        self._queue: deque[QueuedSlice] = deque()
        self._queue_changed = asyncio.Event()
        self._closing = False
        self._closed = asyncio.Event()
        #: Slices whose finds were started and whose outcomes are not yet applied, oldest first.
        self._flight: deque[InFlight] = deque()
        #: Surfaces a plan added whose archive group is being created.
        self._adding: dict[str, asyncio.Future] = {}
        self._pending: list[Emission] = []
        #: Commits of processed slices not yet written (write-behind), oldest first.
        self._behind: deque[asyncio.Future] = deque()
        self._pending_changed = asyncio.Event()
        self._committer_task = asyncio.create_task(self._committer(), name=f"{run_id}-committer")
        self._processor_task = asyncio.create_task(self._processor(), name=f"{run_id}-processor")

    # -- description --------------------------------------------------------------------------

    @property
    def is_open(self) -> bool:
        return self.state == pb.Run.STATE_OPEN and not self._closing

    @property
    def archive_path(self) -> Path:
        return self.writer.path

    def to_wire(self) -> pb.Run:
        return pb.Run(
            run_id=self.run_id,
            spec=self.settings.to_wire(),
            state=self.state,
            create_time_unix_s=self.created_unix_s,
            close_time_unix_s=self.closed_unix_s,
            slices_received=self.slices_received,
            slices_processed=self.slices_processed,
            slices_skipped=self.slices_skipped,
            slices_duplicate=self.slices_duplicate,
            last_event_seq=self.log.last_seq,
            archive_path=str(self.archive_path),
            last_received_iteration=self.last_received[0],
            last_received_time_m=self.last_received[1],
            slices_incomplete=self.slices_incomplete,
            client_gaps_recorded=self.link.gaps_recorded,
            slices_rejected=self.link.slices_rejected,
            highest_held_iteration=self.highest_held,
            slices_spooled=self.spool.count if self.spool is not None else 0,
            slices_replayed=self.slices_replayed,
        )

    def latest_surfaces(self) -> pb.GetLatestSurfacesResponse:
        response = pb.GetLatestSurfacesResponse(last_event_seq=self.log.last_seq)
        for label in self.surface_labels:
            view = self.announced.get(label) or announced_view(self.states[label])
            entry = response.surfaces.add(
                label=label,
                latest_attempt_found=view.latest_attempt_found,
                latest_attempt_iteration=view.latest_attempt_iteration,
                latest_attempt_message=view.latest_attempt_message,
                consecutive_misses=view.consecutive_misses,
            )
            if view.latest_found is not None:
                entry.latest_found.CopyFrom(view.latest_found)
        return response

    def latest_guidance(self) -> pb.GetLatestGuidanceResponse:
        response = pb.GetLatestGuidanceResponse(last_event_seq=self.log.last_seq)
        if self.latest_guidance_event is not None:
            response.guidance.CopyFrom(self.latest_guidance_event.refinement_guidance)
        if self.latest_windows_event is not None:
            response.windows.CopyFrom(self.latest_windows_event.data_windows_wanted)
        return response

    # -- ingest -------------------------------------------------------------------------------

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

    # -- processing ---------------------------------------------------------------------------

    async def _processor(self) -> None:
        await drive_pipeline(self._queue, self._queue_changed, self._flight,
                             depth=max(1, self.options.slices_in_flight), closing=lambda: self._closing,
                             launch=self._launch, apply=self._apply_or_fail)

    def _launch(self, item: QueuedSlice, overlapping: bool) -> InFlight | None:
        """Plan ``item`` from what the decision state knows now (slices still in flight not yet
        applied: their surfaces are seeded from the forecast) and start its finds; None when
        ``overlapping`` and a plan needs those slices' outcomes (:func:`~.pipeline.may_overlap`)."""
        started = time.time()
        try:
            plans = list(self.planner.plan(self.settings, self.tracks, item.slice_))
            plans += inner_common_plans(self.settings, plans, self.steering.common_label, self.states, self.displaced)
        except Exception as exc:  # reported in order, when this slice's turn comes
            if overlapping:
                return None
            failed = asyncio.get_running_loop().create_future()
            failed.set_exception(exc)
            return InFlight(item, started, [], failed)
        if overlapping and not all(may_overlap(plan) for plan in plans):
            return None
        additions = []
        for plan in plans:
            if plan.label not in self.surface_labels:  # a surface the planner added (e.g. a common horizon)
                adding = self._adding.get(plan.label)
                if adding is None:
                    adding = self._adding[plan.label] = asyncio.ensure_future(self._add_surface(plan))
                additions.append(adding)
        return InFlight(item, started, plans, asyncio.ensure_future(self._search(item, plans, additions)))

    async def _add_surface(self, plan: SurfacePlan) -> None:
        try:
            await self._in_archive_thread(self.writer.add_surface, plan.label, lmax=plan.lmax or self.settings.lmax)
            self.surface_labels.append(plan.label)
            self.states.setdefault(plan.label, SurfaceState(plan.label))
        finally:
            self._adding.pop(plan.label, None)

    async def _search(self, item: QueuedSlice, plans: list[SurfacePlan], additions: list) -> list[SurfaceOutcome]:
        for adding in additions:  # its rows need the surface's archive group
            await adding
        # Searches inside a surface of this slice (the inner common MOTS) wait for that surface.
        return await search_in_order(plans, lambda plan: self._attempt(plan, item), self.displaced)

    async def _apply_or_fail(self, flight: InFlight) -> None:
        try:
            await self._apply(flight)
        except asyncio.CancelledError:
            raise
        except Exception as exc:  # a bug in planning must not stop the run; the slice is marked failed
            log.exception("run %s: processing iteration %d failed", self.run_id, flight.item.iteration)
            await self._emit(slice_emission(self, flight.item, attempted=0, found=0, started=flight.started,
                                            error=f"{type(exc).__name__}: {exc}"))

    async def _apply(self, flight: InFlight) -> None:
        """Record the outcomes of the oldest slice in flight (iteration order), observe, commit."""
        item, started, plans = flight.item, flight.started, flight.plans
        outcomes = await flight.finds
        # The decision state (what the next plan and the steering see) takes the outcomes now;
        # what GetLatestSurfaces shows moves only when the slice's commit is written.
        surface_units = []
        for plan, outcome in zip(plans, outcomes):
            state = self.states[outcome.label]
            self.announced.setdefault(outcome.label, announced_view(state))
            record_outcome(state, outcome, time=item.slice_.time, iteration=item.iteration)
            surface_units.append(surface_emission(self, item, outcome, plan, view=announced_view(state)))
        searched = [o for o, plan in zip(outcomes, plans) if plan.search]
        found = sum(1 for o in searched if o.found)
        try:
            # Fits and interpolation of the shift: off the event loop (the state is this run's alone).
            notices = await asyncio.to_thread(self.steering.observe, item.slice_, plans, outcomes)
        except Exception as exc:  # tracking must not stop the run; say so instead
            log.exception("run %s: tracking iteration %d failed", self.run_id, item.iteration)
            text = f"tracking and guidance not updated for iteration {item.iteration}: {type(exc).__name__}: {exc}"
            notices = [warning_notice(pb.RunWarning.KIND_TRACKING, "", text)]
        # Every row of the slice goes to the committer at once (no await in between): one
        # archive commit per slice, its events announced together after it is written.
        for unit in surface_units:
            self._submit(unit)
        for notice in notices:
            self._submit(notice_emission(self, item, notice))
        # Write-behind: the next slice's plan needs only the decision state (updated above), so
        # the processor goes on while this commit is written; its events are announced after it,
        # in order. At most _COMMITS_BEHIND slices wait for their commit (bounded memory).
        done = self._submit(slice_emission(self, item, attempted=len(searched), found=found, started=started)).done
        done.add_done_callback(_retrieve)
        self._behind.append(done)
        while len(self._behind) > _COMMITS_BEHIND or (self._behind and self._behind[0].done()):
            oldest = self._behind.popleft()
            await asyncio.wait([oldest])
        for observer in self.slice_observers:
            try:
                observer(self, item, list(outcomes))
            except Exception:
                log.exception("run %s: slice observer failed", self.run_id)

    async def _attempt(self, plan: SurfacePlan, item: QueuedSlice) -> SurfaceOutcome:
        return await search_plan(plan, item.slice_, executor=self.executor, settings=self.settings,
                                 interpolation_order=self.options.interpolation_order)

    # -- commits ----------------------------------------------------------------------------------

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
                await self._pending_changed.wait()
            batch, self._pending = self._pending, []
            merged = merge_batch(batch, first_seq=self.log.next_seq, now=time.time())
            try:
                await self._in_archive_thread(self.writer.commit, slice_rows=merged.slice_rows,
                                              surface_rows=merged.surface_rows, group_rows=merged.group_rows,
                                              attrs=merged.attrs)
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

    # -- lifecycle ------------------------------------------------------------------------------

    async def announce_state(self, state: int, reason: str) -> None:
        await self._emit(state_emission(self, state, reason))

    async def close(self, reason: str = "closed by the client") -> None:
        """Refuse new slices, process those queued, announce CLOSED, end watcher streams."""
        if self.state == pb.Run.STATE_CLOSED:
            return
        if self._closing:
            await self._closed.wait()
            return
        self.parts.flush("the run was closed before every part arrived")
        self._closing = True
        self._queue_changed.set()
        await self._processor_task
        await asyncio.gather(*(o.drain() for o in self.slice_observers if hasattr(o, "drain")))  # formation.py
        await self.announce_state(pb.Run.STATE_CLOSED, reason)
        if self.spool is not None:  # every acknowledged slice is archived now
            await self._in_archive_thread(self.spool.remove_all)
        self.state = pb.Run.STATE_CLOSED
        self.closed_unix_s = time.time()
        self.log.close()
        self._committer_task.cancel()
        self._closed.set()

    def mark_closed(self, closed_unix_s: float) -> None:
        """A run loaded closed from its archive: no processing, its log ends after the held events."""
        self._closing = True
        self.parts.cancel()
        self.state = pb.Run.STATE_CLOSED
        self.closed_unix_s = closed_unix_s
        self._processor_task.cancel()
        self._committer_task.cancel()
        self.log.close()
        self._closed.set()

    async def shutdown(self) -> None:
        """Server stopping: stop processing, let the commit in flight finish, keep the run open on disk.
        Parts of unfinished slices are dropped (they live in memory only)."""
        self.parts.cancel()
        self._processor_task.cancel()
        try:
            await self._processor_task
        except (asyncio.CancelledError, Exception):
            pass
        for flight in self._flight:  # finds of slices not applied: their outcomes would be lost anyway
            flight.finds.cancel()
        # Commits already pending (e.g. results of finished finds) are written before leaving.
        while self._pending and not self.failed_reason:
            await asyncio.sleep(0.01)
        self._committer_task.cancel()
        try:
            await self._committer_task
        except (asyncio.CancelledError, Exception):
            pass

    @property
    def tracks(self) -> dict[str, SurfaceState]:
        """The planners' view: the state of each surface of the archive."""
        return {label: self.states[label] for label in self.surface_labels}
