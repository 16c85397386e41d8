"""What the server records about a client's link to a run: slices it refused, and outages the
client reports once its link is back (RecordClientGap).

Both become events of the run (SliceRejected, ClientGapRecorded), archived in ``events/`` in
their wire form so that a restarted server replays them; a gap is also written as rows of
``client_gaps/`` (one per dropped range). Everything here runs on the event loop thread.
"""

from __future__ import annotations

import asyncio
import logging
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import grpc
import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import _layout as layout
from .errors import ServiceError
from .run_events import event_row

if TYPE_CHECKING:
    from .runs import RunRecord

__all__ = ["LinkRecords", "REJECTION_CODES", "record_rejection", "record_client_gap"]

log = logging.getLogger("penumbra.server")

#: Refusals of a slice for a known, open run that are announced as SliceRejected events.
REJECTION_CODES = frozenset({
    grpc.StatusCode.INVALID_ARGUMENT,
    grpc.StatusCode.RESOURCE_EXHAUSTED,
    grpc.StatusCode.DATA_LOSS,
    grpc.StatusCode.FAILED_PRECONDITION,
})
# The refusal reaches the client only after its event is archived, so that a client that saw
# the error finds the event; an archive slower than this must not hold the reply back longer.
_REJECTION_ANNOUNCE_WAIT_S = 10.0
_GAP_ID_LIMIT = 64


@dataclass
class _KnownGap:
    index: int
    announced: asyncio.Future | None = None  # resolves to the event while its commit is pending
    event_seq: int = 0


class LinkRecords:
    """Per run: counters of rejected slices and recorded gaps, and the gap ids seen (dedup)."""

    def __init__(self) -> None:
        self.slices_rejected = 0
        self.gaps_recorded = 0
        self._gap_ids: dict[str, _KnownGap] = {}

    def restore(self, gaps: dict[str, np.ndarray], tracking_events: dict[str, np.ndarray]) -> None:
        """Counters and gap ids from the archive's ``client_gaps`` and ``events`` columns (restart)."""
        kinds = [str(k) for k in tracking_events.get("kind", [])]
        self.slices_rejected = kinds.count("slice_rejected")
        indices = [int(v) for v in gaps.get("gap_index", [])]
        self.gaps_recorded = max(indices) + 1 if indices else 0
        for i, index in enumerate(indices):
            gap_id = str(gaps["gap_id"][i])
            if gap_id:
                self._gap_ids[gap_id] = _KnownGap(index, None, int(gaps["event_seq"][i]))


async def record_rejection(run: "RunRecord", header: pb.SliceHeader, error: ServiceError) -> None:
    """Announce a refused slice of an open run as a SliceRejected event (other refusals: nothing).

    Waits (boundedly) until the event is archived; never raises.
    """
    if error.code not in REJECTION_CODES or not run.is_open or run.failed_reason:
        return
    time_m = header.time_m if math.isfinite(header.time_m) else float("nan")
    payload = pb.SliceRejected(iteration=header.iteration, time_m=time_m, status_code=error.code.name,
                               message=error.message)
    summary = f"iteration {header.iteration} refused: {error.code.name}: {error.message}"
    run.link.slices_rejected += 1
    announced = run.publish(
        lambda event: event.slice_rejected.CopyFrom(payload),
        time_m=time_m if math.isfinite(time_m) else 0.0, iteration=header.iteration,
        rows=lambda seq, now, event: {layout.EVENTS_GROUP: [event_row(seq, now, event, "slice_rejected", "", summary)]})
    try:
        await asyncio.wait_for(asyncio.shield(announced), _REJECTION_ANNOUNCE_WAIT_S)
    except asyncio.CancelledError:
        raise
    except Exception:  # the refusal itself must still reach the client
        log.exception("run %s: announcing the rejected iteration %d failed", run.run_id, header.iteration)


