"""Runs on the server: backlog queue, per-run processing, archive commits, event emission.

Everything on the event loop thread except the archive writes (one worker thread) and the
finds (the :class:`FinderExecutor`). The order of one run's events is the order of its commits:
a per-run committer takes every pending emission, assigns consecutive sequence numbers,
writes their rows in one archive commit on the archive thread, and only then appends the events
to the log (an event is announced as archived only after it is written).
"""

from __future__ import annotations

import asyncio
import logging
import secrets
import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Sequence

import grpc
import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import ArchiveView, ArchiveWriter, archive_path, list_archives, open_archive
from ..numerics.slices import Slice
from ..numerics.surfaces import Surface
from . import _convert as convert
from ._spec import RunSettings
from .errors import ServiceError
from .events import EventLog
from .executors import FinderExecutor
from ..archive import _layout as layout
from .parts import PartAssembly
from .link_records import LinkRecords
from .jobs import REASON_NOT_CONVERGED, REASON_NOT_SEARCHED, REASON_OUTSIDE_DATA, SurfaceJob, SurfaceOutcome, crop_slice
from .planning import steering_planner_factory
from .scheduler import SurfacePlan, SurfacePlanner, SurfaceTrack
from .steering import Notice, RunSteering, decode_wire, encode_wire

__all__ = ["RunManager", "RunRecord", "QueuedSlice", "ManagerOptions"]

log = logging.getLogger("penumbra.server")


def software_version() -> str:
    """The installed penumbra-horizons distribution's version (recorded in every archive)."""
    from importlib import metadata

    try:
        return metadata.version("penumbra-horizons")
    except metadata.PackageNotFoundError:
        return "unknown"

_STATE_NAMES = {pb.Run.STATE_OPEN: "open", pb.Run.STATE_CLOSED: "closed"}
_STATE_VALUES = {v: k for k, v in _STATE_NAMES.items()}


@dataclass(frozen=True)
class ManagerOptions:
    """Server-wide run options."""

    default_queue_depth: int = 4
    event_log_limit: int = 100_000
    subscriber_queue_size: int = 1024
    interpolation_order: int = 4
    common_horizon: bool = True


@dataclass(frozen=True, eq=False)
class QueuedSlice:
    """An assembled slice waiting to be processed."""

    slice_: Slice
    nbytes: int
    arrival_unix_s: float

    @property
    def iteration(self) -> int:
        return self.slice_.iteration


