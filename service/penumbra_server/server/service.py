"""The gRPC servicer: unpack the request, call the run manager, build the reply.

Every refusal is a :class:`ServiceError` turned into an aborted call with its status code,
message and rich error details (errors.py: reason and field); anything else is a bug, logged and
answered with INTERNAL.
"""

from __future__ import annotations

import asyncio
import base64
import functools
import logging
import os
import time

import grpc
from google.protobuf.message import DecodeError

from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc

from ..archive import archive_path
from .admission import AdmissionDesk, queued_slice_count
from .errors import ServiceError, status_trailer
from .ingest import IngestLimits, SliceAssembler, mirror_through_z0
from .parts import PartLabel, part_of, prepare_part
from .link_records import record_client_gap, record_rejection
from .run_manager import RunManager
from .runs import QueuedSlice

__all__ = ["HorizonServicer"]

log = logging.getLogger("penumbra.server")
#: Field names a header may declare before its checks move off the event loop.
_NAMES_CHECKED_ON_LOOP = 512


def _translating_errors(method):
    """Turn ServiceError into the call's status; log anything unexpected as INTERNAL."""

    @functools.wraps(method)
    async def wrapper(self, request, context):
        try:
            return await method(self, request, context)
        except ServiceError as exc:
            await context.abort(exc.code, exc.message, trailing_metadata=exc.trailing_metadata())
        except (asyncio.CancelledError, grpc.aio.AbortError):
            raise
        except Exception as exc:
            log.exception("%s failed", method.__name__)
            message = f"{method.__name__}: internal error {type(exc).__name__}: {exc}"
            await context.abort(grpc.StatusCode.INTERNAL, message,
                                trailing_metadata=status_trailer(grpc.StatusCode.INTERNAL, message, "INTERNAL", ""))

    return wrapper


def _tree_bytes(paths) -> int:
    """Bytes of the files under ``paths`` (missing paths count 0)."""
    total = 0
    for path in paths:
        for root, _, files in os.walk(path):
            for name in files:
                try:
                    total += os.stat(os.path.join(root, name)).st_size
                except OSError:  # a file replaced while walking
                    pass
    return total


async def _stream_messages(request_iterator, idle_timeout_s: float | None):
    """The messages of a client stream; undecodable bytes become INVALID_ARGUMENT and a stream
    silent for ``idle_timeout_s`` seconds DEADLINE_EXCEEDED (None: wait for ever)."""
    iterator = request_iterator.__aiter__()
    index = 0
    while True:
        try:
            if idle_timeout_s is None:
                message = await iterator.__anext__()
            else:
                message = await asyncio.wait_for(iterator.__anext__(), idle_timeout_s)
        except StopAsyncIteration:
            return
        except DecodeError as exc:
            raise ServiceError.invalid(
                f"request: message {index} of the stream is not a valid {pb.SendSliceRequest.DESCRIPTOR.full_name} "
                f"({exc})", reason="MALFORMED_MESSAGE") from None
        except asyncio.TimeoutError:
            raise ServiceError(
                grpc.StatusCode.DEADLINE_EXCEEDED,
                f"upload_idle_timeout_s: no message for {idle_timeout_s:g} s after message {index}; the server's "
                f"limit is upload_idle_timeout_s = {idle_timeout_s:g}", reason="UPLOAD_IDLE") from None
        index += 1
        yield message


def _page_token(offset: int) -> str:
    return base64.urlsafe_b64encode(f"offset:{offset}".encode()).decode()


def _page_offset(token: str) -> int:
    if not token:
        return 0
    try:
        text = base64.urlsafe_b64decode(token.encode()).decode()
        kind, value = text.split(":", 1)
        offset = int(value)
        if kind != "offset" or offset < 0:
            raise ValueError
        return offset
    except (ValueError, UnicodeDecodeError):
        raise ServiceError.invalid(f"page_token: {token!r} is not a token this server issued") from None


