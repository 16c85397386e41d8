"""One run as the evolution sees it: :class:`RunHandle` opens (or attaches to) the run in the
background, sends slices (:mod:`._sender`), reports outages of the link, and keeps the latest
surfaces, guidance and data windows cached from the run's events (a follower thread).

A handle whose server does not answer within ``open_timeout_s`` is *pending*: slices queue and
the sender thread keeps trying to open the run (OpenRun carries a request id, so a retry returns
the same run). When the link is back after an outage the handle records it on the server
(RecordClientGap with a gap id), so the run's archive and events show it.
"""

from __future__ import annotations

import dataclasses
import threading
import time
from collections import deque
from typing import TYPE_CHECKING

import grpc

from ._errors import PenumbraError, error_from_rpc
from ._event_stream import DEFAULT_IDLE_TIMEOUT_S, EventStream
from ._events import DataWindowsEvent, GuidanceEvent, SurfaceFoundEvent, SurfaceNotFoundEvent
from ._guidance_types import DataWindows, Guidance
from ._link import ClientGap, DroppedSlice, LinkLedger
from ._results import RunInfo, SurfaceState
from ._sender import RETRYABLE_SEND, RunSender, SenderStats, _Pending
from ._spec_types import RunSpec
from ._wire import horizons_pb2 as pb

if TYPE_CHECKING:
    from ._client import Client

__all__ = ["RunHandle"]

# OpenRun / GetRun of a pending handle: the server unreachable or slow; anything else is a refusal.
_RETRYABLE_OPEN = frozenset({grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.DEADLINE_EXCEEDED,
                             grpc.StatusCode.ABORTED, grpc.StatusCode.CANCELLED})


class RunHandle(RunSender):
    """Sends slices to one run and keeps its latest results. Made by :meth:`Client.open_run`
    or :meth:`Client.attach_run`.

    ``state``: "pending" (the server has not answered yet: slices queue, ``run_id`` is None for
    a run being opened, ``info`` None), "open", "closed" (closed by :meth:`close`, or attached
    to a closed run) or "failed" (the server refused to open or attach after the handle was
    returned; queued slices' tickets fail with that error, see ``errors``).
    """

    def __init__(self, client: Client, info: RunInfo | None, *, queue_depth: int | None, chunk_bytes: int,
                 cache_results: bool, max_retry_s: float, crop_to_windows: bool = False, spec: RunSpec | None = None,
                 open_request: pb.OpenRunRequest | None = None, attach_run_id: str | None = None,
                 ask_admission: bool = False) -> None:
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
        #: Ask the server before each upload whether it would take the slice (_sender.py).
        self.ask_admission = bool(ask_admission)
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
                if exc.code() in RETRYABLE_SEND:
                    self._ledger.put_back(gaps[index:])  # the link broke again: after the next success
                    return
                self.errors.append(error_from_rpc(exc, "RecordClientGap"))
                continue
            self._ledger.reported(dataclasses.replace(gap, gap_index=response.gap_index,
                                                      event_seq=response.event_seq))

    # -- results ---------------------------------------------------------------------------------

    def _follow_loop(self) -> None:
        stream = self._follow_stream
        try:
            for event in stream:
                self.last_seq = event.seq
                if isinstance(event, (SurfaceFoundEvent, SurfaceNotFoundEvent)) and event.surface is not None:
                    label = event.surface.label
                    with self._latest_lock:
                        state = self._latest.get(label) or SurfaceState(label, None, False, -1, "", 0)
                        self._latest[label] = state.updated(event.surface)
                elif isinstance(event, GuidanceEvent) and event.guidance is not None:
                    with self._latest_lock:
                        self._latest_guidance = event.guidance
                elif isinstance(event, DataWindowsEvent) and event.windows is not None:
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
            return self._refresh_guidance()[0]
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
            return self._refresh_guidance()[1]
        with self._latest_lock:
            return self._latest_windows

    def _refresh_guidance(self) -> tuple[Guidance | None, DataWindows | None]:
        """Guidance and windows from the server (GetLatestGuidance), kept in the cache."""
        guidance, windows = self._client._latest_guidance_reply(self.run_id)
        with self._latest_lock:
            self._latest_guidance, self._latest_windows = guidance, windows
        return guidance, windows

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

    @property
    def server_held_iteration(self) -> int:
        """The highest iteration the server holds (archived, or on its disk in the run's spool),
        as of the last :meth:`describe` or (re)attach; -1 if none or not known yet. An evolution
        restarted from a checkpoint need not resubmit slices up to it."""
        info = self.info
        return info.highest_held_iteration if info is not None else -1

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
