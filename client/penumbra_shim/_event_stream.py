"""A run's events as an iterator that resumes by itself: :class:`EventStream`.

It reconnects after a dropped stream or a watcher that fell behind (the server says where to
resume) from the last sequence number seen, so its events come without gaps or repeats; it ends
when the run closes, on ``timeout_s``, after ``idle_timeout_s`` without an event, or when
cancelled.
"""

from __future__ import annotations

import threading
import time
from typing import TYPE_CHECKING, Iterator

import grpc

from ._errors import error_from_rpc
from ._events import Event, RunStateChangedEvent, event_from_wire
from ._wire import horizons_pb2 as pb

if TYPE_CHECKING:
    from ._client import Client
    from ._run_handle import RunHandle

__all__ = ["EventStream", "DEFAULT_IDLE_TIMEOUT_S"]

#: How long an :class:`EventStream` waits for its next event before it ends, seconds.
DEFAULT_IDLE_TIMEOUT_S = 300.0
# A watch stream that breaks for these reasons is resumed from the last event seen.
_RESUMABLE_WATCH = frozenset({
    grpc.StatusCode.UNAVAILABLE,
    grpc.StatusCode.RESOURCE_EXHAUSTED,  # this watcher fell behind; the server says where to resume
    grpc.StatusCode.ABORTED,
    grpc.StatusCode.CANCELLED,
})


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
                    converted = event_from_wire(event)
                    if isinstance(converted, RunStateChangedEvent) and converted.state == "closed":
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