class HorizonServicer(pb_grpc.HorizonServiceServicer):
    """penumbra.v1.HorizonService on a :class:`RunManager`."""

    def __init__(self, manager: RunManager, *, limits: IngestLimits, upload_idle_timeout_s: float | None = None,
                 max_queued_bytes: int | None = None, max_open_runs_per_client: int | None = None,
                 token_book=None, max_archive_bytes_per_client: int | None = None) -> None:
        self.manager = manager
        self.max_archive_bytes_per_client = max_archive_bytes_per_client
        self.max_open_runs_per_client = max_open_runs_per_client
        self.token_book = token_book
        self._run_owners: dict[str, str] = {}  # run id -> client key of the OpenRun that made it
        self.limits = limits
        self.upload_idle_timeout_s = upload_idle_timeout_s
        self.max_queued_bytes = max_queued_bytes
        self._reserved_bytes = 0  # declared bytes of the slices being received now
        self.admission = AdmissionDesk()  # back-pressure: places held for admitted slices (admission.py)

    def _client_key(self, context) -> str:
        """Who opens: the token's name when tokens are configured, else the peer's host."""
        if self.token_book:
            for key, value in context.invocation_metadata() or ():
                if key == "authorization" and value.lower().startswith("bearer "):
                    entry = self.token_book.lookup(value[7:].strip())
                    if entry is not None:
                        return f"token {entry.name}"
        peer = context.peer() or ""  # "ipv4:127.0.0.1:54321", "ipv6:[::1]:54321", "unix:..."
        kind, _, rest = peer.partition(":")
        host = rest.rsplit(":", 1)[0] if kind in ("ipv4", "ipv6") else rest
        return f"host {host}"

    def _check_open_runs(self, key: str) -> None:
        limit = self.max_open_runs_per_client
        if limit is None:
            return
        runs = self.manager.runs
        open_now = sum(1 for run_id, owner in self._run_owners.items()
                       if owner == key and run_id in runs and runs[run_id].is_open)
        if open_now >= limit:
            raise ServiceError(
                grpc.StatusCode.RESOURCE_EXHAUSTED,
                f"spec: {key} has {open_now} open runs, the server's limit per client "
                f"(max_open_runs_per_client = {limit}); close one first",
                reason="TOO_MANY_OPEN_RUNS", field="spec",
            )

    async def _check_archive_bytes(self, key: str, field: str) -> None:
        """Refuse when the archives of the runs ``key`` opened hold more than the per-client limit.

        An approximation: the sizes of the files under those run directories, summed in a thread
        at each OpenRun and each slice's header (runs restored after a restart have no opener)."""
        limit = self.max_archive_bytes_per_client
        if limit is None:
            return
        paths = [archive_path(self.manager.archive_root, run_id) for run_id, owner in self._run_owners.items()
                 if owner == key]
        used = await asyncio.to_thread(_tree_bytes, paths)
        if used >= limit:
            raise ServiceError(
                grpc.StatusCode.RESOURCE_EXHAUSTED,
                f"{field}: the archives of {key}'s runs hold {used} bytes, at or over the server's limit per "
                f"client (max_archive_bytes_per_client = {limit})",
                reason="ARCHIVE_BYTES_PER_CLIENT", field=field,
            )

    def _reserve(self, nbytes: int) -> int:
        """Reserve a slice's declared bytes under the server-wide budget of queued and arriving
        slice bytes; refuses with RESOURCE_EXHAUSTED naming the budget. Returns the bytes reserved."""
        if self.max_queued_bytes is None:
            return 0
        queued = sum(run.queued_bytes for run in self.manager.runs.values())
        if queued + self._reserved_bytes + nbytes > self.max_queued_bytes:  # (places held count only at asks)
            raise ServiceError(
                grpc.StatusCode.RESOURCE_EXHAUSTED,
                f"header.total_bytes: {nbytes} more bytes would exceed the server's budget of "
                f"{self.max_queued_bytes} bytes for queued and arriving slices (max_queued_bytes); "
                f"{queued} bytes are queued and {self._reserved_bytes} arriving; retry once the queue drains",
                reason="QUEUED_BYTES_BUDGET",
            )
        self._reserved_bytes += nbytes
        return nbytes

    @_translating_errors
    async def OpenRun(self, request: pb.OpenRunRequest, context) -> pb.OpenRunResponse:
        key = self._client_key(context)
        retry = bool(request.request_id) and request.request_id in self.manager._request_ids
        if not retry:  # a retried OpenRun finds its run whatever the count
            self._check_open_runs(key)
            await self._check_archive_bytes(key, "spec")
        run = await self.manager.open_run(request.spec, request.request_id)
        self._run_owners.setdefault(run.run_id, key)
        return pb.OpenRunResponse(run=run.to_wire())

    @_translating_errors
    async def GetRun(self, request: pb.GetRunRequest, context) -> pb.GetRunResponse:
        return pb.GetRunResponse(run=self.admission.fill(self.manager.get(request.run_id).to_wire()))

    @_translating_errors
    async def AdmissionReserve(self, request: pb.AdmissionReserveRequest, context) -> pb.AdmissionReserveResponse:
        run = self.manager.get(request.run_id)
        budget_left = None
        if self.max_queued_bytes is not None:
            queued = sum(r.queued_bytes for r in self.manager.runs.values())
            budget_left = max(0, self.max_queued_bytes - queued - self._reserved_bytes - self.admission.held_bytes())
        return self.admission.reserve(run, request, queued_slices=queued_slice_count(run), budget_left=budget_left)

    @_translating_errors
    async def ListRuns(self, request: pb.ListRunsRequest, context) -> pb.ListRunsResponse:
        size = request.page_size or 100
        if not 1 <= size <= 1000:
            raise ServiceError.invalid(f"page_size: expected 1..1000 (0 for 100), got {request.page_size}")
        offset = _page_offset(request.page_token)
        runs = self.manager.list_runs()
        page = runs[offset:offset + size]
        token = _page_token(offset + size) if offset + size < len(runs) else ""
        return pb.ListRunsResponse(runs=[self.admission.fill(r.to_wire()) for r in page], next_page_token=token)

    @_translating_errors
    async def CloseRun(self, request: pb.CloseRunRequest, context) -> pb.CloseRunResponse:
        run = self.manager.get(request.run_id)
        # Shielded: when the caller's deadline passes the close goes on (its retry waits for the
        # same close) instead of cancelling the processing of what the run acknowledged.
        await asyncio.shield(run.close())
        return pb.CloseRunResponse(run=run.to_wire())

    @_translating_errors
    async def SendSlice(self, request_iterator, context) -> pb.SendSliceResponse:
        known: list = []  # (run, header) once the header named a known run
        reserved: list[int] = []
        try:
            return await self._receive_slice(request_iterator, known, reserved)
        except ServiceError as exc:
            if known:  # the run's event stream shows the refusal too
                await record_rejection(*known, exc)
            raise
        finally:
            # Queued now (counted by the run's queue) or refused: either way no longer arriving.
            self._reserved_bytes -= sum(reserved)

    async def _receive_slice(self, request_iterator, known: list, reserved: list) -> pb.SendSliceResponse:
        assembler: SliceAssembler | None = None
        run = None
        label = PartLabel(0, 1)
        async for request in _stream_messages(request_iterator, self.upload_idle_timeout_s):
            part = request.WhichOneof("part")
            if assembler is None:
                if part != "header":
                    raise ServiceError.invalid(f"header: the first message of a SendSlice stream must carry the "
                                               f"header, got {part or 'an empty message'}")
                header = request.header
                run = self.manager.get(header.run_id)
                known[:] = [run, header]
                run.check_accepting()
                if run.run_id in self._run_owners:
                    await self._check_archive_bytes(self._run_owners[run.run_id], "header.run_id")
                label = part_of(header)
                self.admission.arrived(run.run_id, header.iteration)
                if not label.is_part and run.is_duplicate(header.iteration):
                    # Idempotent resend: answer at once, without reading the data again.
                    return run.duplicate_response(header.iteration, 0)
                make = functools.partial(SliceAssembler, header, run.settings.variable_set, self.limits,
                                         allow_empty=label.is_part, excised_spheres=run.settings.excised_spheres)
                # Header checks are linear in the names declared; many names go to a thread so
                # that the event loop keeps serving every other client meanwhile.
                if sum(len(ph.field_names) for ph in header.patches) > _NAMES_CHECKED_ON_LOOP:
                    assembler = await asyncio.to_thread(make)
                else:
                    assembler = make()
                if run.parts.check(assembler.iteration, assembler.time, label):
                    return run.parts.duplicate_response(assembler.iteration, label)
                reserved.append(self._reserve(assembler.total_bytes))
            elif part == "chunk":
                self.admission.count_bytes(run.run_id, len(request.chunk.data))
                assembler.add(request.chunk)
            else:
                raise ServiceError.invalid(f"chunk: expected only chunks after the header, got {part or 'an empty message'}")
        if assembler is None:
            raise ServiceError.invalid("header: the stream ended without a header")
        if label.is_part:
            part = await asyncio.to_thread(prepare_part, assembler, label, bitant=run.settings.bitant)
            return await run.parts.receive(part, max_bytes=self.limits.max_slice_bytes)
        # The finiteness check walks every value: keep it off the event loop.
        slice_ = await asyncio.to_thread(assembler.finish)
        if run.settings.bitant:
            slice_ = await asyncio.to_thread(mirror_through_z0, slice_)
        item = QueuedSlice(slice_=slice_, nbytes=assembler.received_bytes, arrival_unix_s=time.time())
        run.parts.check(slice_.iteration, slice_.time, label)  # parts of this iteration may have begun meanwhile
        return await run.accept_persisted(item)  # on disk before the answer

    @_translating_errors
    async def WatchRun(self, request: pb.WatchRunRequest, context) -> None:
        run = self.manager.get(request.run_id)
        held, subscriber = run.log.subscribe(request.start_seq)
        last = max(1, request.start_seq) - 1
        try:
            for event in held:
                await context.write(pb.WatchRunResponse(event=event))
                last = event.seq
            while True:
                event = await subscriber.next()
                if event is None:
                    break
                if event.seq <= last:
                    continue
                await context.write(pb.WatchRunResponse(event=event))
                last = event.seq
            if subscriber.server_stopping:
                raise ServiceError(grpc.StatusCode.UNAVAILABLE,
                                   f"server is shutting down; reconnect with start_seq={last + 1}",
                                   reason="SERVER_STOPPING", field="start_seq")
            if subscriber.overflowed:
                raise ServiceError(
                    grpc.StatusCode.RESOURCE_EXHAUSTED,
                    f"watcher fell behind: more than {subscriber.capacity} events waited for it; "
                    f"resume with start_seq={last + 1}",
                    reason="WATCHER_FELL_BEHIND", field="start_seq",
                )
        finally:
            run.log.unsubscribe(subscriber)

    @_translating_errors
    async def RecordClientGap(self, request: pb.RecordClientGapRequest, context) -> pb.RecordClientGapResponse:
        return await record_client_gap(self.manager.get(request.run_id), request)

    @_translating_errors
    async def GetLatestSurfaces(self, request: pb.GetLatestSurfacesRequest, context) -> pb.GetLatestSurfacesResponse:
        return self.manager.get(request.run_id).latest_surfaces()

    @_translating_errors
    async def GetLatestGuidance(self, request: pb.GetLatestGuidanceRequest, context) -> pb.GetLatestGuidanceResponse:
        return self.manager.get(request.run_id).latest_guidance()
