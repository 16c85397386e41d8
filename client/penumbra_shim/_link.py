"""The state of one run handle's link to the server and the slices it dropped.

The link is *down* from the first failed attempt to reach the server (an OpenRun without an
answer, a SendSlice that broke) until the next success (the run opened, a slice delivered).
Every slice the shim drops without the server ever receiving it is recorded with its iteration
and reason; the drops of one outage become a :class:`ClientGap`, which the sender reports to
the server (RecordClientGap) once the link is back, so the run's archive and event stream show
the outage instead of a silent hole. Drops while the link is up (the evolution outpaced the
sender) are reported the same way after the next delivered slice.
"""

from __future__ import annotations

import threading
import time
import uuid
from collections import deque
from dataclasses import dataclass

from ._wire import horizons_pb2 as pb

__all__ = ["DROP_REASONS", "DroppedSlice", "DroppedRange", "ClientGap", "LinkLedger"]

#: Reason names of dropped slices and what they mean.
DROP_REASONS: dict[str, str] = {
    "link_down": "link down: server unreachable",
    "queue_full": "local queue full",
    "retry_time_exceeded": "retry time exceeded",
    "handle_closed": "handle closed before the slice was sent",
    "server_busy": "the server said it would only skip the slice (back-pressure)",
}
_REASON_WIRE = {
    "link_down": pb.CLIENT_DROP_REASON_LINK_DOWN,
    "queue_full": pb.CLIENT_DROP_REASON_QUEUE_FULL,
    "retry_time_exceeded": pb.CLIENT_DROP_REASON_RETRY_TIME_EXCEEDED,
    "handle_closed": pb.CLIENT_DROP_REASON_HANDLE_CLOSED,
    "server_busy": pb.CLIENT_DROP_REASON_SERVER_BUSY,
}
_REASON_NAMES = {v: k for k, v in _REASON_WIRE.items()}
# The ledger of individual drops is for inspection; its memory stays bounded on long outages
# (the counts and the ranges reported to the server are complete regardless).
_LEDGER_LIMIT = 10_000


@dataclass(frozen=True)
class DroppedSlice:
    """A slice the shim dropped: iteration, time (M), reason (a key of :data:`DROP_REASONS`),
    its submission order in the handle, and the wall clock of the drop (s since the epoch)."""

    iteration: int
    time: float
    reason: str
    order: int
    unix_s: float

    @property
    def reason_text(self) -> str:
        return DROP_REASONS[self.reason]


@dataclass(frozen=True)
class DroppedRange:
    """Consecutively submitted slices dropped for one reason: first/last iteration and time (M),
    how many slices (not iterations), and the reason name."""

    iteration_first: int
    iteration_last: int
    count: int
    reason: str
    time_first: float
    time_last: float

    def to_wire(self) -> pb.DroppedRange:
        return pb.DroppedRange(iteration_first=self.iteration_first, iteration_last=self.iteration_last,
                               count=self.count, reason=_REASON_WIRE[self.reason], time_first_m=self.time_first,
                               time_last_m=self.time_last)

    @classmethod
    def from_wire(cls, r: pb.DroppedRange) -> "DroppedRange":
        return cls(iteration_first=r.iteration_first, iteration_last=r.iteration_last, count=r.count,
                   reason=_REASON_NAMES.get(r.reason, str(r.reason)), time_first=r.time_first_m,
                   time_last=r.time_last_m)


@dataclass(frozen=True)
class ClientGap:
    """One outage of the link (or a batch of drops while it was up) and what it cost.

    ``start_unix_s`` / ``end_unix_s``: the client's wall clock when the link went down and came
    back. ``gap_index`` / ``event_seq``: where the server stored it (-1 until recorded).
    """

    gap_id: str
    start_unix_s: float
    end_unix_s: float
    ranges: tuple[DroppedRange, ...]
    cause: str
    gap_index: int = -1
    event_seq: int = -1

    @property
    def slices_dropped(self) -> int:
        return sum(r.count for r in self.ranges)

    @property
    def iterations(self) -> tuple[tuple[int, int], ...]:
        """(first, last) iteration of every range."""
        return tuple((r.iteration_first, r.iteration_last) for r in self.ranges)

    def request(self, run_id: str) -> pb.RecordClientGapRequest:
        return pb.RecordClientGapRequest(run_id=run_id, gap_id=self.gap_id, start_unix_s=self.start_unix_s,
                                         end_unix_s=self.end_unix_s, ranges=[r.to_wire() for r in self.ranges],
                                         cause=self.cause)

    @classmethod
    def from_event(cls, g: pb.ClientGapRecorded, *, event_seq: int) -> "ClientGap":
        return cls(gap_id="", start_unix_s=g.start_unix_s, end_unix_s=g.end_unix_s,
                   ranges=tuple(DroppedRange.from_wire(r) for r in g.ranges), cause=g.cause, gap_index=g.gap_index,
                   event_seq=event_seq)


