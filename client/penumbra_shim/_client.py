"""Connection, runs, the background sender and event streams.

Threads: ``submit()`` only queues (the slice was copied by :func:`build_slice`); one sender
thread per run handle streams slices in about 1 MiB chunks; one follower thread per run handle
(optional) watches the run's events to keep the latest surfaces cached. The caller's thread
never waits on the network in ``submit()``.

Retries: only what is safe. SendSlice is idempotent on the server by (run, iteration), and
by (run, iteration, part) for a slice sent in parts, so a slice whose stream broke (UNAVAILABLE, DEADLINE_EXCEEDED, ABORTED, CANCELLED) is sent again;
OpenRun carries a request id so a retry returns the same run; Get/List/Close are idempotent.
Refusals (INVALID_ARGUMENT, NOT_FOUND, FAILED_PRECONDITION, RESOURCE_EXHAUSTED, DATA_LOSS) are
never retried: they resolve the slice's ticket with a :class:`PenumbraError`.
"""

from __future__ import annotations

import concurrent.futures
import dataclasses
import threading
import time
import uuid
from collections import deque
from dataclasses import dataclass
from typing import Iterator

import grpc

from ._auth import BearerTokens, channel_credentials
from ._errors import PenumbraError, error_from_rpc
from ._slices import DEFAULT_CHUNK_BYTES, OutgoingSlice, build_slice, crop_outgoing_slice
from .cropping import worth_cropping
from ._types import DataWindows, Event, Guidance, RunInfo, RunSpec, SliceAck, SurfaceState
from ._wire import horizons_pb2 as pb
from ._wire import horizons_pb2_grpc as pb_grpc

__all__ = ["connect", "Client", "RunHandle", "SubmitTicket", "EventStream", "SenderStats"]

_RETRYABLE_SEND = frozenset({
    grpc.StatusCode.UNAVAILABLE,
    grpc.StatusCode.DEADLINE_EXCEEDED,
    grpc.StatusCode.ABORTED,
    grpc.StatusCode.CANCELLED,
})
# A watch stream that breaks for these reasons is resumed from the last event seen.
_RESUMABLE_WATCH = frozenset({
    grpc.StatusCode.UNAVAILABLE,
    grpc.StatusCode.RESOURCE_EXHAUSTED,  # this watcher fell behind; the server says where to resume
    grpc.StatusCode.ABORTED,
    grpc.StatusCode.CANCELLED,
})
_MESSAGE_LIMIT = 64 * 1024 * 1024
# SendSlice deadline: a base plus the time the bytes need at a pessimistic 20 MB/s.
_SEND_BYTES_PER_S = 20e6


def connect(target: str, *, deadline_s: float = 10.0, credentials: grpc.ChannelCredentials | None = None,
            retry_budget_s: float = 30.0, token: str | None = None, root_certificates=None) -> "Client":
    """A client for the Penumbra server at ``target`` ("host:port"). The channel connects lazily.

    Args:
        deadline_s: deadline of each unary call, seconds.
        credentials: TLS channel credentials (None: plaintext, for loopback and trusted networks,
            unless ``root_certificates`` is given); for mutual TLS build them with
            :func:`penumbra_shim.channel_credentials`.
        retry_budget_s: how long an idempotent call keeps retrying while the server is unreachable.
        token: a reader, opener or admin token sent with every call (``authorization: Bearer``);
            calls about a run whose writer token this client holds send that one instead.
        root_certificates: TLS with this CA (PEM bytes or text, or a file path) as trust root.
    """
    return Client(target, deadline_s=deadline_s, credentials=credentials, retry_budget_s=retry_budget_s, token=token,
                  root_certificates=root_certificates)


