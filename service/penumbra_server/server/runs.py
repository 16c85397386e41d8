"""One run on the server: its record (spec, archive, decision state, counters, event log), its
description on the wire (Run, latest surfaces and guidance) and its lifecycle (open, close,
shutdown, loaded closed).

The record's work is split by job, each a mixin of :class:`RunRecord` sharing the state set up
here: how slices enter (run_ingest.py: acceptance, keep-newest queue, spool), how they are
processed (run_processing.py: plans, finds, several slices in flight via pipeline.py, outcomes
applied in iteration order, write-behind), and how events are committed (run_commits.py: one
archive commit per batch, events announced only after they are written).

Everything on the event loop thread except the archive writes (one worker thread), the finds
(the :class:`FinderExecutor`, via search.py) and the steering's decisions (a worker thread).
Made and restored by run_manager.py and restore.py; parts.py and link_records.py hang off it.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Callable

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import ArchiveWriter
from ._spec import RunSettings
from .events import EventLog
from .executors import FinderExecutor
from .jobs import SurfaceOutcome
from .link_records import LinkRecords
from .parts import PartAssembly
from .pipeline import InFlight
from .run_commits import RunCommits
from .run_events import AnnouncedSurface, Emission, announced_view, state_emission
from .run_ingest import RunIngest
from .run_processing import RunProcessing
from .run_types import ManagerOptions, QueuedSlice
from .scheduler import SurfacePlanner
from .spool import RunSpool
from .steering import RunSteering
from .surface_state import SurfaceState

__all__ = ["RunRecord", "QueuedSlice", "ManagerOptions"]

log = logging.getLogger("penumbra.server")


class RunRecord(RunIngest, RunProcessing, RunCommits):
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
        # The journal into the arrays, so xarray sees every row of the run after the stop.
        await self._fold()

    @property
    def tracks(self) -> dict[str, SurfaceState]:
        """The planners' view: the state of each surface of the archive."""
        return {label: self.states[label] for label in self.surface_labels}
