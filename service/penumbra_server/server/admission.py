"""Back-pressure before the upload: the server tells a client whether a slice would be taken or
only skipped, and holds a place for the slices it admits.

The rule (one run, answered on the event loop from memory, so concurrent asks cannot race):

* the run's queue holds its queued slices plus the places held for admitted slices not yet
  uploaded; a slice is admitted while that sum is below the run's queue depth (a re-ask for an
  iteration already holding a place refreshes it), and a place is held :data:`HOLD_S` seconds
  or until a SendSlice of that iteration arrives (its header consumes the place, whatever
  becomes of the stream);
* a full queue refuses: under keep-newest the upload would displace a queued slice the client
  already paid for, so one of the two uploads would only be skipped;
* with a server-wide budget of queued bytes (``max_queued_bytes``), a slice whose bytes would
  not fit beside the queued, arriving and admitted ones is refused too;
* a slice the run already accepted is admitted (the server answers its resend at the header).

A SendSlice that never asked is handled as before (keep-newest), so old clients work unchanged.
The desk also counts, per run, the answers and the slice bytes received on SendSlice streams
(Run.admissions_granted, admissions_refused, bytes_received).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

from penumbra_shim._wire import horizons_pb2 as pb

from .errors import ServiceError

__all__ = ["AdmissionDesk", "HOLD_S", "queued_slice_count"]

#: Seconds a place stays held for an admitted slice that has not arrived.
HOLD_S = 30.0


def queued_slice_count(run) -> int:
    """Slices waiting in a run's queue (the one being processed not counted)."""
    return len(run._queue)


@dataclass
class _RunDesk:
    held: dict[int, tuple[float, int]] = field(default_factory=dict)  # iteration -> (expiry monotonic, bytes)
    granted: int = 0
    refused: int = 0
    bytes_received: int = 0


class AdmissionDesk:
    """Places held per run, and the counters (module docstring). Use on the event loop only."""

    def __init__(self, *, hold_s: float = HOLD_S, clock=time.monotonic) -> None:
        self.hold_s = float(hold_s)
        self._clock = clock
        self._runs: dict[str, _RunDesk] = {}

    def _desk(self, run_id: str) -> _RunDesk:
        return self._runs.setdefault(run_id, _RunDesk())

    def _expire(self, desk: _RunDesk) -> None:
        now = self._clock()
        for iteration in [i for i, (expiry, _) in desk.held.items() if expiry <= now]:
            del desk.held[iteration]

    def held_bytes(self) -> int:
        """Bytes of every place held (all runs): counted against the byte budget."""
        total = 0
        for desk in self._runs.values():
            self._expire(desk)
            total += sum(nbytes for _, nbytes in desk.held.values())
        return total

    def reserve(self, run, request: pb.AdmissionReserveRequest, *, queued_slices: int,
                budget_left: int | None) -> pb.AdmissionReserveResponse:
        """Answer one ask for ``run`` (a RunRecord) with ``queued_slices`` waiting in its queue;
        ``budget_left``: bytes still free under the server's budget (None: no budget)."""
        run.check_accepting()
        if request.total_bytes < 0:
            raise ServiceError.invalid(f"total_bytes: expected a byte count >= 0, got {request.total_bytes}")
        desk = self._desk(run.run_id)
        self._expire(desk)
        iteration = int(request.iteration)
        depth = int(run.settings.queue_depth)
        others = sum(1 for i in desk.held if i != iteration)

        def answer(admitted: bool, reason: str) -> pb.AdmissionReserveResponse:
            if admitted:
                desk.granted += 1
            else:
                desk.refused += 1
            return pb.AdmissionReserveResponse(admitted=admitted, reason=reason, hold_s=self.hold_s if admitted else 0.0,
                                               queued=queued_slices, held=len(desk.held), queue_depth=depth)

        if run.is_duplicate(iteration):
            return answer(True, f"iteration {iteration} was accepted before: a resend is answered at its header")
        if queued_slices + others >= depth:
            return answer(False, (f"the run's queue is full ({queued_slices} queued and {others} places held of "
                                  f"depth {depth}): under keep-newest this upload would displace a slice already "
                                  f"received; drop it locally"))
        previous = desk.held.get(iteration, (0.0, 0))[1]
        if budget_left is not None and request.total_bytes > budget_left + previous:
            return answer(False, (f"total_bytes: {request.total_bytes} bytes would exceed the server's budget of "
                                  f"queued bytes (max_queued_bytes; {budget_left + previous} bytes free)"))
        desk.held[iteration] = (self._clock() + self.hold_s, int(request.total_bytes))
        return answer(True, f"a place in the queue is held for {self.hold_s:g} s")

    def arrived(self, run_id: str, iteration: int) -> None:
        """A SendSlice header for ``iteration`` arrived: its place (if any) is consumed."""
        desk = self._runs.get(run_id)
        if desk is not None:
            desk.held.pop(int(iteration), None)

    def count_bytes(self, run_id: str, nbytes: int) -> None:
        self._desk(run_id).bytes_received += int(nbytes)

    def fill(self, message: pb.Run) -> pb.Run:
        """Set a wire Run's admission counters."""
        desk = self._runs.get(message.run_id)
        if desk is not None:
            message.admissions_granted = desk.granted
            message.admissions_refused = desk.refused
            message.bytes_received = desk.bytes_received
        return message