class Client:
    """A connection to one Penumbra server (thread-safe)."""

    def __init__(self, target: str, *, deadline_s: float = 10.0, credentials: grpc.ChannelCredentials | None = None,
                 retry_budget_s: float = 30.0, token: str | None = None, root_certificates=None) -> None:
        if not isinstance(target, str) or ":" not in target:
            raise ValueError(f"target: expected 'host:port', got {target!r}")
        self.target = target
        self.deadline_s = float(deadline_s)
        self.retry_budget_s = float(retry_budget_s)
        options = [
            ("grpc.max_send_message_length", _MESSAGE_LIMIT),
            ("grpc.max_receive_message_length", _MESSAGE_LIMIT),
            # Notice a dead server on a quiet connection; the server tolerates this interval.
            ("grpc.keepalive_time_ms", 20_000),
            ("grpc.keepalive_timeout_ms", 10_000),
            # Reconnect quickly after a server restart.
            ("grpc.initial_reconnect_backoff_ms", 100),
            ("grpc.min_reconnect_backoff_ms", 100),
            ("grpc.max_reconnect_backoff_ms", 2_000),
        ]
        if credentials is None and root_certificates is not None:
            credentials = channel_credentials(root_certificates)
        if credentials is None:
            self._channel = grpc.insecure_channel(target, options=options)
        else:
            self._channel = grpc.secure_channel(target, credentials, options=options)
        self._tokens = BearerTokens(token)
        self._stub = self._tokens.wrap(pb_grpc.HorizonServiceStub(self._channel),
                                       pb.DESCRIPTOR.services_by_name["HorizonService"])
        self._handles: list[RunHandle] = []
        self._closed = False

    # -- unary calls -------------------------------------------------------------------------

    def _call(self, method: str, request, *, timeout_s: float | None = None):
        """A unary call with a deadline, retried on UNAVAILABLE within the retry budget."""
        stub_method = getattr(self._stub, method)
        give_up = time.monotonic() + self.retry_budget_s
        backoff = 0.1
        while True:
            try:
                return stub_method(request, timeout=timeout_s or self.deadline_s, wait_for_ready=True)
            except grpc.RpcError as exc:
                retry = exc.code() in (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.DEADLINE_EXCEEDED)
                if not retry or time.monotonic() + backoff > give_up:
                    raise error_from_rpc(exc, method) from None
                time.sleep(backoff)
                backoff = min(2 * backoff, 2.0)

    def open_run(self, spec: RunSpec, *, queue_depth: int | None = None, chunk_bytes: int = DEFAULT_CHUNK_BYTES,
                 cache_results: bool = True, max_retry_s: float = 60.0, crop_to_windows: bool = False) -> "RunHandle":
        """Open a run on the server and return a handle for sending slices to it.

        Args:
            spec: the run's :class:`RunSpec`.
            queue_depth: slices the shim holds while one is being sent (default: the spec's
                backlog depth); beyond it the oldest waiting slice is dropped (keep newest).
            chunk_bytes: data chunk size on the wire.
            cache_results: follow the run's events in a background thread so that
                :meth:`RunHandle.latest_surfaces` and :meth:`RunHandle.latest_guidance` answer
                without a call.
            max_retry_s: how long one slice is retried while the server is unreachable.
            crop_to_windows: default of :meth:`RunHandle.submit`'s option: send only the data
                windows the server asked for (whole slices until it has asked).
        """
        if not isinstance(spec, RunSpec):
            raise TypeError(f"spec: expected a RunSpec, got {type(spec).__name__}")
        request = pb.OpenRunRequest(spec=spec.to_wire(), request_id=uuid.uuid4().hex)
        response = self._call("OpenRun", request)
        info = RunInfo.from_wire(response.run)
        self._tokens.remember_writer(info.run_id, response.writer_token)
        return self._handle(info, queue_depth=queue_depth or spec.backlog.queue_depth, chunk_bytes=chunk_bytes,
                            cache_results=cache_results, max_retry_s=max_retry_s, crop_to_windows=crop_to_windows)

    def attach_run(self, run_id: str, *, queue_depth: int | None = None, chunk_bytes: int = DEFAULT_CHUNK_BYTES,
                   cache_results: bool = True, max_retry_s: float = 60.0, crop_to_windows: bool = False,
                   writer_token: str | None = None) -> "RunHandle":
        """A handle on a run that is already open (e.g. after the evolution restarted).

        ``writer_token``: the run's :attr:`RunHandle.writer_token` (kept from when it was opened),
        needed to send to or close the run on a server that checks tokens.
        """
        if writer_token:
            self._tokens.remember_writer(run_id, writer_token)
        info = self.get_run(run_id)
        return self._handle(info, queue_depth=queue_depth or info.spec.backlog.queue_depth, chunk_bytes=chunk_bytes,
                            cache_results=cache_results, max_retry_s=max_retry_s, crop_to_windows=crop_to_windows)

    def _handle(self, info: RunInfo, **options) -> "RunHandle":
        handle = RunHandle(self, info, **options)
        self._handles.append(handle)
        return handle

    def get_run(self, run_id: str) -> RunInfo:
        return RunInfo.from_wire(self._call("GetRun", pb.GetRunRequest(run_id=run_id)).run)

    def list_runs(self, *, page_size: int = 100) -> list[RunInfo]:
        """Every run on the server, newest first (follows the pages)."""
        runs: list[RunInfo] = []
        token = ""
        while True:
            response = self._call("ListRuns", pb.ListRunsRequest(page_size=page_size, page_token=token))
            runs.extend(RunInfo.from_wire(r) for r in response.runs)
            token = response.next_page_token
            if not token:
                return runs

    def close_run(self, run_id: str, *, timeout_s: float = 120.0) -> RunInfo:
        """Close a run; the server first processes the slices it holds (hence the long deadline)."""
        return RunInfo.from_wire(self._call("CloseRun", pb.CloseRunRequest(run_id=run_id), timeout_s=timeout_s).run)

    def latest_surfaces(self, run_id: str) -> dict[str, SurfaceState]:
        """The latest state of every tracked surface of a run, by label (one call)."""
        response = self._call("GetLatestSurfaces", pb.GetLatestSurfacesRequest(run_id=run_id))
        return {t.label: SurfaceState.from_wire(t) for t in response.surfaces}

    def _latest_guidance_reply(self, run_id: str) -> tuple[Guidance | None, DataWindows | None]:
        response = self._call("GetLatestGuidance", pb.GetLatestGuidanceRequest(run_id=run_id))
        windows = DataWindows.from_wire(response.windows) if response.HasField("windows") else None
        guidance = Guidance.from_wire(response.guidance, windows) if response.HasField("guidance") else None
        return guidance, windows

    def latest_guidance(self, run_id: str) -> Guidance | None:
        """The run's latest refinement guidance (its ``windows`` attached), or None before the first."""
        return self._latest_guidance_reply(run_id)[0]

    def latest_windows(self, run_id: str) -> DataWindows | None:
        """The data windows the server wants in the run's next slice, or None before the first."""
        return self._latest_guidance_reply(run_id)[1]

    def watch(self, run_id: str, *, from_seq: int = 1, timeout_s: float | None = None) -> "EventStream":
        """Events of a run from ``from_seq`` on, resumed across reconnects without gaps or repeats.

        Iteration ends after the run's closing event, after ``timeout_s`` seconds in total, or
        when :meth:`EventStream.cancel` is called (from any thread).
        """
        return EventStream(self, run_id, from_seq=from_seq, timeout_s=timeout_s)

    def close(self) -> None:
        """Stop every run handle's threads (without closing the runs) and close the channel."""
        if self._closed:
            return
        self._closed = True
        for handle in self._handles:
            handle._stop_threads(timeout_s=5.0)
        self._channel.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class EventStream:
    """An iterator of :class:`Event` that reconnects and resumes from the last seq seen."""

    def __init__(self, client: Client, run_id: str, *, from_seq: int = 1, timeout_s: float | None = None) -> None:
        self._client = client
        self.run_id = run_id
        self.next_seq = max(1, int(from_seq))
        self._timeout_s = timeout_s
        self._cancelled = threading.Event()
        self._call = None
        self._lock = threading.Lock()
        self.reconnects = 0
        self.closed_run = False
        self._generator = self._generate()

    @property
    def last_seq(self) -> int:
        return self.next_seq - 1

    def __iter__(self) -> "EventStream":
        return self

    def __next__(self) -> Event:
        return next(self._generator)

    def cancel(self) -> None:
        """End the iteration (safe from another thread)."""
        self._cancelled.set()
        with self._lock:
            if self._call is not None:
                self._call.cancel()

    def _generate(self) -> Iterator[Event]:
        deadline = None if self._timeout_s is None else time.monotonic() + self._timeout_s
        backoff = 0.1
        while not self._cancelled.is_set():
            remaining = None if deadline is None else deadline - time.monotonic()
            if remaining is not None and remaining <= 0:
                return
            request = pb.WatchRunRequest(run_id=self.run_id, start_seq=self.next_seq)
            try:
                call = self._client._stub.WatchRun(request, timeout=remaining, wait_for_ready=True)
            except ValueError:  # the client was closed
                return
            with self._lock:
                self._call = call
            if self._cancelled.is_set():
                call.cancel()
            try:
                for response in call:
                    event = response.event
                    if event.seq < self.next_seq:
                        continue  # never hand out an event twice
                    self.next_seq = event.seq + 1
                    backoff = 0.1
                    converted = Event.from_wire(event)
                    if converted.kind == "run_state_changed" and converted.state == "closed":
                        self.closed_run = True
                    yield converted
                if self.closed_run:
                    return
                # Ended without the closing event (a server going away): resume.
            except grpc.RpcError as exc:
                code = exc.code()
                if self._cancelled.is_set() or code == grpc.StatusCode.DEADLINE_EXCEEDED:
                    return
                if code not in _RESUMABLE_WATCH:
                    raise error_from_rpc(exc, "WatchRun") from None
            finally:
                with self._lock:
                    self._call = None
                call.cancel()
            self.reconnects += 1
            if self._cancelled.wait(backoff):
                return
            backoff = min(2 * backoff, 2.0)


