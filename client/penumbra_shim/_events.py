"""Events of a run, one small frozen type per kind, all deriving from :class:`Event`.

Every event carries ``seq`` (from 1, no gaps), ``run_id``, ``kind`` (one of :data:`EVENT_KINDS`,
or "other" for kinds this shim does not name), ``time`` / ``iteration`` of the slice it concerns
(0 for run events), ``emitted_unix_s`` (server wall clock when emitted, after archiving) and
``raw`` (the wire message, penumbra.v1.RunEvent). Each kind adds its own fields, named for what
they hold; :func:`event_from_wire` picks the type.
"""

from __future__ import annotations

from dataclasses import dataclass

from ._guidance_types import CommonHorizon, DataWindows, Guidance, TrackUpdate
from ._link import ClientGap
from ._results import STATE_NAMES, SurfaceReport
from ._wire import horizons_pb2 as pb
from ._wire_values import NAN

__all__ = [
    "EVENT_KINDS",
    "Event",
    "SurfaceFoundEvent",
    "SurfaceNotFoundEvent",
    "SliceSkippedEvent",
    "RunStateChangedEvent",
    "SliceProcessedEvent",
    "TrackUpdatedEvent",
    "CommonHorizonFormedEvent",
    "GuidanceEvent",
    "DataWindowsEvent",
    "WarningEvent",
    "SlicePartsMissingEvent",
    "SliceRejectedEvent",
    "ClientGapRecordedEvent",
    "FormationForecastEvent",
    "OtherEvent",
    "event_from_wire",
]

#: Event kinds the shim names (others arrive as kind "other" with the message in ``raw``).
EVENT_KINDS = ("surface_found", "surface_not_found", "slice_skipped", "run_state_changed", "slice_processed",
               "track_updated", "common_horizon_formed", "refinement_guidance", "data_windows_wanted", "warning",
               "slice_parts_missing", "slice_rejected", "client_gap_recorded", "formation_forecast")
_WARNING_NAMES = {pb.RunWarning.KIND_MISSING_DATA: "missing_data", pb.RunWarning.KIND_TRACKING: "tracking"}
_DISPOSITION_NAMES = {pb.SlicePartsMissing.DISPOSITION_PROCESSED: "processed",
                      pb.SlicePartsMissing.DISPOSITION_GIVEN_UP: "given_up"}

@dataclass(frozen=True, eq=False)
class Event:
    """One event of a run, in sequence order (the fields every kind has; module docstring)."""

    seq: int
    run_id: str
    kind: str
    time: float
    iteration: int
    emitted_unix_s: float
    raw: pb.RunEvent | None = None

    @classmethod
    def from_wire(cls, e: pb.RunEvent) -> "Event":
        """The event of the right kind (same as :func:`event_from_wire`)."""
        return event_from_wire(e)

@dataclass(frozen=True, eq=False)
class SurfaceFoundEvent(Event):
    """surface_found: ``surface`` (found, with its shape and quantities)."""

    surface: SurfaceReport | None = None

@dataclass(frozen=True, eq=False)
class SurfaceNotFoundEvent(Event):
    """surface_not_found: ``surface`` (the attempt) and ``reason`` (its name, e.g. "outside_data")."""

    surface: SurfaceReport | None = None
    reason: str = ""

@dataclass(frozen=True, eq=False)
class SliceSkippedEvent(Event):
    """slice_skipped: the server's queue made room for ``superseded_by_iteration``."""

    skipped_iteration: int = -1
    superseded_by_iteration: int = -1

@dataclass(frozen=True, eq=False)
class RunStateChangedEvent(Event):
    """run_state_changed: ``state`` ("open" / "closed") and why."""

    state: str = ""
    reason: str = ""

@dataclass(frozen=True, eq=False)
class SliceProcessedEvent(Event):
    """slice_processed: ``latency_s`` from arrival, surfaces found / attempted, ``error`` ("" if none)."""

    latency_s: float = NAN
    surfaces_found: int = 0
    surfaces_attempted: int = 0
    error: str = ""

@dataclass(frozen=True, eq=False)
class TrackUpdatedEvent(Event):
    """track_updated: the new points and forecast of ``label``'s track."""

    label: str = ""
    track: TrackUpdate | None = None

@dataclass(frozen=True, eq=False)
class CommonHorizonFormedEvent(Event):
    """common_horizon_formed: the common surface ``label`` first found."""

    label: str = ""
    common: CommonHorizon | None = None

@dataclass(frozen=True, eq=False)
class FormationForecastEvent(Event):
    """formation_forecast: the smallest expansion c_min of the constant-expansion surfaces that
    enclose the pair in this slice (1/M; NaN when not found) and, from its history, the time the
    common horizon ``label`` is forecast to form (M; NaN when no forecast) with its expected
    error."""

    label: str = ""
    c_min_found: bool = False
    c_min: float = NAN
    c_min_error: float = NAN
    mean_radius: float = NAN
    forecast_available: bool = False
    formation_time: float = NAN
    formation_time_uncertainty: float = NAN
    based_on: int = 0
    message: str = ""
    wall_time_s: float = 0.0


@dataclass(frozen=True, eq=False)
class GuidanceEvent(Event):
    """refinement_guidance: where the finest levels should sit."""

    guidance: Guidance | None = None