def _check_gap(request: pb.RecordClientGapRequest) -> None:
    if len(request.gap_id) > _GAP_ID_LIMIT:
        raise ServiceError.invalid(f"gap_id: at most {_GAP_ID_LIMIT} characters, got {len(request.gap_id)}")
    for name in ("start_unix_s", "end_unix_s"):
        value = getattr(request, name)
        if not math.isfinite(value) or value < 0:
            raise ServiceError.invalid(f"{name}: expected a finite wall-clock time (s since the epoch), got {value}")
    if request.end_unix_s < request.start_unix_s:
        raise ServiceError.invalid(f"end_unix_s: {request.end_unix_s} is before start_unix_s {request.start_unix_s}")
    for i, r in enumerate(request.ranges):
        where = f"ranges[{i}]"
        if r.iteration_last < r.iteration_first:
            raise ServiceError.invalid(f"{where}.iteration_last: {r.iteration_last} is below iteration_first "
                                       f"{r.iteration_first}")
        if r.count < 1:
            raise ServiceError.invalid(f"{where}.count: expected at least 1 dropped slice, got {r.count}")
        if r.reason not in layout.CLIENT_DROP_REASONS.values() or r.reason == 0:
            raise ServiceError.invalid(f"{where}.reason: expected a ClientDropReason other than UNSPECIFIED, "
                                       f"got {r.reason}")


def _gap_rows(request: pb.RecordClientGapRequest, index: int, seq: int, now: float) -> list[dict]:
    common = {"gap_index": index, "gap_id": request.gap_id, "start_unix_s": request.start_unix_s,
              "end_unix_s": request.end_unix_s, "cause": request.cause, "archived_unix_s": now, "event_seq": seq}
    if not request.ranges:
        return [dict(common, count=0, reason=0)]
    return [dict(common, iteration_first=r.iteration_first, iteration_last=r.iteration_last, count=r.count,
                 reason=r.reason, time_first=r.time_first_m, time_last=r.time_last_m) for r in request.ranges]


async def record_client_gap(run: "RunRecord", request: pb.RecordClientGapRequest) -> pb.RecordClientGapResponse:
    """Archive and announce an outage the client reports; a known ``gap_id`` stores nothing."""
    _check_gap(request)
    run.check_accepting()
    records: LinkRecords = run.link
    known = records._gap_ids.get(request.gap_id) if request.gap_id else None
    if known is not None:
        seq = known.event_seq if known.announced is None else (await asyncio.shield(known.announced)).seq
        return pb.RecordClientGapResponse(event_seq=seq, gap_index=known.index, duplicate=True)
    index = records.gaps_recorded
    records.gaps_recorded += 1
    dropped = sum(r.count for r in request.ranges)
    payload = pb.ClientGapRecorded(gap_index=index, start_unix_s=request.start_unix_s, end_unix_s=request.end_unix_s,
                                   ranges=list(request.ranges), slices_dropped=dropped, cause=request.cause)
    first = request.ranges[0] if request.ranges else None
    span = request.end_unix_s - request.start_unix_s
    summary = f"client link down for {span:.1f} s, {dropped} slices dropped: {request.cause}"

    def rows(seq: int, now: float, event: pb.RunEvent) -> dict:
        return {layout.CLIENT_GAPS_GROUP: _gap_rows(request, index, seq, now),
                layout.EVENTS_GROUP: [event_row(seq, now, event, "client_gap_recorded", "", summary)]}

    announced = run.publish(lambda event: event.client_gap_recorded.CopyFrom(payload),
                            time_m=first.time_first_m if first is not None else 0.0,
                            iteration=first.iteration_first if first is not None else 0, rows=rows)
    if request.gap_id:
        records._gap_ids[request.gap_id] = known = _KnownGap(index, announced)
    event = await asyncio.shield(announced)
    if request.gap_id:
        known.announced, known.event_seq = None, event.seq
    return pb.RecordClientGapResponse(event_seq=event.seq, gap_index=index)