class SubmitTicket:
    """The fate of one submitted slice: :meth:`result` gives its :class:`SliceAck` or raises."""

    def __init__(self, iteration: int, nbytes: int, part_index: int = 0) -> None:
        self.iteration = iteration
        self.part_index = part_index
        self.nbytes = nbytes
        self.submit_block_s = 0.0
        self._future: concurrent.futures.Future = concurrent.futures.Future()

    def done(self) -> bool:
        return self._future.done()

    def result(self, timeout_s: float | None = None) -> SliceAck:
        """The acknowledgement; raises :class:`PenumbraError` if the server refused the slice."""
        return self._future.result(timeout_s)

    def exception(self, timeout_s: float | None = None) -> BaseException | None:
        return self._future.exception(timeout_s)

    def _resolve(self, ack: SliceAck) -> None:
        if not self._future.done():
            self._future.set_result(ack)

    def _fail(self, error: BaseException) -> None:
        if not self._future.done():
            self._future.set_exception(error)


@dataclass
class SenderStats:
    """Counters of one run handle's sender (read them any time)."""

    submitted: int = 0
    sent: int = 0
    duplicates: int = 0
    dropped_locally: int = 0
    refused: int = 0
    retries: int = 0
    bytes_sent: int = 0
    send_seconds: float = 0.0
    #: Slices sent cropped to the server's data windows, and what they would have cost whole.
    cropped: int = 0
    bytes_uncropped: int = 0
    #: Slices that asked for cropping but went whole (no windows yet, expired windows without a
    #: speed bound, grown windows keeping nearly everything, or windows that miss every patch).
    sent_whole: int = 0
    #: Of ``cropped``: slices later than their windows' validity, cropped to the windows grown by
    #: the server's speed bound times the lag (the server lagged behind the evolution).
    grown: int = 0
    #: Of ``sent_whole``: no windows held yet; grown windows that would keep nearly all the bytes.
    whole_without_windows: int = 0
    whole_nearly_all: int = 0


