"""The connection to a server: :func:`connect` and :class:`Client` (unary calls, opening and
attaching run handles, event streams). Run handles are :mod:`._run_handle` (sending:
:mod:`._sender`); event streams :mod:`._event_stream`.

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

import time
import uuid

import grpc

from ._auth import BearerTokens, channel_credentials
from ._errors import error_from_rpc
from ._event_stream import DEFAULT_IDLE_TIMEOUT_S, EventStream
from ._guidance_types import DataWindows, Guidance
from ._results import RunInfo, SurfaceState
from ._run_handle import RunHandle
from ._slices import DEFAULT_CHUNK_BYTES
from ._spec_types import RunSpec
from ._wire import horizons_pb2 as pb
from ._wire import horizons_pb2_grpc as pb_grpc

__all__ = ["connect", "Client", "DEFAULT_OPEN_TIMEOUT_S"]

#: How long :meth:`Client.open_run` and :meth:`Client.attach_run` wait for the server, seconds.
DEFAULT_OPEN_TIMEOUT_S = 5.0
_MESSAGE_LIMIT = 64 * 1024 * 1024


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
                 open_timeout_s: float = DEFAULT_OPEN_TIMEOUT_S, ask_admission: bool = False) -> "RunHandle":
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
            ask_admission: before each upload of a whole slice, ask the server whether it would
                take it (AdmissionReserve); a slice it would only skip is dropped locally, counted
                with reason "server_busy" (``stats.server_busy``) and never uploaded.

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
                                       crop_to_windows=crop_to_windows, ask_admission=ask_admission),
                             open_timeout_s, "OpenRun")

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

        Raises:
            ValueError: ``run_id`` is not a non-empty string (e.g. the id of a run handle still
                pending: watch the handle's events with :meth:`RunHandle.events` instead).
        """
        if not isinstance(run_id, str) or not run_id:
            raise ValueError(f"run_id: expected a non-empty run id string, got {run_id!r}")
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
