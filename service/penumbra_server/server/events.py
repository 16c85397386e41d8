"""A run's event log and its fan-out to watchers.

Events carry consecutive sequence numbers from 1. The log keeps the most recent
``limit`` events in memory; a watcher subscribes from any sequence number still held and
receives the held events, then live ones through its own bounded queue. A watcher that falls
more than its queue behind is marked overflowed and told (its stream ends with
RESOURCE_EXHAUSTED and the seq to resume from); the run itself never waits for a watcher.
Everything here runs on the event loop thread.
"""

from __future__ import annotations

import asyncio
from collections import deque

import grpc

from penumbra_shim._wire import horizons_pb2 as pb

from .errors import ServiceError

__all__ = ["EventLog", "Subscriber"]


class Subscriber:
    """One watcher's bounded queue of live events."""

    def __init__(self, capacity: int) -> None:
        self.capacity = capacity
        self._items: deque[pb.RunEvent] = deque()
        self._wake = asyncio.Event()
        self.overflowed = False
        self.ended = False
        self.server_stopping = False

    def offer(self, event: pb.RunEvent) -> None:
        if self.overflowed or self.ended:
            return
        if len(self._items) >= self.capacity:
            self.overflowed = True  # keep what is queued: it is a gap-free prefix
        else:
            self._items.append(event)
        self._wake.set()

    def end(self) -> None:
        self.ended = True
        self._wake.set()

    async def next(self) -> pb.RunEvent | None:
        """The next queued event; None once the queue is empty and the log ended or overflowed."""
        while True:
            if self._items:
                return self._items.popleft()
            if self.ended or self.overflowed:
                return None
            self._wake.clear()
            await self._wake.wait()


class EventLog:
    """Ordered events of one run, with subscribers.

    Args:
        first_seq: sequence number of the next event (1 for a new run).
        limit: events kept in memory.
        subscriber_capacity: queue length of each watcher.
    """

    def __init__(self, *, first_seq: int = 1, limit: int = 100_000, subscriber_capacity: int = 1024) -> None:
        self._events: deque[pb.RunEvent] = deque()
        self._first_held = first_seq
        self.next_seq = first_seq
        self.limit = limit
        self.subscriber_capacity = subscriber_capacity
        self._subscribers: set[Subscriber] = set()
        self.closed = False

    @property
    def last_seq(self) -> int:
        return self.next_seq - 1

    def preload(self, events: list[pb.RunEvent]) -> None:
        """Install events rebuilt from the archive (a restarted server); only before any append."""
        if self._events or not events:
            return
        events = sorted(events, key=lambda e: e.seq)
        if [e.seq for e in events] != list(range(events[0].seq, events[0].seq + len(events))):
            return  # not gap-free: keep none rather than serve a log with holes
        if events[-1].seq != self.next_seq - 1:
            return
        self._events.extend(events[-self.limit:])
        self._first_held = self._events[0].seq

    def append(self, event: pb.RunEvent) -> None:
        if event.seq != self.next_seq:
            raise AssertionError(f"event seq {event.seq} appended where {self.next_seq} was due")
        self._events.append(event)
        self.next_seq += 1
        while len(self._events) > self.limit:
            self._events.popleft()
            self._first_held += 1
        for subscriber in tuple(self._subscribers):
            subscriber.offer(event)

    def subscribe(self, start_seq: int) -> tuple[list[pb.RunEvent], Subscriber]:
        """Held events from ``start_seq`` on, and a queue for the live ones after them.

        Raises ServiceError OUT_OF_RANGE if ``start_seq`` is no longer held or lies in the future.
        """
        start_seq = max(1, int(start_seq))
        if start_seq < self._first_held:
            raise ServiceError(
                grpc.StatusCode.OUT_OF_RANGE,
                f"start_seq: events before seq {self._first_held} are no longer held by this server; "
                f"read them from the run's archive and watch from start_seq={self._first_held}",
                reason="EVENTS_TRIMMED",
            )
        if start_seq > self.next_seq:
            raise ServiceError(
                grpc.StatusCode.OUT_OF_RANGE,
                f"start_seq: {start_seq} is beyond the next event (seq {self.next_seq})",
                reason="START_SEQ_BEYOND_NEXT",
            )
        held = list(self._events)[start_seq - self._first_held:]
        subscriber = Subscriber(self.subscriber_capacity)
        if self.closed:
            subscriber.end()
        else:
            self._subscribers.add(subscriber)
        return held, subscriber

    def unsubscribe(self, subscriber: Subscriber) -> None:
        self._subscribers.discard(subscriber)

    def stop_watchers(self) -> None:
        """The server is stopping: end every watcher's stream (they are told to reconnect)."""
        for subscriber in tuple(self._subscribers):
            subscriber.server_stopping = True
            subscriber.end()
        self._subscribers.clear()

    def close(self) -> None:
        """No more events: every watcher's stream ends once it has drained its queue."""
        self.closed = True
        for subscriber in tuple(self._subscribers):
            subscriber.end()
        self._subscribers.clear()

    @property
    def subscriber_count(self) -> int:
        return len(self._subscribers)
