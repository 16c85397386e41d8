"""The events a run commits, each with the archive rows written in the same commit.

An :class:`Emission` is one event waiting for its commit: ``build(seq, archived_unix_s)`` makes
its :class:`Committed` unit (the event and its rows) when the run's committer assigns it a
sequence number, and ``apply(event)`` updates the run once the commit is written (before the
event is announced). The builders here make the emissions of every kind the run itself emits;
the committer and the queue are :class:`~penumbra_server.server.runs.RunRecord`'s.
"""

from __future__ import annotations

import asyncio
import dataclasses
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Callable, Mapping, Sequence

import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import _layout as layout
from . import _convert as convert
from ._tracking_convert import Notice, encode_wire
from .jobs import SurfaceOutcome
from .scheduler import SurfacePlan
from .surface_state import SurfaceState

if TYPE_CHECKING:
    from .runs import QueuedSlice, RunRecord

__all__ = ["AnnouncedSurface", "announced_view", "Committed", "Emission", "STATE_NAMES", "STATE_VALUES", "surface_emission", "notice_emission",
           "parts_missing_emission", "slice_emission", "skip_emission", "state_emission", "event_row"]

STATE_NAMES = {pb.Run.STATE_OPEN: "open", pb.Run.STATE_CLOSED: "closed"}
STATE_VALUES = {v: k for k, v in STATE_NAMES.items()}


@dataclass(frozen=True, eq=False)
class Committed:
    """One event and the archive rows written in the same commit.

    Attributes:
        event: the event (its seq assigned; its emit time is set when announced).
        slice_rows: rows of the ``slices`` table.
        surface_rows: surface label -> rows of that surface's table.
        attrs: archive root attributes to set.
        group_rows: archive group path -> rows (tracking events, guidance, windows, gaps...).
    """

    event: pb.RunEvent
    slice_rows: Sequence[dict] = ()
    surface_rows: Mapping[str, Sequence[dict]] = field(default_factory=dict)
    attrs: Mapping[str, object] = field(default_factory=dict)
    group_rows: Mapping[str, Sequence[dict]] = field(default_factory=dict)


@dataclass(frozen=True)
class AnnouncedSurface:
    """What GetLatestSurfaces shows of one surface (fields as in :class:`SurfaceState`)."""

    latest_found: object | None
    latest_attempt_found: bool
    latest_attempt_iteration: int
    latest_attempt_message: str
    consecutive_misses: int


def announced_view(state: SurfaceState) -> AnnouncedSurface:
    """``state``'s GetLatestSurfaces fields now."""
    return AnnouncedSurface(state.latest_found, state.latest_attempt_found, state.latest_attempt_iteration,
                            state.latest_attempt_message, state.consecutive_misses)


@dataclass(eq=False)
class Emission:
    """One event to commit (module docstring)."""

    build: Callable[[int, float], Committed]
    apply: Callable[[pb.RunEvent], None] | None = None
    done: asyncio.Future = field(default_factory=lambda: asyncio.get_running_loop().create_future())


def event_row(seq: int, now: float, event: pb.RunEvent, kind: str, label: str, message: str) -> dict:
    """The ``events`` row of an event archived in its wire form (replayed after a restart)."""
    return {"seq": seq, "kind": kind, "iteration": event.iteration, "time": event.time_m, "label": label,
            "message": message, "wire": encode_wire(event), "archived_unix_s": now}


def surface_emission(run: "RunRecord", item: "QueuedSlice", outcome: SurfaceOutcome,
                     plan: SurfacePlan | None = None, *, view: AnnouncedSurface) -> Emission:
    """surface_found / surface_not_found with its surface row. The outcome is already recorded
    in the surface's state (surface_state.record_outcome); ``view`` is that state's
    GetLatestSurfaces fields after it, shown once the commit is written (with the found
    surface's wire message)."""
    slice_ = item.slice_

    def build(seq: int, now: float) -> Committed:
        latency = now - item.arrival_unix_s
        event = pb.RunEvent(seq=seq, run_id=run.run_id, time_m=slice_.time, iteration=slice_.iteration)
        if outcome.found:
            event.surface_found.surface.CopyFrom(
                convert.surface_result_from_outcome(outcome, time_m=slice_.time, iteration=slice_.iteration,
                                                    latency_s=latency))
        else:
            event.surface_not_found.CopyFrom(convert.not_found_from_outcome(outcome, latency_s=latency))
        label, row = convert.surface_row(event, now)
        if plan is not None and plan.seed_position is not None:
            row.update(seed_centre=np.asarray(plan.seed_position, float), seed_uncertainty=plan.seed_uncertainty,
                       seed_model=layout.FORECAST_MODELS.get(plan.seed_model, 0))
        else:
            row.update(seed_model=0)
        return Committed(event, surface_rows={label: [row]})

    def apply(event: pb.RunEvent) -> None:
        previous = run.announced.get(outcome.label)
        found = event.surface_found.surface if outcome.found else (previous.latest_found if previous else None)
        run.announced[outcome.label] = dataclasses.replace(view, latest_found=found)

    return Emission(build, apply)


