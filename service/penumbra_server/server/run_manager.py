"""All runs of one server: open (idempotent by request id), look up, list, restore after a
restart, stop. Each run is a :class:`~penumbra_server.server.runs.RunRecord`."""

from __future__ import annotations

import asyncio
import logging
import secrets
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Callable, Sequence

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import ArchiveWriter, archive_path, list_archives
from ._spec import RunSettings
from .dispatch import FairDispatcher
from .errors import ServiceError
from .executors import FinderExecutor
from .formation import FormationWatch
from .planning import steering_planner_factory
from .restore import read_archive, restore_run
from .runs import ManagerOptions, RunRecord
from .scheduler import SurfacePlanner
from .part_files import PartFiles
from .spool import RunSpool, spool_path

__all__ = ["RunManager", "software_version"]

log = logging.getLogger("penumbra.server")


def software_version() -> str:
    """The installed penumbra-horizons distribution's version (recorded in every archive)."""
    from importlib import metadata

    try:
        return metadata.version("penumbra-horizons")
    except metadata.PackageNotFoundError:
        return "unknown"


def _new_run_id() -> str:
    return f"run-{secrets.token_hex(6)}"


def _parts_reason(run: RunRecord, parts: dict) -> str:
    """The re-open reason's words on the slices restored from part files: the complete ones were
    handed on (their iterations count in highest_held_iteration), the incomplete ones wait."""
    waiting = run.parts.pending_summary()
    text = f"; {len(parts) - len(waiting)} slice(s) assembled from acknowledged parts"
    if waiting:
        shown = ", ".join(f"iteration {it} (parts {', '.join(map(str, held[:8]))}"
                          f"{' ...' if len(held) > 8 else ''} of {count} held)" for it, held, count in waiting[:8])
        text += (f"; {len(waiting)} slice(s) waiting for parts, a new part deadline of "
                 f"{run.parts.deadline_s:g} s from now: {shown}{' ...' if len(waiting) > 8 else ''}")
    return text