@dataclass(frozen=True, eq=False)
class DataWindowsEvent(Event):
    """data_windows_wanted: the boxes of data wanted in the next slice."""

    windows: DataWindows | None = None

@dataclass(frozen=True, eq=False)
class WarningEvent(Event):
    """warning: ``warning_kind`` ("missing_data", "tracking"), the surface ``label`` ("" for the
    run) and the server's ``message``."""

    label: str = ""
    warning_kind: str = ""
    message: str = ""

@dataclass(frozen=True, eq=False)
class SlicePartsMissingEvent(Event):
    """slice_parts_missing: ``missing_parts`` (indices) of ``parts_expected``, ``disposition``
    ("processed" with what arrived, or "given_up") and the server's ``message``."""

    missing_parts: tuple[int, ...] = ()
    parts_expected: int = 0
    disposition: str = ""
    message: str = ""

@dataclass(frozen=True, eq=False)
class SliceRejectedEvent(Event):
    """slice_rejected: ``iteration`` / ``time`` of the refused slice (time NaN if the header had
    none finite), ``status_code`` name (e.g. "INVALID_ARGUMENT") and the server's ``message``."""

    status_code: str = ""
    message: str = ""

@dataclass(frozen=True, eq=False)
class ClientGapRecordedEvent(Event):
    """client_gap_recorded: the outage the client recorded (:class:`ClientGap`)."""

    gap: ClientGap | None = None

@dataclass(frozen=True, eq=False)
class OtherEvent(Event):
    """A kind this shim does not name (a newer server); the message is in ``raw``."""

def event_from_wire(e: pb.RunEvent) -> Event:
    """The shim's event for a wire RunEvent."""
    kind = e.WhichOneof("kind") or "other"
    base = dict(seq=e.seq, run_id=e.run_id, kind=kind, time=e.time_m, iteration=e.iteration,
                emitted_unix_s=e.emit_time_unix_s, raw=e)
    if kind == "surface_found":
        return SurfaceFoundEvent(surface=SurfaceReport.from_result(e.surface_found.surface), **base)
    if kind == "surface_not_found":
        report = SurfaceReport.from_not_found(e.surface_not_found, time=e.time_m, iteration=e.iteration)
        return SurfaceNotFoundEvent(surface=report, reason=report.reason, **base)
    if kind == "slice_skipped":
        s = e.slice_skipped
        return SliceSkippedEvent(skipped_iteration=s.skipped_iteration,
                                 superseded_by_iteration=s.superseded_by_iteration, **base)
    if kind == "run_state_changed":
        r = e.run_state_changed
        return RunStateChangedEvent(state=STATE_NAMES.get(r.state, str(r.state)), reason=r.reason, **base)
    if kind == "slice_processed":
        p = e.slice_processed
        return SliceProcessedEvent(latency_s=p.latency_s, surfaces_found=p.surfaces_found,
                                   surfaces_attempted=p.surfaces_attempted, error=p.error, **base)
    if kind == "track_updated":
        track = TrackUpdate.from_wire(e.track_updated)
        return TrackUpdatedEvent(label=track.label, track=track, **base)
    if kind == "common_horizon_formed":
        common = CommonHorizon.from_wire(e.common_horizon_formed, time=e.time_m, iteration=e.iteration)
        return CommonHorizonFormedEvent(label=common.label, common=common, **base)
    if kind == "refinement_guidance":
        return GuidanceEvent(guidance=Guidance.from_wire(e.refinement_guidance), **base)
    if kind == "data_windows_wanted":
        return DataWindowsEvent(windows=DataWindows.from_wire(e.data_windows_wanted), **base)
    if kind == "warning":
        w = e.warning
        return WarningEvent(label=w.label, warning_kind=_WARNING_NAMES.get(w.kind, str(w.kind)), message=w.message,
                            **base)
    if kind == "slice_parts_missing":
        m = e.slice_parts_missing
        return SlicePartsMissingEvent(missing_parts=tuple(m.missing_part_indices), parts_expected=m.parts_expected,
                                      disposition=_DISPOSITION_NAMES.get(m.disposition, str(m.disposition)),
                                      message=m.message, **base)
    if kind == "slice_rejected":
        r = e.slice_rejected
        base.update(time=r.time_m, iteration=r.iteration)
        return SliceRejectedEvent(status_code=r.status_code, message=r.message, **base)
    if kind == "client_gap_recorded":
        return ClientGapRecordedEvent(gap=ClientGap.from_event(e.client_gap_recorded, event_seq=e.seq), **base)
    if kind == "formation_forecast":
        f = e.formation_forecast
        return FormationForecastEvent(
            label=f.label, c_min_found=f.c_min_found, c_min=f.c_min_per_m, c_min_error=f.c_min_error_per_m,
            mean_radius=f.mean_radius_m, forecast_available=f.forecast_available,
            formation_time=f.formation_time_m if f.forecast_available else NAN,
            formation_time_uncertainty=f.formation_time_uncertainty_m if f.forecast_available else NAN,
            based_on=f.based_on, message=f.message, wall_time_s=f.wall_time_s, **base)
    base["kind"] = "other"
    return OtherEvent(**base)