def notice_emission(run: "RunRecord", item: "QueuedSlice", notice: Notice) -> Emission:
    """A tracking event of ``notice`` (steering.py) with its rows and its archived wire form."""
    slice_ = item.slice_

    def build(seq: int, now: float) -> Committed:
        event = pb.RunEvent(seq=seq, run_id=run.run_id, time_m=slice_.time, iteration=slice_.iteration)
        getattr(event, notice.kind).CopyFrom(notice.payload)
        rows = {path: [dict(row, event_seq=seq) for row in group] for path, group in notice.group_rows.items()}
        rows[layout.EVENTS_GROUP] = [event_row(seq, now, event, notice.kind, notice.label, notice.message)]
        return Committed(event, group_rows=rows)

    def apply(event: pb.RunEvent) -> None:
        if notice.kind == "refinement_guidance":
            run.latest_guidance_event = event
        elif notice.kind == "data_windows_wanted":
            run.latest_windows_event = event

    return Emission(build, apply)


def parts_missing_emission(run: "RunRecord", report: pb.SlicePartsMissing) -> Emission:
    """The slice_parts_missing event, archived with the tracking events (replayed after a restart)."""
    def build(seq: int, now: float) -> Committed:
        event = pb.RunEvent(seq=seq, run_id=run.run_id, time_m=report.time_m, iteration=report.iteration)
        event.slice_parts_missing.CopyFrom(report)
        return Committed(event, group_rows={
            layout.EVENTS_GROUP: [event_row(seq, now, event, "slice_parts_missing", "", report.message)]})

    return Emission(build)


def slice_emission(run: "RunRecord", item: "QueuedSlice", *, attempted: int, found: int, started: float,
                   error: str = "") -> Emission:
    """slice_processed with its slice row (outcome failed when ``error``)."""
    def build(seq: int, now: float) -> Committed:
        event = pb.RunEvent(seq=seq, run_id=run.run_id, time_m=item.slice_.time, iteration=item.iteration)
        event.slice_processed.CopyFrom(pb.SliceProcessed(
            surfaces_attempted=attempted, surfaces_found=found,
            latency_s=now - item.arrival_unix_s, queue_wait_s=max(0.0, started - item.arrival_unix_s),
            error=error))
        row = convert.slice_row(event, arrival_unix_s=item.arrival_unix_s, nbytes=item.nbytes, archived_unix_s=now)
        return Committed(event, slice_rows=[row])

    def apply(event: pb.RunEvent) -> None:
        run.slices_processed += 1

    return Emission(build, apply)


def skip_emission(run: "RunRecord", old: "QueuedSlice", *, superseded_by: "QueuedSlice") -> Emission:
    """slice_skipped: ``old`` made room for ``superseded_by`` in the keep-newest queue."""
    def build(seq: int, now: float) -> Committed:
        event = pb.RunEvent(seq=seq, run_id=run.run_id, time_m=old.slice_.time, iteration=old.iteration)
        event.slice_skipped.CopyFrom(pb.SliceSkipped(
            skipped_iteration=old.iteration, skipped_time_m=old.slice_.time,
            superseded_by_iteration=superseded_by.iteration))
        row = convert.slice_row(event, arrival_unix_s=old.arrival_unix_s, nbytes=old.nbytes, archived_unix_s=now)
        return Committed(event, slice_rows=[row])

    return Emission(build)


def state_emission(run: "RunRecord", state: int, reason: str) -> Emission:
    """run_state_changed, kept in the archive root's ``state_events`` attribute."""
    def build(seq: int, now: float) -> Committed:
        event = pb.RunEvent(seq=seq, run_id=run.run_id)
        event.run_state_changed.CopyFrom(pb.RunStateChanged(state=state, reason=reason))
        run.state_events.append({"seq": seq, "state": STATE_NAMES[state], "reason": reason, "unix_s": now})
        attrs = {"state": STATE_NAMES[state], "state_events": list(run.state_events)}
        if state == pb.Run.STATE_CLOSED:
            attrs["closed_unix_s"] = now
        return Committed(event, attrs=attrs)

    return Emission(build)


@dataclass(frozen=True, eq=False)
class CommitBatch:
    """Pending emissions built into events with consecutive sequence numbers, and every archive
    row and root attribute they carry, for one archive commit."""

    events: list
    slice_rows: list
    surface_rows: dict
    group_rows: dict
    attrs: dict


def merge_batch(batch, *, first_seq: int, now: float) -> CommitBatch:
    """Build ``batch`` (emissions, in order) from ``first_seq`` on at wall time ``now``; the
    root attribute ``next_event_seq`` names the sequence number after the last."""
    seq = first_seq
    events, slice_rows, surface_rows, group_rows, attrs = [], [], {}, {}, {}
    for emission in batch:
        unit = emission.build(seq, now)
        events.append(unit.event)
        slice_rows.extend(unit.slice_rows)
        for label, rows in unit.surface_rows.items():
            surface_rows.setdefault(label, []).extend(rows)
        for path, rows in unit.group_rows.items():
            group_rows.setdefault(path, []).extend(rows)
        attrs.update(unit.attrs)
        seq += 1
    attrs["next_event_seq"] = seq
    return CommitBatch(events, slice_rows, surface_rows, group_rows, attrs)