class RunManager:
    """All runs of one server."""

    def __init__(self, *, archive_root: Path, executor: FinderExecutor, options: ManagerOptions,
                 planner_factory: Callable[[RunSettings], SurfacePlanner] | None = None,
                 slice_observer_factory: Callable[[RunSettings], Sequence[Callable]] | None = None) -> None:
        self.archive_root = Path(archive_root)
        self.executor = executor
        #: Shares the executor among the runs: each run's jobs wait for its turn (dispatch.py).
        self.dispatcher = FairDispatcher(executor)
        self.options = options
        self.planner_factory = planner_factory or steering_planner_factory
        self.slice_observer_factory = slice_observer_factory
        self.archive_thread = ThreadPoolExecutor(max_workers=1, thread_name_prefix="penumbra-archive")
        self._run_threads: list[ThreadPoolExecutor] = []
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
                    created_unix_s=created, fold_policy=self.options.archive_fold,
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
        # Each run writes its archive on a thread of its own (started at its first write): the
        # commits of many concurrent runs overlap their disk waits, and one run's commit never
        # waits behind another's. A run's writes stay in order on its one thread.
        archive_thread = ThreadPoolExecutor(max_workers=1, thread_name_prefix=f"penumbra-archive-{run_id}")
        self._run_threads.append(archive_thread)
        run = RunRecord(
            run_id=run_id, settings=settings, writer=writer, executor=self.dispatcher.for_run(run_id),
            archive_thread=archive_thread, options=self.options,
            planner=self.planner_factory(settings), created_unix_s=created, next_seq=next_seq,
            spool=RunSpool(spool_path(self.archive_root, run_id)),
        )
        # Parts of slices sent in parts are kept beside the spooled slices (part_files.py).
        run.parts.attach_files(PartFiles(run.spool.directory), archive_thread, run.spool.path_for)
        if self.slice_observer_factory is not None:
            run.slice_observers.extend(self.slice_observer_factory(settings))
        if settings.formation_forecast and run.steering.common_label is not None:
            run.slice_observers.append(FormationWatch())  # when the pair's common horizon forms (formation.py)
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
                writer = await loop.run_in_executor(self.archive_thread, ArchiveWriter.open_existing, summary.path,
                                                    self.options.archive_fold)
                attrs = writer.attrs
                settings = RunSettings.from_dict(attrs["run_spec"])
                # Read before the run is registered: no slice may reach it half restored.
                archived = await loop.run_in_executor(self.archive_thread, read_archive, summary.path)
                run = self._make_record(summary.run_id, settings, writer, float(attrs["created_unix_s"]),
                                        next_seq=int(attrs.get("next_event_seq", 1)))
                restore_run(run, archived)
                if len(archived.slices.get("iteration", ())):
                    run.highest_held = int(max(archived.slices["iteration"]))
                replay, parts = await loop.run_in_executor(self.archive_thread, self._read_spool, run,
                                                           summary.state == "closed")
                if attrs.get("open_request_id"):
                    self._request_ids[str(attrs["open_request_id"])] = summary.run_id
            except Exception:
                log.exception("could not load run archive %s", summary.path)
                self.runs.pop(summary.run_id, None)
                continue
            if summary.state == "closed":
                run.mark_closed(float(attrs.get("closed_unix_s") or 0.0))
                continue
            for item in replay:  # acknowledged before the restart, not yet archived: processed now
                run.requeue(item)
            run.parts.restore(parts)  # acknowledged parts: complete slices handed on, the others wait
            reason = "re-opened from its archive after a server restart"
            if replay:
                reason += f"; {len(replay)} acknowledged slice(s) replayed from its spool"
            if parts:
                reason += _parts_reason(run, parts)
            await run.announce_state(pb.Run.STATE_OPEN, reason)
            reopened.append(summary.run_id)
        return reopened

    @staticmethod
    def _read_spool(run: RunRecord, closed: bool) -> list:
        """The spooled slices of ``run`` not yet archived, in iteration order (archive thread).
        Files of archived iterations (a kill between the commit and the removal) are removed;
        a closed run's spool goes entirely (its close archived everything it acknowledged)."""
        spool = run.spool
        if closed:
            spool.remove_all()
            return [], {}
        entries = spool.entries()
        spool.release([e.iteration for e in entries if e.iteration in run.accepted_iterations])
        items = []
        for entry in entries:
            if entry.iteration in run.accepted_iterations:
                continue
            try:
                items.append(spool.load(entry, excised_spheres=run.settings.excised_spheres))
            except ValueError:
                log.exception("run %s: spool file unreadable, kept for inspection", run.run_id)
        return items, RunManager._read_parts(run, {e.iteration for e in entries})

    @staticmethod
    def _read_parts(run: RunRecord, spooled: set[int]) -> dict:
        """The part files of ``run`` whose slice is neither archived, spooled whole nor given up
        (archive thread); the files of those that are are removed (a kill before their removal)."""
        files = PartFiles(run.spool.directory)
        try:
            stored = files.iterations()
        except ValueError:
            log.exception("run %s: part files unreadable, kept for inspection; no part restored", run.run_id)
            return {}
        for iteration in list(stored):
            if iteration in run.accepted_iterations or iteration in spooled or iteration in run.parts.given_up:
                files.release(iteration)
                del stored[iteration]
        return stored

    def list_runs(self) -> list[RunRecord]:
        return sorted(self.runs.values(), key=lambda r: (-r.created_unix_s, r.run_id))

    def stop_watchers(self) -> None:
        for run in self.runs.values():
            run.log.stop_watchers()

    async def shutdown(self) -> None:
        await asyncio.gather(*(run.shutdown() for run in self.runs.values()), return_exceptions=True)
        await self.dispatcher.close()
        for thread in self._run_threads:
            thread.shutdown(wait=True)
        self.archive_thread.shutdown(wait=True)