@dataclass(eq=False)
class _Pending:
    slice_: OutgoingSlice
    ticket: SubmitTicket
    crop: bool = False


class RunHandle:
    """Sends slices to one run and keeps its latest results. Made by :meth:`Client.open_run`."""

    def __init__(self, client: Client, info: RunInfo, *, queue_depth: int, chunk_bytes: int, cache_results: bool,
                 max_retry_s: float, crop_to_windows: bool = False) -> None:
        if queue_depth < 1:
            raise ValueError(f"queue_depth: expected at least 1, got {queue_depth}")
        self._client = client
        self.info = info
        self.run_id = info.run_id
        self.variable_set = info.spec.variable_set
        self.queue_depth = int(queue_depth)
        self.chunk_bytes = int(chunk_bytes)
        self.max_retry_s = float(max_retry_s)
        self.crop_to_windows = bool(crop_to_windows)
        self.stats = SenderStats()
        self.errors: list[PenumbraError] = []
        self._queue: deque[_Pending] = deque()
        self._in_flight: _Pending | None = None
        self._cond = threading.Condition()
        self._stopping = threading.Event()
        self._closed = False
        self._latest: dict[str, SurfaceState] = {}
        self._latest_guidance: Guidance | None = None
        self._latest_windows: DataWindows | None = None
        self._latest_lock = threading.Lock()
        self.last_seq = 0
        self._sender = threading.Thread(target=self._send_loop, name=f"penumbra-sender-{self.run_id}", daemon=True)
        self._sender.start()
        self._follow_stream: EventStream | None = None
        self._follower: threading.Thread | None = None
        if cache_results:
            self._follow_stream = client.watch(self.run_id, from_seq=1)
            self._follower = threading.Thread(target=self._follow_loop, name=f"penumbra-follower-{self.run_id}",
                                              daemon=True)
            self._follower.start()

    # -- sending -------------------------------------------------------------------------------

    def submit(self, slice_: OutgoingSlice, *, crop_to_windows: bool | None = None) -> SubmitTicket:
        """Queue a built slice for the background sender and return at once.

        If ``queue_depth`` slices are already waiting, the oldest waiting one is dropped
        (its ticket resolves with ``skipped_locally=True``): the evolution never waits. A slice
        (or part) waiting with the same iteration and part index is replaced by this one.

        ``crop_to_windows`` (default: the handle's option): the sender cuts every patch to the
        data windows the server asked for last (plus their stencil nodes) just before sending;
        a slice outside the windows' validity, or before any windows, goes whole.
        """
        start = time.perf_counter()
        if not isinstance(slice_, OutgoingSlice):
            raise TypeError(f"slice_: expected the OutgoingSlice returned by build_slice(), got {type(slice_).__name__}")
        if slice_.variable_set != self.variable_set:
            raise ValueError(
                f"slice_.variable_set: {slice_.variable_set!r} does not match the run's variable set {self.variable_set!r}"
            )
        ticket = SubmitTicket(slice_.iteration, slice_.nbytes, slice_.part_index)
        dropped: list[_Pending] = []
        key = (slice_.iteration, slice_.part_index)
        with self._cond:
            if self._closed:
                raise RuntimeError(f"run handle {self.run_id} is closed")
            for waiting in [w for w in self._queue if (w.slice_.iteration, w.slice_.part_index) == key]:
                self._queue.remove(waiting)
                dropped.append(waiting)
            while len(self._queue) >= self.queue_depth:
                dropped.append(self._queue.popleft())
            crop = self.crop_to_windows if crop_to_windows is None else bool(crop_to_windows)
            self._queue.append(_Pending(slice_, ticket, crop))
            self.stats.submitted += 1
            self.stats.dropped_locally += len(dropped)
            self._cond.notify_all()
        for old in dropped:
            old.ticket._resolve(SliceAck(iteration=old.slice_.iteration, accepted=False, skipped_locally=True,
                                         part_index=old.slice_.part_index, parts_expected=old.slice_.part_count))
        ticket.submit_block_s = time.perf_counter() - start
        return ticket

    def submit_arrays(self, *, time: float, iteration: int, patches, check_finite: bool = True,
                      crop_to_windows: bool | None = None, part_index: int = 0, part_count: int = 1) -> SubmitTicket:
        """:func:`build_slice` (validation + defensive copy) in the run's variable set, then :meth:`submit`.

        On MPI ranks: every rank passes its own boxes (possibly none) with ``part_index`` = its rank
        and ``part_count`` = the rank count; no rank gathers the grid.
        """
        return self.submit(build_slice(time=time, iteration=iteration, variable_set=self.variable_set,
                                       patches=patches, check_finite=check_finite, part_index=part_index,
                                       part_count=part_count), crop_to_windows=crop_to_windows)

    def flush(self, timeout_s: float | None = 30.0) -> bool:
        """Wait until every submitted slice is acknowledged, refused or dropped; False on timeout."""
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        with self._cond:
            while self._queue or self._in_flight is not None:
                remaining = None if deadline is None else deadline - time.monotonic()
                if remaining is not None and remaining <= 0:
                    return False
                self._cond.wait(remaining)
        return True

    @property
    def pending(self) -> int:
        """Slices waiting or being sent."""
        with self._cond:
            return len(self._queue) + (self._in_flight is not None)

    def _send_loop(self) -> None:
        while True:
            with self._cond:
                while not self._queue and not self._stopping.is_set():
                    self._cond.wait()
                if not self._queue:
                    return
                pending = self._queue.popleft()
                self._in_flight = pending
            try:
                self._send(pending)
            finally:
                with self._cond:
                    self._in_flight = None
                    self._cond.notify_all()

    def _windows_for(self, slice_: OutgoingSlice) -> DataWindows | None:
        """The windows to crop ``slice_`` to: the cached ones, or (no follower) asked for now;
        None when the server has issued none (expired ones are grown by :meth:`_cropped`)."""
        if self._follower is not None:
            with self._latest_lock:
                windows = self._latest_windows
        else:
            try:
                windows = self._client.latest_windows(self.run_id)
            except PenumbraError:
                windows = None
        return windows if windows is not None and windows.windows else None

    def _cropped(self, pending: _Pending) -> tuple[OutgoingSlice, bool]:
        """The slice cut to the windows, grown when the slice is later than their validity
        (cropping.grow_expired_windows); whole without windows or when the cut saves too little."""
        slice_ = pending.slice_
        if not pending.crop:
            return slice_, False
        windows = self._windows_for(slice_)
        if windows is None:
            self.stats.sent_whole += 1
            self.stats.whole_without_windows += 1
            return slice_, False
        try:
            growth = windows.grown_bounds(slice_.time)
            cut = (crop_outgoing_slice(slice_, growth.bounds, extra_nodes=windows.extra_nodes)
                   if growth is not None else None)
        except ValueError:  # malformed windows must not stop the sender: send the slice whole
            growth, cut = None, None
        if cut is None:  # a part the windows miss is not None: it goes as an empty part
            self.stats.sent_whole += 1
            return slice_, False
        if growth.grown and not worth_cropping(cut.nbytes, slice_.nbytes):
            self.stats.sent_whole += 1
            self.stats.whole_nearly_all += 1
            return slice_, False
        self.stats.grown += int(growth.grown)
        return cut, True

    def _send(self, pending: _Pending) -> None:
        stub = self._client._stub
        full_bytes = pending.slice_.nbytes
        slice_, cropped = self._cropped(pending)
        deadline_s = self._client.deadline_s + slice_.nbytes / _SEND_BYTES_PER_S
        started = time.monotonic()
        backoff = 0.1
        attempts = 0
        while True:
            attempts += 1
            t0 = time.perf_counter()
            try:
                response = stub.SendSlice(slice_.requests(self.run_id, chunk_bytes=self.chunk_bytes),
                                          timeout=deadline_s, wait_for_ready=True)
            except ValueError:  # the client was closed under the sender
                pending.ticket._resolve(SliceAck(iteration=slice_.iteration, accepted=False, skipped_locally=True,
                                                 part_index=slice_.part_index, parts_expected=slice_.part_count,
                                                 attempts=attempts))
                return
            except grpc.RpcError as exc:
                if exc.code() not in _RETRYABLE_SEND:
                    error = error_from_rpc(exc, "SendSlice")
                    self.stats.refused += 1
                    self.errors.append(error)
                    pending.ticket._fail(error)
                    return
                with self._cond:
                    newer_waiting = len(self._queue) >= self.queue_depth
                if newer_waiting or self._stopping.is_set() or time.monotonic() - started > self.max_retry_s:
                    # Keep newest: a full queue of newer slices beats retrying this one.
                    self.stats.dropped_locally += 1
                    pending.ticket._resolve(SliceAck(iteration=slice_.iteration, accepted=False, skipped_locally=True,
                                                     part_index=slice_.part_index, parts_expected=slice_.part_count,
                                                     attempts=attempts))
                    return
                self.stats.retries += 1
                self._stopping.wait(backoff)
                backoff = min(2 * backoff, 2.0)
                continue
            ack = SliceAck.from_wire(response, attempts=attempts, cropped=cropped, uncropped_bytes=full_bytes,
                                     part_index=slice_.part_index)
            self.stats.send_seconds += time.perf_counter() - t0
            self.stats.sent += 1
            self.stats.bytes_sent += slice_.nbytes
            self.stats.bytes_uncropped += full_bytes
            self.stats.cropped += int(cropped)
            self.stats.duplicates += int(ack.duplicate)
            pending.ticket._resolve(ack)
            return

    # -- results ---------------------------------------------------------------------------------

    def _follow_loop(self) -> None:
        stream = self._follow_stream
        try:
            for event in stream:
                self.last_seq = event.seq
                if event.surface is not None:
                    label = event.surface.label
                    with self._latest_lock:
                        state = self._latest.get(label) or SurfaceState(label, None, False, -1, "", 0)
                        self._latest[label] = state.updated(event.surface)
                elif event.guidance is not None:
                    with self._latest_lock:
                        self._latest_guidance = event.guidance
                elif event.windows is not None:
                    with self._latest_lock:
                        self._latest_windows = event.windows
        except PenumbraError as exc:
            self.errors.append(exc)

    def latest_surfaces(self, *, refresh: bool = False) -> dict[str, SurfaceState]:
        """Latest state of every surface, by label: from the cache, or (refresh) from the server."""
        if refresh or self._follower is None:
            states = self._client.latest_surfaces(self.run_id)
            with self._latest_lock:
                self._latest.update(states)
            return states
        with self._latest_lock:
            return dict(self._latest)

    def latest_guidance(self, *, refresh: bool = False) -> Guidance | None:
        """The latest refinement guidance, with the latest data windows attached; from the cache
        (no waiting: what an evolution reads at its regrid step), or (refresh) from the server.
        None before the server has issued any."""
        if refresh or self._follower is None:
            guidance, windows = self._client._latest_guidance_reply(self.run_id)
            with self._latest_lock:
                self._latest_guidance, self._latest_windows = guidance, windows
            return guidance
        with self._latest_lock:
            guidance, windows = self._latest_guidance, self._latest_windows
        if guidance is None:
            return None
        return dataclasses.replace(guidance, windows=windows)

    def latest_windows(self, *, refresh: bool = False) -> DataWindows | None:
        """The data windows the server wants in the next slice (cache, or refresh from the server)."""
        if refresh or self._follower is None:
            guidance, windows = self._client._latest_guidance_reply(self.run_id)
            with self._latest_lock:
                self._latest_guidance, self._latest_windows = guidance, windows
            return windows
        with self._latest_lock:
            return self._latest_windows

    def events(self, *, from_seq: int = 1, timeout_s: float | None = None) -> EventStream:
        """The run's events from ``from_seq`` (see :meth:`Client.watch`)."""
        return self._client.watch(self.run_id, from_seq=from_seq, timeout_s=timeout_s)

    @property
    def writer_token(self) -> str | None:
        """The run's writer token, if this client holds it (keep it to attach again after a restart)."""
        return self._client._tokens.writer_token(self.run_id)

    def describe(self) -> RunInfo:
        """The run as the server describes it now."""
        self.info = self._client.get_run(self.run_id)
        return self.info

    # -- closing -----------------------------------------------------------------------------------

    def _stop_threads(self, *, timeout_s: float) -> None:
        with self._cond:
            self._closed = True
            self._stopping.set()
            self._cond.notify_all()
        self._sender.join(timeout_s)
        if self._follow_stream is not None:
            self._follow_stream.cancel()
        if self._follower is not None:
            self._follower.join(timeout_s)

    def close(self, *, close_run: bool = True, timeout_s: float = 120.0) -> RunInfo | None:
        """Send what is queued, stop the threads and (by default) close the run on the server.

        Returns the closed run's description when ``close_run``.
        """
        self.flush(timeout_s)
        info = self._client.close_run(self.run_id, timeout_s=timeout_s) if close_run else None
        if info is not None:
            self.info = info
        if self._follower is not None and close_run:
            self._follower.join(5.0)  # the follower ends by itself after the closing event
        self._stop_threads(timeout_s=5.0)
        return info

    def __enter__(self) -> "RunHandle":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