@dataclass(eq=False)
class _Emission:
    """One event to commit: ``build(seq, archived_unix_s)`` makes the event and its rows:
    (event, slice rows, label -> surface rows, root attributes[, group path -> tracking rows])."""

    build: Callable[[int, float], tuple]
    apply: Callable[[pb.RunEvent], None] | None
    done: asyncio.Future = field(default_factory=lambda: asyncio.get_running_loop().create_future())


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
    ) -> None:
        self.run_id = run_id
        self.settings = settings
        self.writer = writer
        self.executor = executor
        self.archive_thread = archive_thread
        self.options = options
        self.planner = planner
        #: Tracks, forecasts, common-horizon watch, guidance and windows (steering.py).
        self.steering = RunSteering(settings, interpolation_order=options.interpolation_order,
                                    common_horizon=options.common_horizon)
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
        self.tracks: dict[str, SurfaceTrack] = {label: SurfaceTrack(label) for label in settings.labels}
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
        #: tracking and guidance (issue 4). Exceptions are logged, never raised into the run.
        self.slice_observers: list[Callable[["RunRecord", QueuedSlice, list[SurfaceOutcome]], None]] = []
        self._queue: deque[QueuedSlice] = deque()
        self._queue_changed = asyncio.Event()
        self._closing = False
        self._closed = asyncio.Event()
        self._pending: list[_Emission] = []
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
        )

    def latest_surfaces(self) -> pb.GetLatestSurfacesResponse:
        response = pb.GetLatestSurfacesResponse(last_event_seq=self.log.last_seq)
        for label, track in self.tracks.items():
            entry = response.surfaces.add(
                label=label,
                latest_attempt_found=track.latest_attempt_found,
                latest_attempt_iteration=track.latest_attempt_iteration,
                latest_attempt_message=track.latest_attempt_message,
                consecutive_misses=track.consecutive_misses,
            )
            if track.latest_found is not None:
                entry.latest_found.CopyFrom(track.latest_found)
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
                               f"run_id: run {self.run_id} stopped after an archive failure: {self.failed_reason}")
        if not self.is_open:
            raise ServiceError(grpc.StatusCode.FAILED_PRECONDITION,
                               f"run_id: run {self.run_id} is closed; open a new run to send more slices")

    def is_duplicate(self, iteration: int) -> bool:
        return iteration in self.accepted_iterations

    def duplicate_response(self, iteration: int, received_bytes: int) -> pb.SendSliceResponse:
        self.slices_duplicate += 1
        return pb.SendSliceResponse(run_id=self.run_id, iteration=iteration,
                                    outcome=pb.SendSliceResponse.OUTCOME_DUPLICATE,
                                    received_bytes=received_bytes, queue_position=-1, parts_received=1,
                                    parts_expected=1)

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
            self._submit(self._skip_emission(old, superseded_by=item))
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

    def accept_assembled(self, slice_: Slice | None, nbytes: int,
                         report: pb.SlicePartsMissing | None) -> pb.SendSliceResponse | None:
        """Take a slice assembled from parts (parts.PartSink): announce ``report`` (parts missing)
        first, then queue the slice as :meth:`accept` does; ``slice_`` None: given up, nothing queued."""
        if report is not None:
            self._submit(self._parts_missing_emission(report))
            if slice_ is not None:
                self.slices_incomplete += 1
        if slice_ is None:
            return None
        return self.accept(QueuedSlice(slice_=slice_, nbytes=nbytes, arrival_unix_s=time.time()))

    # -- processing ---------------------------------------------------------------------------

    async def _processor(self) -> None:
        while True:
            while not self._queue:
                if self._closing:
                    return
                self._queue_changed.clear()
                await self._queue_changed.wait()
            item = self._queue.popleft()
            try:
                await self._process(item)
            except asyncio.CancelledError:
                raise
            except Exception as exc:  # a bug in planning must not stop the run; the slice is marked failed
                log.exception("run %s: processing iteration %d failed", self.run_id, item.iteration)
                await self._emit(self._slice_emission(item, attempted=0, found=0, started=time.time(),
                                                      error=f"{type(exc).__name__}: {exc}"))

    async def _process(self, item: QueuedSlice) -> None:
        started = time.time()
        plans = list(self.planner.plan(self.settings, self.tracks, item.slice_))
        for plan in plans:
            if plan.label not in self.tracks:  # a surface the planner added (e.g. a common horizon)
                await self._in_archive_thread(self.writer.add_surface, plan.label, lmax=plan.lmax or self.settings.lmax)
                self.tracks[plan.label] = SurfaceTrack(plan.label)
        outcomes = list(await asyncio.gather(*(self._attempt(plan, item) for plan in plans)))
        searched = [o for o, plan in zip(outcomes, plans) if plan.search]
        found = sum(1 for o in searched if o.found)
        try:
            # Fits and interpolation of the shift: off the event loop (the state is this run's alone).
            notices = await asyncio.to_thread(self.steering.observe, item.slice_, plans, outcomes)
        except Exception as exc:  # tracking must not stop the run; say so instead
            log.exception("run %s: tracking iteration %d failed", self.run_id, item.iteration)
            text = f"tracking and guidance not updated for iteration {item.iteration}: {type(exc).__name__}: {exc}"
            notices = [Notice("warning", pb.RunWarning(kind=pb.RunWarning.KIND_TRACKING, message=text), message=text)]
        for notice in notices:
            self._submit(self._notice_emission(item, notice))
        await self._emit(self._slice_emission(item, attempted=len(searched), found=found, started=started))
        for observer in self.slice_observers:
            try:
                observer(self, item, list(outcomes))
            except Exception:
                log.exception("run %s: slice observer failed", self.run_id)

    async def _attempt(self, plan: SurfacePlan, item: QueuedSlice) -> SurfaceOutcome:
        if not plan.search:
            outcome = SurfaceOutcome(label=plan.label, found=False, reason=REASON_NOT_SEARCHED, status=-1,
                                     message=plan.note or "not searched in this slice")
        else:
            outcome = await self._find(plan, item.slice_)
            if outcome.reason == REASON_OUTSIDE_DATA and plan.retry_wider:
                # The crop may have cut what the surface needs: once more on twice the region.
                outcome = await self._find(plan.widened(2.0), item.slice_)
            if outcome.found and plan.must_enclose:
                outside = plan.points_outside(Surface(outcome.centre, outcome.lmax, outcome.coefficients))
                if outside:
                    where = ", ".join(str(np.round(p, 4).tolist()) for p in outside)
                    outcome = SurfaceOutcome(
                        label=plan.label, found=False, reason=REASON_NOT_CONVERGED, status=outcome.status,
                        message=f"the surface found does not enclose {where}, which it must hold inside: not accepted",
                        method=outcome.method, residual_max=outcome.residual_max, iterations=outcome.iterations,
                        wall_time_s=outcome.wall_time_s)
        await self._emit(self._surface_emission(item, outcome, plan))
        return outcome

    async def _find(self, plan: SurfacePlan, slice_: Slice) -> SurfaceOutcome:
        order = self.options.interpolation_order
        data = crop_slice(slice_, plan.box_lower, plan.box_upper, ghost_nodes=order + 2)
        if data is None:
            lo, hi = plan.box_lower, plan.box_upper
            return SurfaceOutcome(
                label=plan.label, found=False, reason=REASON_OUTSIDE_DATA, status=-1,
                message=(f"no patch of the slice overlaps the region around {plan.label!r} "
                         f"({np.round(lo, 3).tolist()} .. {np.round(hi, 3).tolist()})"),
            )
        job = SurfaceJob(
            label=plan.label,
            data=data,
            lmax=plan.lmax or self.settings.lmax,
            tolerance=self.settings.tolerance,
            max_iterations=self.settings.max_iterations,
            interpolation_order=order,
            fallback_to_flow=plan.fallback_to_flow,
            seed=plan.seed,
            extra_seeds=tuple(plan.extra_seeds),
            scan_centre=plan.scan_centre,
            scan_radii=plan.scan_radii,
        )
        return await self.executor.run(job)

    # -- emissions ------------------------------------------------------------------------------

    def _surface_emission(self, item: QueuedSlice, outcome: SurfaceOutcome, plan: SurfacePlan | None = None) -> _Emission:
        slice_ = item.slice_

        def build(seq: int, now: float):
            latency = now - item.arrival_unix_s
            event = pb.RunEvent(seq=seq, run_id=self.run_id, time_m=slice_.time, iteration=slice_.iteration)
            if outcome.found:
                event.surface_found.surface.CopyFrom(
                    convert.surface_result_from_outcome(outcome, time_m=slice_.time, iteration=slice_.iteration,
                                                        latency_s=latency))
            else:
                event.surface_not_found.CopyFrom(convert.not_found_from_outcome(outcome, latency_s=latency))
            label, row = convert.surface_row(event, now)
            if plan is not None and plan.seed_position is not None:
                row.update(seed_centre=np.asarray(plan.seed_position, float), seed_uncertainty=plan.seed_uncertainty,
                           seed_model=layout.FORECAST_MODELS.get(plan.seed_model, 0))
            else:
                row.update(seed_model=0)
            return event, [], {label: [row]}, {}

        def apply(event: pb.RunEvent) -> None:
            track = self.tracks[outcome.label]
            if outcome.found:
                surface = Surface(outcome.centre, outcome.lmax, outcome.coefficients)
                q = event.surface_found.surface.quantities
                centroid = np.array([q.centroid_m.x, q.centroid_m.y, q.centroid_m.z])
                if not np.all(np.isfinite(centroid)):
                    centroid = np.asarray(outcome.centre, dtype=float)
                radius_max = q.radius_max_m if np.isfinite(q.radius_max_m) else 1.5 * surface.mean_radius
                track.record_found(surface, centroid, radius_max, event.surface_found.surface,
                                   iteration=slice_.iteration, time=slice_.time)
            else:
                track.record_miss(outcome.message, slice_.iteration)

        return _Emission(build, apply)

    def _notice_emission(self, item: QueuedSlice, notice: Notice) -> _Emission:
        """A tracking event of ``notice`` (steering.py) with its rows and its archived wire form."""
        slice_ = item.slice_

        def build(seq: int, now: float):
            event = pb.RunEvent(seq=seq, run_id=self.run_id, time_m=slice_.time, iteration=slice_.iteration)
            getattr(event, notice.kind).CopyFrom(notice.payload)
            rows = {path: [dict(row, event_seq=seq) for row in group] for path, group in notice.group_rows.items()}
            rows[layout.EVENTS_GROUP] = [{
                "seq": seq, "kind": notice.kind, "iteration": slice_.iteration, "time": slice_.time,
                "label": notice.label, "message": notice.message, "wire": encode_wire(event), "archived_unix_s": now,
            }]
            return event, [], {}, {}, rows

        def apply(event: pb.RunEvent) -> None:
            if notice.kind == "refinement_guidance":
                self.latest_guidance_event = event
            elif notice.kind == "data_windows_wanted":
                self.latest_windows_event = event

        return _Emission(build, apply)

    def _parts_missing_emission(self, report: pb.SlicePartsMissing) -> _Emission:
        """The slice_parts_missing event, archived with the tracking events (replayed after a restart)."""
        def build(seq: int, now: float):
            event = pb.RunEvent(seq=seq, run_id=self.run_id, time_m=report.time_m, iteration=report.iteration)
            event.slice_parts_missing.CopyFrom(report)
            rows = {layout.EVENTS_GROUP: [{
                "seq": seq, "kind": "slice_parts_missing", "iteration": report.iteration, "time": report.time_m,
                "label": "", "message": report.message, "wire": encode_wire(event), "archived_unix_s": now,
            }]}
            return event, [], {}, {}, rows

        return _Emission(build, None)

    def _slice_emission(self, item: QueuedSlice, *, attempted: int, found: int, started: float,
                        error: str = "") -> _Emission:
        def build(seq: int, now: float):
            event = pb.RunEvent(seq=seq, run_id=self.run_id, time_m=item.slice_.time, iteration=item.iteration)
            event.slice_processed.CopyFrom(pb.SliceProcessed(
                surfaces_attempted=attempted, surfaces_found=found,
                latency_s=now - item.arrival_unix_s, queue_wait_s=max(0.0, started - item.arrival_unix_s),
                error=error))
            row = convert.slice_row(event, arrival_unix_s=item.arrival_unix_s, nbytes=item.nbytes,
                                    archived_unix_s=now)
            return event, [row], {}, {}

        def apply(event: pb.RunEvent) -> None:
            self.slices_processed += 1

        return _Emission(build, apply)

    def _skip_emission(self, old: QueuedSlice, *, superseded_by: QueuedSlice) -> _Emission:
        def build(seq: int, now: float):
            event = pb.RunEvent(seq=seq, run_id=self.run_id, time_m=old.slice_.time, iteration=old.iteration)
            event.slice_skipped.CopyFrom(pb.SliceSkipped(
                skipped_iteration=old.iteration, skipped_time_m=old.slice_.time,
                superseded_by_iteration=superseded_by.iteration))
            row = convert.slice_row(event, arrival_unix_s=old.arrival_unix_s, nbytes=old.nbytes, archived_unix_s=now)
            return event, [row], {}, {}

        return _Emission(build, None)

    def _state_emission(self, state: int, reason: str) -> _Emission:
        def build(seq: int, now: float):
            event = pb.RunEvent(seq=seq, run_id=self.run_id)
            event.run_state_changed.CopyFrom(pb.RunStateChanged(state=state, reason=reason))
            self.state_events.append({"seq": seq, "state": _STATE_NAMES[state], "reason": reason, "unix_s": now})
            attrs = {"state": _STATE_NAMES[state], "state_events": list(self.state_events)}
            if state == pb.Run.STATE_CLOSED:
                attrs["closed_unix_s"] = now
            return event, [], {}, attrs

        return _Emission(build, None)

    def publish(self, fill: Callable[[pb.RunEvent], None], *, time_m: float = 0.0, iteration: int = 0,
                attrs: dict | None = None,
                rows: Callable[[int, float, pb.RunEvent], dict[str, list[dict]]] | None = None) -> asyncio.Future:
        """Emit an event of another kind (the hook for tracking and guidance, issue 4).

        ``fill(event)`` sets the event's kind (e.g. a guidance message); the event gets the next
        seq and is announced after the commit that also writes ``attrs`` to the archive root and
        ``rows(seq, archived_unix_s, event)`` (group path -> rows), if given.
        Returns a future resolving to the announced event. Call on the event loop thread.
        """
        def build(seq: int, now: float):
            event = pb.RunEvent(seq=seq, run_id=self.run_id, time_m=time_m, iteration=iteration)
            fill(event)
            return event, [], {}, dict(attrs or {}), (rows(seq, now, event) if rows is not None else {})

        return self._submit(_Emission(build, None)).done

    def _submit(self, emission: _Emission) -> _Emission:
        self._pending.append(emission)
        self._pending_changed.set()
        return emission

    async def _emit(self, emission: _Emission) -> pb.RunEvent:
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
            now = time.time()
            seq = self.log.next_seq
            built = []
            slice_rows: list[dict] = []
            surface_rows: dict[str, list[dict]] = {}
            group_rows: dict[str, list[dict]] = {}
            attrs: dict = {}
            for emission in batch:
                parts = emission.build(seq, now)
                event, s_rows, f_rows, e_attrs = parts[:4]
                built.append(event)
                slice_rows.extend(s_rows)
                for label, rows in f_rows.items():
                    surface_rows.setdefault(label, []).extend(rows)
                for path, rows in (parts[4] if len(parts) > 4 else {}).items():
                    group_rows.setdefault(path, []).extend(rows)
                attrs.update(e_attrs)
                seq += 1
            attrs["next_event_seq"] = seq
            try:
                await self._in_archive_thread(self.writer.commit, slice_rows=slice_rows, surface_rows=surface_rows,
                                              group_rows=group_rows, attrs=attrs)
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
                        emission.done.set_exception(ServiceError(grpc.StatusCode.INTERNAL, self.failed_reason))
                continue
            emitted = time.time()
            for emission, event in zip(batch, built):
                event.emit_time_unix_s = emitted
                if emission.apply is not None:
                    emission.apply(event)
                self.log.append(event)
                if not emission.done.done():
                    emission.done.set_result(event)

    # -- lifecycle ------------------------------------------------------------------------------

    async def announce_state(self, state: int, reason: str) -> None:
        await self._emit(self._state_emission(state, reason))

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
        await self.announce_state(pb.Run.STATE_CLOSED, reason)
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
        # Commits already pending (e.g. results of finished finds) are written before leaving.
        while self._pending and not self.failed_reason:
            await asyncio.sleep(0.01)
        self._committer_task.cancel()
        try:
            await self._committer_task
        except (asyncio.CancelledError, Exception):
            pass

    # -- restore ----------------------------------------------------------------------------------

    @staticmethod
    def read_archive(path: Path) -> tuple[ArchiveView, dict, dict, dict]:
        """(view, slice columns, label -> surface columns, tracking events): the disk reads of a
        restore (any thread)."""
        view = open_archive(path)
        return (view, view.slices(), {label: view.surface(label) for label in view.surface_labels},
                view.tracking_events())

    def restore_from_archive(self, view: ArchiveView, slices: dict, surfaces: dict,
                             tracking_events: dict | None = None) -> None:
        """Rebuild counters, tracks and the event log from :meth:`read_archive` output (restart)."""
        tracking_events = tracking_events or {}
        events: list[pb.RunEvent] = []
        n = len(slices.get("iteration", []))
        for i in range(n):
            row = {name: values[i] for name, values in slices.items()}
            self.accepted_iterations.add(int(row["iteration"]))
            events.append(convert.slice_event_from_row(self.run_id, row))
        if n:
            newest = int(np.argmax(slices["iteration"]))
            self.last_received = (int(slices["iteration"][newest]), float(slices["time"][newest]))
        outcome = slices.get("outcome", np.zeros(0))
        self.slices_received = n
        self.slices_skipped = int(np.sum(outcome == 2))
        self.slices_processed = n - self.slices_skipped
        for label, cols in surfaces.items():
            track = self.tracks.setdefault(label, SurfaceTrack(label))
            for i in range(len(cols["iteration"])):
                row = {name: values[i] for name, values in cols.items()}
                event = convert.surface_event_from_row(self.run_id, label, row, view.surface_lmax(label))
                events.append(event)
                if event.WhichOneof("kind") == "surface_found":
                    s = event.surface_found.surface
                    q = s.quantities
                    surface = Surface(row["centre"], view.surface_lmax(label), row["coefficients"])
                    centroid = np.array([q.centroid_m.x, q.centroid_m.y, q.centroid_m.z])
                    if not np.all(np.isfinite(centroid)):
                        centroid = surface.centre
                    radius_max = q.radius_max_m if np.isfinite(q.radius_max_m) else 1.5 * surface.mean_radius
                    track.record_found(surface, centroid, radius_max, s, iteration=int(row["iteration"]),
                                       time=float(row["time"]))
                else:
                    track.record_miss(event.surface_not_found.message, int(row["iteration"]))
        # Tracking events come back from their archived wire form, exactly as announced.
        for index, wire in enumerate(tracking_events.get("wire", [])):
            event = decode_wire(wire)
            event.emit_time_unix_s = float(tracking_events["archived_unix_s"][index])
            events.append(event)
            kind = event.WhichOneof("kind")
            if kind == "refinement_guidance":
                self.latest_guidance_event = event
            elif kind == "data_windows_wanted":
                self.latest_windows_event = event
            elif kind == "slice_parts_missing":
                if event.slice_parts_missing.disposition == pb.SlicePartsMissing.DISPOSITION_PROCESSED:
                    self.slices_incomplete += 1
                else:
                    self.parts.given_up.add(int(event.iteration))
        self.steering.restore(surfaces, tracking_events)
        self.link.restore(view.client_gaps(), tracking_events)
        for entry in self.state_events:
            event = pb.RunEvent(seq=int(entry["seq"]), run_id=self.run_id, emit_time_unix_s=float(entry["unix_s"]))
            event.run_state_changed.CopyFrom(
                pb.RunStateChanged(state=_STATE_VALUES[entry["state"]], reason=entry.get("reason", "")))
            events.append(event)
        self.log.preload(events)