def _ranges(drops: list[DroppedSlice]) -> tuple[DroppedRange, ...]:
    """Runs of consecutive submission order and equal reason, in submission order."""
    out: list[DroppedRange] = []
    run: list[DroppedSlice] = []
    for drop in sorted(drops, key=lambda d: d.order):
        if run and (drop.order != run[-1].order + 1 or drop.reason != run[0].reason):
            out.append(DroppedRange(run[0].iteration, run[-1].iteration, len(run), run[0].reason, run[0].time,
                                    run[-1].time))
            run = []
        run.append(drop)
    if run:
        out.append(DroppedRange(run[0].iteration, run[-1].iteration, len(run), run[0].reason, run[0].time,
                                run[-1].time))
    return tuple(out)


class LinkLedger:
    """Thread-safe: the link's up/down state, every drop, and the gaps waiting to be reported."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.down = False
        self.outages = 0
        self._down_since = 0.0
        self._cause = ""
        self._outage_drops: list[DroppedSlice] = []
        self._loose_drops: list[DroppedSlice] = []  # dropped while the link was up
        self._unreported: deque[ClientGap] = deque()
        self.recorded: list[ClientGap] = []
        self.dropped: deque[DroppedSlice] = deque(maxlen=_LEDGER_LIMIT)
        self.counts: dict[str, int] = {name: 0 for name in DROP_REASONS}

    def mark_down(self, cause: str, *, since: float | None = None) -> None:
        """The link failed (``since``: wall clock of the failed attempt's start; default now)."""
        with self._lock:
            self._cause = cause
            if not self.down:
                self.down = True
                self.outages += 1
                self._down_since = time.time() if since is None else since

    def mark_up(self) -> None:
        """The link works again: an outage that dropped slices becomes a gap to report."""
        with self._lock:
            if not self.down:
                return
            self.down = False
            if self._outage_drops:
                self._unreported.append(ClientGap(uuid.uuid4().hex, self._down_since, time.time(),
                                                  _ranges(self._outage_drops), self._cause))
            self._outage_drops = []

    def drop(self, iteration: int, time_m: float, order: int, reason: str | None = None, *,
             link_pending: bool = False) -> DroppedSlice:
        """Record a dropped slice; ``reason`` None: "link_down" while the link is down (or the run
        not open yet, ``link_pending``), else "queue_full"."""
        with self._lock:
            if link_pending and not self.down:  # the run not open yet: an outage from now on
                self.down, self._down_since, self._cause = True, time.time(), "the run is not open yet"
                self.outages += 1
            down = self.down
            if reason is None:
                reason = "link_down" if down else "queue_full"
            drop = DroppedSlice(int(iteration), float(time_m), reason, int(order), time.time())
            (self._outage_drops if down else self._loose_drops).append(drop)
            self.dropped.append(drop)
            self.counts[reason] += 1
            return drop

    def take_unreported(self) -> list[ClientGap]:
        """Gaps to report now: finished outages, and drops made while the link was up."""
        with self._lock:
            if self._loose_drops:
                loose = self._loose_drops
                self._loose_drops = []
                reasons = {d.reason for d in loose}
                cause = ("the evolution submitted faster than the sender delivered (local queue full)"
                         if reasons == {"queue_full"} else
                         "; ".join(DROP_REASONS[r] for r in sorted(reasons)))
                self._unreported.append(ClientGap(
                    uuid.uuid4().hex, loose[0].unix_s, loose[-1].unix_s, _ranges(loose), cause))
            gaps = list(self._unreported)
            self._unreported.clear()
            return gaps

    def put_back(self, gaps: list[ClientGap]) -> None:
        """Gaps whose report failed for now (the link broke again): reported next time."""
        with self._lock:
            self._unreported.extendleft(reversed(gaps))

    def reported(self, gap: ClientGap) -> None:
        with self._lock:
            self.recorded.append(gap)

    def unreported_count(self) -> int:
        with self._lock:
            return len(self._unreported) + (1 if self._loose_drops else 0) + (1 if self._outage_drops else 0)
