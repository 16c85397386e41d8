"""Connection, runs, the background sender and event streams.

Threads: ``submit()`` only queues (the slice was copied by :func:`build_slice`); one sender
thread per run handle opens the run (retrying while the server is unreachable), streams slices
in about 1 MiB chunks and reports outages of the link; one follower thread per run handle
(optional) watches the run's events to keep the latest surfaces cached. The caller's thread
never waits on the network in ``submit()``, and ``open_run()`` / ``attach_run()`` wait at most
their ``open_timeout_s``.

Outages: while the server is unreachable a handle keeps taking slices; its queue keeps the
newest ``queue_depth`` of them and every slice dropped is counted with its iteration and
reason (:mod:`._link`). When the link is back the handle records the outage on the server
(RecordClientGap), so the run's archive and events show it.

Retries: only what is safe. SendSlice is idempotent on the server by (run, iteration), and
by (run, iteration, part) for a slice sent in parts, so a slice whose stream broke (UNAVAILABLE,
DEADLINE_EXCEEDED, ABORTED, CANCELLED) is sent again; OpenRun carries a request id so a retry
returns the same run; RecordClientGap carries a gap id; Get/List/Close are idempotent.
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
from ._link import ClientGap, DroppedSlice, LinkLedger
from ._slices import DEFAULT_CHUNK_BYTES, OutgoingSlice, build_slice, crop_outgoing_slice
from .cropping import worth_cropping
from ._types import DataWindows, Event, Guidance, RunInfo, RunSpec, SliceAck, SurfaceState
from ._wire import horizons_pb2 as pb
from ._wire import horizons_pb2_grpc as pb_grpc

__all__ = ["connect", "Client", "RunHandle", "SubmitTicket", "EventStream", "SenderStats", "DEFAULT_OPEN_TIMEOUT_S",
           "DEFAULT_IDLE_TIMEOUT_S"]

#: How long :meth:`Client.open_run` and :meth:`Client.attach_run` wait for the server, seconds.
DEFAULT_OPEN_TIMEOUT_S = 5.0
#: How long an :class:`EventStream` waits for its next event before it ends, seconds.
DEFAULT_IDLE_TIMEOUT_S = 300.0

_RETRYABLE_SEND = frozenset({
    grpc.StatusCode.UNAVAILABLE,
    grpc.StatusCode.DEADLINE_EXCEEDED,
    grpc.StatusCode.ABORTED,
    grpc.StatusCode.CANCELLED,
})
# OpenRun / GetRun of a pending handle: the server unreachable or slow; anything else is a refusal.
_RETRYABLE_OPEN = frozenset({grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.DEADLINE_EXCEEDED,
                             grpc.StatusCode.ABORTED, grpc.StatusCode.CANCELLED})
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
                 cache_results: bool = True, max_retry_s: float = 60.0, crop_to_windows: bool = False,
                 open_timeout_s: float = DEFAULT_OPEN_TIMEOUT_S) -> "RunHandle":
        """Open a run on the server and return a handle for sending slices to it.

        Blocks at most ``open_timeout_s`` (plus the few milliseconds of starting a thread),
        whether or not the server answers. If the run is not open by then the handle is
        returned *pending* (``state == "pending"``, ``run_id`` None): its sender thread keeps
        retrying OpenRun with backoff (the same request id, so the server opens one run however
        many attempts reach it), :meth:`RunHandle.submit` keeps working (slices wait in the
        handle's queue, the newest ``queue_depth`` kept, every drop counted with its reason),
        and once the run opens the queued slices are sent and the outage is recorded on the
        server (RecordClientGap).

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
            open_timeout_s: the longest this call waits for the server, seconds.

        Raises:
            PenumbraError: the server answered within ``open_timeout_s`` and refused the spec
                (a refusal after that puts the handle in state "failed" instead).
        """
        if not isinstance(spec, RunSpec):
            raise TypeError(f"spec: expected a RunSpec, got {type(spec).__name__}")
        request = pb.OpenRunRequest(spec=spec.to_wire(), request_id=uuid.uuid4().hex)
        return self._settled(RunHandle(self, None, spec=spec, open_request=request,
                                       queue_depth=queue_depth or spec.backlog.queue_depth, chunk_bytes=chunk_bytes,
                                       cache_results=cache_results, max_retry_s=max_retry_s,
                                       crop_to_windows=crop_to_windows), open_timeout_s, "OpenRun")

    def attach_run(self, run_id: str, *, queue_depth: int | None = None, chunk_bytes: int = DEFAULT_CHUNK_BYTES,
                   cache_results: bool = True, max_retry_s: float = 60.0, crop_to_windows: bool = False,
                   open_timeout_s: float = DEFAULT_OPEN_TIMEOUT_S, writer_token: str | None = None) -> "RunHandle":
        """A handle on a run that is already open (e.g. after the evolution restarted).

        ``writer_token``: the run's :attr:`RunHandle.writer_token` (kept from when it was opened),
        needed to send to or close the run on a server that checks tokens.

        Blocks at most ``open_timeout_s``, as :meth:`open_run`. If the server does not answer
        by then the handle is returned pending (``run_id`` is known, ``info`` None): it keeps
        asking (GetRun) in the background, queues slices meanwhile and records the outage once
        the server answers. While the run's spec is unknown, ``queue_depth`` defaults to 4 and
        the slices' variable set is not checked locally (the server refuses a mismatch).

        Raises:
            RunNotFoundError: the server answered within ``open_timeout_s``: no such run.
        """
        if not isinstance(run_id, str) or not run_id:
            raise ValueError(f"run_id: expected a run id such as 'run-0123456789ab', got {run_id!r}")
        if writer_token:
            self._tokens.remember_writer(run_id, writer_token)
        return self._settled(RunHandle(self, None, attach_run_id=run_id, queue_depth=queue_depth,
                                       chunk_bytes=chunk_bytes, cache_results=cache_results, max_retry_s=max_retry_s,
                                       crop_to_windows=crop_to_windows), open_timeout_s, "GetRun")

    def _settled(self, handle: "RunHandle", open_timeout_s: float, method: str) -> "RunHandle":
        """Wait at most ``open_timeout_s`` for the handle's run; a refusal by then is raised."""
        started = time.time()
        self._handles.append(handle)
        handle._start()
        handle._wait_settled(max(0.0, float(open_timeout_s)))
        if handle.state == "failed":
            handle._stop_threads(timeout_s=5.0)
            self._handles.remove(handle)
            raise handle._open_error
        if handle.state == "pending":
            handle._ledger.mark_down(f"{method}: no answer from {self.target} within {open_timeout_s:g} s",
                                     since=started)
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

    def watch(self, run_id: str, *, from_seq: int = 1, timeout_s: float | None = None,
              idle_timeout_s: float | None = DEFAULT_IDLE_TIMEOUT_S) -> "EventStream":
        """Events of a run from ``from_seq`` on, resumed across reconnects without gaps or repeats.

        Iteration ends (StopIteration, never an exception; :attr:`EventStream.end_reason` says
        why) after the run's closing event ("run_closed"), after ``timeout_s`` seconds in total
        ("timeout"), after ``idle_timeout_s`` seconds without an event, e.g. while the server is
        unreachable ("idle_timeout"; None waits forever), or when :meth:`EventStream.cancel` is
        called from any thread ("cancelled"). A refusal that resuming cannot cure (NOT_FOUND,
        OUT_OF_RANGE) raises :class:`PenumbraError`.
        """
        return EventStream(self, run_id, from_seq=from_seq, timeout_s=timeout_s, idle_timeout_s=idle_timeout_s)

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
    """An iterator of :class:`Event` that reconnects and resumes from the last seq seen.

    Iteration ends with StopIteration after the run's closing event, the total ``timeout_s``,
    ``idle_timeout_s`` without an event (default :data:`DEFAULT_IDLE_TIMEOUT_S`; None: wait
    forever) or :meth:`cancel`; :attr:`end_reason` is then "run_closed", "timeout",
    "idle_timeout", "cancelled" or "client_closed". A stream of a pending run handle first waits
    (within the same limits) for the run to open.
    """

    def __init__(self, client: Client, run_id: str | None, *, from_seq: int = 1, timeout_s: float | None = None,
                 idle_timeout_s: float | None = DEFAULT_IDLE_TIMEOUT_S, handle: "RunHandle | None" = None) -> None:
        self._client = client
        self.run_id = run_id
        self._handle = handle
        self.next_seq = max(1, int(from_seq))
        self._timeout_s = timeout_s
        self._idle_timeout_s = idle_timeout_s
        self._cancelled = threading.Event()
        self._call = None
        self._lock = threading.Lock()
        self.reconnects = 0
        self.closed_run = False
        #: Why iteration ended ("" while it goes on).
        self.end_reason = ""
        self._generator = self._generate()

    @property
    def last_seq(self) -> int:
        return self.next_seq - 1

    def __iter__(self) -> "EventStream":
        return self

    def __next__(self) -> Event:
        return next(self._generator)

    def cancel(self) -> None:
        """End the iteration (safe from another thread): a waiting ``next()`` raises StopIteration
        at once and :attr:`end_reason` is "cancelled"."""
        self._cancelled.set()
        with self._lock:
            if self._call is not None:
                self._call.cancel()

    def _remaining(self, deadline: float | None, last_event: float) -> tuple[float | None, str]:
        """Seconds left before the stream must end (None: no limit), and which limit that is."""
        now = time.monotonic()
        limits = []
        if deadline is not None:
            limits.append((deadline - now, "timeout"))
        if self._idle_timeout_s is not None:
            limits.append((last_event + self._idle_timeout_s - now, "idle_timeout"))
        return min(limits) if limits else (None, "")

    def _end(self, reason: str) -> None:
        self.end_reason = "cancelled" if self._cancelled.is_set() else reason

    def _generate(self) -> Iterator[Event]:
        deadline = None if self._timeout_s is None else time.monotonic() + self._timeout_s
        last_event = time.monotonic()
        while self.run_id is None:  # a pending handle's run: wait for it to open
            remaining, limit = self._remaining(deadline, last_event)
            if self._cancelled.is_set() or (remaining is not None and remaining <= 0):
                return self._end(limit)
            self.run_id = self._handle._wait_run_id(0.2 if remaining is None else min(0.2, remaining))
            if self.run_id is None and self._handle.state == "failed":
                return self._end("run_failed")
        backoff = 0.1
        while not self._cancelled.is_set():
            remaining, limit = self._remaining(deadline, last_event)
            if remaining is not None and remaining <= 0:
                return self._end(limit)
            request = pb.WatchRunRequest(run_id=self.run_id, start_seq=self.next_seq)
            try:
                call = self._client._stub.WatchRun(request, timeout=remaining, wait_for_ready=True)
            except ValueError:  # the client was closed
                return self._end("client_closed")
            with self._lock:
                self._call = call
            if self._cancelled.is_set():
                call.cancel()
            try:
                for response in call:
                    event = response.event
                    last_event = time.monotonic()
                    if event.seq < self.next_seq:
                        continue  # never hand out an event twice
                    self.next_seq = event.seq + 1
                    backoff = 0.1
                    converted = Event.from_wire(event)
                    if converted.kind == "run_state_changed" and converted.state == "closed":
                        self.closed_run = True
                    yield converted
                if self.closed_run:
                    return self._end("run_closed")
                # Ended without the closing event (a server going away): resume.
            except grpc.RpcError as exc:
                code = exc.code()
                if self._cancelled.is_set():
                    return self._end("cancelled")
                if code == grpc.StatusCode.DEADLINE_EXCEEDED:
                    continue  # the call's deadline was the nearer limit: end if it has passed, else go on
                if code not in _RESUMABLE_WATCH:
                    raise error_from_rpc(exc, "WatchRun") from None
            finally:
                with self._lock:
                    self._call = None
                call.cancel()
            self.reconnects += 1
            if self._cancelled.wait(backoff):
                return self._end("cancelled")
            backoff = min(2 * backoff, 2.0)
        return self._end("cancelled")


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
    order: int = 0  # submission order within the handle (dropped ranges are runs of it)


class RunHandle:
    """Sends slices to one run and keeps its latest results. Made by :meth:`Client.open_run`
    or :meth:`Client.attach_run`.

    ``state``: "pending" (the server has not answered yet: slices queue, ``run_id`` is None for
    a run being opened, ``info`` None), "open", "closed" (closed by :meth:`close`, or attached
    to a closed run) or "failed" (the server refused to open or attach after the handle was
    returned; queued slices' tickets fail with that error, see ``errors``).
    """

    def __init__(self, client: Client, info: RunInfo | None, *, queue_depth: int | None, chunk_bytes: int,
                 cache_results: bool, max_retry_s: float, crop_to_windows: bool = False, spec: RunSpec | None = None,
                 open_request: pb.OpenRunRequest | None = None, attach_run_id: str | None = None) -> None:
        if queue_depth is not None and queue_depth < 1:
            raise ValueError(f"queue_depth: expected at least 1, got {queue_depth}")
        self._client = client
        self.info = info
        spec = info.spec if info is not None else spec
        self._run_id: str | None = info.run_id if info is not None else attach_run_id
        self._state = "pending" if info is None else ("closed" if info.state == "closed" else "open")
        self._open_request = open_request
        self._open_error: PenumbraError | None = None
        self._opened = threading.Event()  # set once the state leaves "pending"
        self._ledger = LinkLedger()
        self._cache_results = bool(cache_results)
        self._queue_depth_given = queue_depth is not None
        self.variable_set = spec.variable_set if spec is not None else None
        self.queue_depth = int(queue_depth or (spec.backlog.queue_depth if spec is not None else 4))
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
        self._sender = threading.Thread(target=self._send_loop, name=f"penumbra-sender-{self._run_id or 'pending'}",
                                        daemon=True)
        self._follow_stream: EventStream | None = None
        self._follower: threading.Thread | None = None
        if info is not None:
            self._opened.set()
            self._start()

    def _start(self) -> None:
        """Start the sender thread (it opens the run first when pending)."""
        if not self._sender.is_alive() and self._sender.ident is None:
            self._sender.start()

    def _start_follower(self) -> None:
        if not self._cache_results or self._follower is not None or self._run_id is None or self._stopping.is_set():
            return
        self._follow_stream = self._client.watch(self._run_id, from_seq=1, idle_timeout_s=None)
        self._follower = threading.Thread(target=self._follow_loop, name=f"penumbra-follower-{self._run_id}",
                                          daemon=True)
        self._follower.start()

    # -- the link ------------------------------------------------------------------------------

    @property
    def run_id(self) -> str | None:
        """The run's id; None while a run being opened is pending."""
        return self._run_id

    @property
    def state(self) -> str:
        """"pending", "open", "closed" or "failed" (see the class docstring)."""
        return self._state

    @property
    def link_up(self) -> bool:
        """False from a failed attempt to reach the server (or a pending open) until the next success."""
        return self._state != "pending" and not self._ledger.down

    @property
    def dropped(self) -> list[DroppedSlice]:
        """Slices dropped without the server receiving them (the latest 10 000), oldest first."""
        with self._ledger._lock:
            return list(self._ledger.dropped)

    @property
    def dropped_by_reason(self) -> dict[str, int]:
        """Dropped slices per reason ("link_down", "queue_full", "retry_time_exceeded",
        "handle_closed"; see :data:`penumbra_shim.DROP_REASONS`), complete counts."""
        with self._ledger._lock:
            return dict(self._ledger.counts)

    @property
    def gaps(self) -> list[ClientGap]:
        """Outages recorded on the server so far (with their ``gap_index`` and ``event_seq``)."""
        with self._ledger._lock:
            return list(self._ledger.recorded)

    @property
    def link_outages(self) -> int:
        """Times the link went down (including a pending open)."""
        return self._ledger.outages

    def wait_open(self, timeout_s: float | None = None) -> bool:
        """Wait until the run is open (or the handle leaves "pending" otherwise); True if open."""
        self._opened.wait(timeout_s)
        return self._state in ("open", "closed") and self._run_id is not None

    def _wait_settled(self, timeout_s: float | None) -> None:
        self._opened.wait(timeout_s)

    def _wait_run_id(self, timeout_s: float) -> str | None:
        self._opened.wait(timeout_s)
        return self._run_id if self._state != "failed" else None

    def _establish(self) -> bool:
        """Open (or attach to) the run, retrying with backoff while the server is unreachable.

        True once open; False if the server refused or the handle was stopped.
        """
        method = "OpenRun" if self._open_request is not None else "GetRun"
        backoff = 0.1
        while not self._stopping.is_set():
            started = time.time()
            try:
                if self._open_request is not None:
                    call = self._client._stub.OpenRun.future(self._open_request, timeout=self._client.deadline_s,
                                                             wait_for_ready=True)
                else:
                    call = self._client._stub.GetRun.future(pb.GetRunRequest(run_id=self._run_id),
                                                            timeout=self._client.deadline_s, wait_for_ready=True)
            except ValueError:  # the client was closed
                return False
            while not call.done():
                if self._stopping.wait(0.05):
                    call.cancel()
                    return False
            try:
                response = call.result()
                info = RunInfo.from_wire(response.run)
                if self._open_request is not None:
                    self._client._tokens.remember_writer(info.run_id, response.writer_token)
            except grpc.RpcError as exc:
                if exc.code() in _RETRYABLE_OPEN:
                    self._ledger.mark_down(f"{method}: {exc.code().name}: {exc.details()}", since=started)
                    if self._stopping.wait(backoff):
                        return False
                    backoff = min(2 * backoff, 2.0)
                    continue
                self._open_error = error_from_rpc(exc, method)
                self.errors.append(self._open_error)
                with self._cond:
                    self._state = "failed"
                    failed, self._queue = list(self._queue), deque()
                    self._cond.notify_all()
                self._opened.set()
                for pending in failed:
                    pending.ticket._fail(self._open_error)
                return False
            except grpc.FutureCancelledError:
                return False
            with self._cond:
                self.info = info
                self._run_id = info.run_id
                self.variable_set = info.spec.variable_set
                if not self._queue_depth_given:
                    self.queue_depth = info.spec.backlog.queue_depth
                self._state = "closed" if info.state == "closed" else "open"
                self._cond.notify_all()
            self._opened.set()
            self._start_follower()
            self._link_works()
            return True
        return False

    def _link_works(self) -> None:
        """A call succeeded: end an outage and record every unreported gap on the server."""
        self._ledger.mark_up()
        self._report_gaps()

    def _report_gaps(self) -> None:
        """RecordClientGap for every gap not yet recorded (one attempt each; kept if the link broke)."""
        gaps = self._ledger.take_unreported()
        for index, gap in enumerate(gaps):
            try:
                response = self._client._stub.RecordClientGap(gap.request(self._run_id),
                                                              timeout=self._client.deadline_s)
            except ValueError:  # the client was closed
                self._ledger.put_back(gaps[index:])
                return
            except grpc.RpcError as exc:
                if exc.code() in _RETRYABLE_SEND:
                    self._ledger.put_back(gaps[index:])  # the link broke again: after the next success
                    return
                self.errors.append(error_from_rpc(exc, "RecordClientGap"))
                continue
            self._ledger.reported(dataclasses.replace(gap, gap_index=response.gap_index,
                                                      event_seq=response.event_seq))

    def _drop(self, pending: _Pending, reason: str | None = None, *, attempts: int = 0) -> None:
        """Count a slice the server will never receive, with its reason, and resolve its ticket."""
        drop = self._ledger.drop(pending.slice_.iteration, pending.slice_.time, pending.order, reason,
                                 link_pending=self._state == "pending")
        with self._cond:
            self.stats.dropped_locally += 1
        pending.ticket._resolve(SliceAck(iteration=pending.slice_.iteration, accepted=False, skipped_locally=True,
                                         part_index=pending.slice_.part_index,
                                         parts_expected=pending.slice_.part_count, attempts=attempts,
                                         drop_reason=drop.reason_text))

    # -- sending -------------------------------------------------------------------------------

    def submit(self, slice_: OutgoingSlice, *, crop_to_windows: bool | None = None) -> SubmitTicket:
        """Queue a built slice for the background sender and return at once.

        If ``queue_depth`` slices are already waiting, the oldest waiting one is dropped
        (its ticket resolves with ``skipped_locally=True`` and its ``drop_reason``): the
        evolution never waits, also while the run is pending or the server unreachable. A slice
        (or part) waiting with the same iteration and part index is replaced by this one.

        ``crop_to_windows`` (default: the handle's option): the sender cuts every patch to the
        data windows the server asked for last (plus their stencil nodes) just before sending;
        a slice outside the windows' validity, or before any windows, goes whole.
        """
        start = time.perf_counter()
        if not isinstance(slice_, OutgoingSlice):
            raise TypeError(f"slice_: expected the OutgoingSlice returned by build_slice(), got {type(slice_).__name__}")
        if self.variable_set is not None and slice_.variable_set != self.variable_set:
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
            self._queue.append(_Pending(slice_, ticket, crop, order=self.stats.submitted))
            self.stats.submitted += 1
            self._cond.notify_all()
        for old in dropped:
            self._drop(old)
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
        if self._state == "pending" and not self._establish():
            with self._cond:
                never_sent, self._queue = list(self._queue), deque()
                self._cond.notify_all()
            for pending in never_sent:  # stopped before the run opened (a refusal failed them already)
                self._drop(pending, "handle_closed")
            return
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
                self._drop(pending, "handle_closed", attempts=attempts)
                return
            except grpc.RpcError as exc:
                if exc.code() not in _RETRYABLE_SEND:
                    error = error_from_rpc(exc, "SendSlice")
                    self.stats.refused += 1
                    self.errors.append(error)
                    pending.ticket._fail(error)
                    self._link_works()  # a refusal is an answer: the link is up
                    return
                self._ledger.mark_down(f"SendSlice: {exc.code().name}: {exc.details()}",
                                       since=time.time() - (time.perf_counter() - t0))
                with self._cond:
                    newer_waiting = len(self._queue) >= self.queue_depth
                if newer_waiting or self._stopping.is_set() or time.monotonic() - started > self.max_retry_s:
                    # Keep newest: a full queue of newer slices beats retrying this one.
                    reason = ("handle_closed" if self._stopping.is_set() else "link_down" if newer_waiting
                              else "retry_time_exceeded")
                    self._drop(pending, reason, attempts=attempts)
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
            self._link_works()
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
        """Latest state of every surface, by label: from the cache, or (refresh) from the server.
        Empty while the handle is pending (no call is made)."""
        if self._run_id is None or self._state in ("pending", "failed"):
            return {}
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
        None before the server has issued any, and while the handle is pending (no call)."""
        if self._run_id is None or self._state in ("pending", "failed"):
            return None
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
        """The data windows the server wants in the next slice (cache, or refresh from the server);
        None before the first and while the handle is pending (no call)."""
        if self._run_id is None or self._state in ("pending", "failed"):
            return None
        if refresh or self._follower is None:
            guidance, windows = self._client._latest_guidance_reply(self.run_id)
            with self._latest_lock:
                self._latest_guidance, self._latest_windows = guidance, windows
            return windows
        with self._latest_lock:
            return self._latest_windows

    def events(self, *, from_seq: int = 1, timeout_s: float | None = None,
               idle_timeout_s: float | None = DEFAULT_IDLE_TIMEOUT_S) -> EventStream:
        """The run's events from ``from_seq`` (see :meth:`Client.watch`: the stream ends after the
        closing event, ``timeout_s`` in total, ``idle_timeout_s`` without an event, or
        :meth:`EventStream.cancel`). On a pending handle the stream first waits for the run to
        open, within the same limits."""
        if self._run_id is None or self._state == "pending":
            return EventStream(self._client, None, from_seq=from_seq, timeout_s=timeout_s,
                               idle_timeout_s=idle_timeout_s, handle=self)
        return self._client.watch(self._run_id, from_seq=from_seq, timeout_s=timeout_s, idle_timeout_s=idle_timeout_s)

    @property
    def writer_token(self) -> str | None:
        """The run's writer token, if this client holds it (keep it to attach again after a restart)."""
        return self._client._tokens.writer_token(self.run_id)

    def describe(self) -> RunInfo | None:
        """The run as the server describes it now; None while the handle is pending (no call)."""
        if self._run_id is None or self._state in ("pending", "failed"):
            return None
        self.info = self._client.get_run(self._run_id)
        return self.info

    # -- closing -----------------------------------------------------------------------------------

    def _stop_threads(self, *, timeout_s: float) -> None:
        with self._cond:
            self._closed = True
            self._stopping.set()
            self._cond.notify_all()
        if self._sender.ident is not None:
            self._sender.join(timeout_s)
        if self._follow_stream is not None:
            self._follow_stream.cancel()
        if self._follower is not None:
            self._follower.join(timeout_s)

    def close(self, *, close_run: bool = True, timeout_s: float = 120.0) -> RunInfo | None:
        """Send what is queued, record any outage not yet recorded, stop the threads and (by
        default) close the run on the server.

        Returns the closed run's description when ``close_run``. A pending handle first waits up
        to ``timeout_s`` for its run to open; if it does not, the queued slices are dropped
        (reason "handle_closed"), the threads stop and None is returned.
        """
        deadline = time.monotonic() + timeout_s
        self._opened.wait(timeout_s)
        if self._state in ("pending", "failed"):
            self._stop_threads(timeout_s=5.0)
            return None
        self.flush(max(0.0, deadline - time.monotonic()))
        if not self._ledger.down:
            self._report_gaps()
        info = self._client.close_run(self.run_id, timeout_s=timeout_s) if close_run else None
        with self._cond:
            self._state = "closed"
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