def _new_run_id() -> str:
    return f"run-{secrets.token_hex(6)}"


class RunManager:
    """All runs of one server."""

    def __init__(self, *, archive_root: Path, executor: FinderExecutor, options: ManagerOptions,
                 planner_factory: Callable[[RunSettings], SurfacePlanner] | None = None,
                 slice_observer_factory: Callable[[RunSettings], Sequence[Callable]] | None = None) -> None:
        self.archive_root = Path(archive_root)
        self.executor = executor
        self.options = options
        self.planner_factory = planner_factory or steering_planner_factory
        self.slice_observer_factory = slice_observer_factory
        self.archive_thread = ThreadPoolExecutor(max_workers=1, thread_name_prefix="penumbra-archive")
        self.runs: dict[str, RunRecord] = {}
        self._request_ids: dict[str, str] = {}
        self._open_lock = asyncio.Lock()

    def get(self, run_id: str) -> RunRecord:
        try:
            return self.runs[run_id]
        except KeyError:
            shown = run_id if run_id else "(empty)"
            raise ServiceError.not_found(f"run_id: no run {shown} on this server") from None

    async def open_run(self, spec: pb.RunSpec, request_id: str = "") -> RunRecord:
        if len(request_id) > 64:
            raise ServiceError.invalid(f"request_id: at most 64 characters, got {len(request_id)}")
        settings = RunSettings.from_wire(spec, default_queue_depth=self.options.default_queue_depth)
        # Shielded: a caller whose deadline passes mid-way must not leave an archive without its
        # run; its retry with the same request id finds the run this call goes on to make.
        return await asyncio.shield(self._open_run(settings, request_id))

    async def _open_run(self, settings: RunSettings, request_id: str) -> RunRecord:
        async with self._open_lock:  # a retried OpenRun must find the run its first call made
            if request_id and request_id in self._request_ids:
                return self.get(self._request_ids[request_id])
            run_id = _new_run_id()
            while run_id in self.runs or archive_path(self.archive_root, run_id).exists():
                run_id = _new_run_id()
            created = time.time()
            loop = asyncio.get_running_loop()
            writer = await loop.run_in_executor(
                self.archive_thread,
                lambda: ArchiveWriter.create(
                    self.archive_root, run_id, name=settings.display_name, run_spec=settings.to_dict(),
                    surface_labels=settings.labels, lmax=settings.lmax, software_version=software_version(),
                    created_unix_s=created,
                ),
            )
            if request_id:  # kept in the archive: a retry after a server restart finds the run too
                await loop.run_in_executor(self.archive_thread,
                                           lambda: writer.commit(attrs={"open_request_id": request_id}))
            run = self._make_record(run_id, settings, writer, created, next_seq=1)
            if request_id:
                self._request_ids[request_id] = run_id
        await run.announce_state(pb.Run.STATE_OPEN, "opened")
        return run

    def _make_record(self, run_id, settings, writer, created, *, next_seq: int) -> RunRecord:
        run = RunRecord(
            run_id=run_id, settings=settings, writer=writer, executor=self.executor,
            archive_thread=self.archive_thread, options=self.options,
            planner=self.planner_factory(settings), created_unix_s=created, next_seq=next_seq,
        )
        if self.slice_observer_factory is not None:
            run.slice_observers.extend(self.slice_observer_factory(settings))
        self.runs[run_id] = run
        return run

    async def restore(self) -> list[str]:
        """Load the runs of the archive root (a restarted server): open runs are re-opened and
        take slices again; closed ones are listed and watchable. Returns the re-opened ids."""
        loop = asyncio.get_running_loop()
        reopened = []
        summaries = await loop.run_in_executor(self.archive_thread, list_archives, self.archive_root)
        for summary in summaries:
            if summary.run_id in self.runs or summary.state not in ("open", "closed"):
                continue
            try:
                writer = await loop.run_in_executor(self.archive_thread, ArchiveWriter.open_existing, summary.path)
                attrs = writer.attrs
                settings = RunSettings.from_dict(attrs["run_spec"])
                # Read before the run is registered: no slice may reach it half restored.
                rows = await loop.run_in_executor(self.archive_thread, RunRecord.read_archive, summary.path)
                run = self._make_record(summary.run_id, settings, writer, float(attrs["created_unix_s"]),
                                        next_seq=int(attrs.get("next_event_seq", 1)))
                run.restore_from_archive(*rows)
                if attrs.get("open_request_id"):
                    self._request_ids[str(attrs["open_request_id"])] = summary.run_id
            except Exception:
                log.exception("could not load run archive %s", summary.path)
                self.runs.pop(summary.run_id, None)
                continue
            if summary.state == "closed":
                run.mark_closed(float(attrs.get("closed_unix_s") or 0.0))
                continue
            await run.announce_state(pb.Run.STATE_OPEN, "re-opened from its archive after a server restart")
            reopened.append(summary.run_id)
        return reopened

    def list_runs(self) -> list[RunRecord]:
        return sorted(self.runs.values(), key=lambda r: (-r.created_unix_s, r.run_id))

    def stop_watchers(self) -> None:
        for run in self.runs.values():
            run.log.stop_watchers()

    async def shutdown(self) -> None:
        await asyncio.gather(*(run.shutdown() for run in self.runs.values()), return_exceptions=True)
        self.archive_thread.shutdown(wait=True)
