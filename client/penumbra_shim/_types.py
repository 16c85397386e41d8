"""Plain values the shim hands out: run specs, run descriptions, acknowledgements, surfaces,
events. All frozen dataclasses; lengths, times and masses in units of M."""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from ._excision import ExcisedSphere
from ._fields import VARIABLE_SET_WIRE, check_variable_set, variable_set_from_wire
from ._link import ClientGap
from ._wire import horizons_pb2 as pb

__all__ = [
    "Body",
    "FinderOptions",
    "BacklogOptions",
    "RunSpec",
    "RunInfo",
    "SliceAck",
    "SurfaceReport",
    "SurfaceState",
    "Event",
    "EVENT_KINDS",
    "RefinementOptions",
    "TrackPoint",
    "PositionForecast",
    "TrackUpdate",
    "CommonHorizon",
    "RefinedRegion",
    "BodyRefinement",
    "Guidance",
    "DataWindow",
    "DataWindows",
]

_LABEL = re.compile(r"^[A-Za-z0-9_-]{1,32}$")
_NAN = float("nan")
_STATE_NAMES = {pb.Run.STATE_OPEN: "open", pb.Run.STATE_CLOSED: "closed", pb.Run.STATE_UNSPECIFIED: "unspecified"}
_REASON_NAMES = {
    pb.SurfaceNotFound.REASON_UNSPECIFIED: "unspecified",
    pb.SurfaceNotFound.REASON_NOT_CONVERGED: "not_converged",
    pb.SurfaceNotFound.REASON_NO_CANDIDATE: "no_candidate",
    pb.SurfaceNotFound.REASON_OUTSIDE_DATA: "outside_data",
    pb.SurfaceNotFound.REASON_WORKER_FAILED: "worker_failed",
    pb.SurfaceNotFound.REASON_NOT_SEARCHED: "not_searched",
    pb.SurfaceNotFound.REASON_NEEDS_EXCISED_DATA: "needs_excised_data",
}
_SOURCE_NAMES = {pb.TrackPoint.SOURCE_HORIZON: "horizon", pb.TrackPoint.SOURCE_PUNCTURE: "puncture"}
_MODEL_NAMES = {pb.PositionForecast.MODEL_STATIC: "static", pb.PositionForecast.MODEL_POLYNOMIAL: "polynomial",
                pb.PositionForecast.MODEL_ORBIT: "orbit"}
_WARNING_NAMES = {pb.RunWarning.KIND_MISSING_DATA: "missing_data", pb.RunWarning.KIND_TRACKING: "tracking"}
_DISPOSITION_NAMES = {pb.SlicePartsMissing.DISPOSITION_PROCESSED: "processed",
                      pb.SlicePartsMissing.DISPOSITION_GIVEN_UP: "given_up"}

#: Event kinds the shim names (others arrive as kind "other" with the message in ``raw``).
EVENT_KINDS = ("surface_found", "surface_not_found", "slice_skipped", "run_state_changed", "slice_processed",
               "track_updated", "common_horizon_formed", "refinement_guidance", "data_windows_wanted", "warning",
               "slice_parts_missing", "slice_rejected", "client_gap_recorded")


def _triple(v: pb.Vector3) -> np.ndarray:
    return np.array([v.x, v.y, v.z])


@dataclass(frozen=True)
class Body:
    """A body expected to hold a horizon: label, approximate position (3,) and mass, units of M."""

    label: str
    position: tuple[float, float, float]
    mass: float

    def __post_init__(self) -> None:
        if not isinstance(self.label, str) or not _LABEL.match(self.label):
            raise ValueError(f"label: expected 1-32 letters, digits, '-' or '_', got {self.label!r}")
        pos = tuple(float(v) for v in self.position)
        if len(pos) != 3 or not all(math.isfinite(v) for v in pos):
            raise ValueError(f"position: expected three finite numbers, got {self.position!r}")
        if not (math.isfinite(self.mass) and self.mass > 0):
            raise ValueError(f"mass: expected a finite mass > 0, got {self.mass!r}")
        object.__setattr__(self, "position", pos)
        object.__setattr__(self, "mass", float(self.mass))


@dataclass(frozen=True)
class FinderOptions:
    """Finder settings: highest harmonic degree, tolerance on max |Theta| (1/M), iteration cap,
    and the degree of a pair's common surface (0: the server's default max(16, lmax); a freshly
    formed common horizon needs more than the individual ones)."""

    lmax: int = 8
    tolerance: float = 1e-8
    max_iterations: int = 40
    lmax_common: int = 0


@dataclass(frozen=True)
class BacklogOptions:
    """Backlog of the run: queue depth on the server (and in the shim); policy keep-newest."""

    queue_depth: int = 4
    policy: str = "keep_newest"

    def __post_init__(self) -> None:
        if self.policy != "keep_newest":
            raise ValueError(f"policy: expected 'keep_newest', got {self.policy!r}")
        if not 1 <= int(self.queue_depth) <= 1024:
            raise ValueError(f"queue_depth: expected 1..1024, got {self.queue_depth!r}")


@dataclass(frozen=True)
class RefinementOptions:
    """Policy of the server's refinement guidance (defaults from common practice).

    Attributes:
        points_across_horizon: grid points across a horizon's smallest coordinate diameter on
            its finest level (20-40 is usual).
        nesting_depth: depth of the nest of refinement levels around the bodies.
        level_ratio: spacing and radius ratio between neighbouring levels.
        finest_radius_factor: finest radius in horizon radii, before the margins (1.2-2 usual).
        steering_interval: coordinate time between the evolution's steering steps (where it
            moves its refined regions), M.
        guard_points: guard width around the finest region, in finest grid points.
    """

    points_across_horizon: float = 30.0
    nesting_depth: int = 6
    level_ratio: float = 2.0
    finest_radius_factor: float = 1.5
    steering_interval: float = 4.0
    guard_points: int = 4

    def __post_init__(self) -> None:
        checks = (("points_across_horizon", self.points_across_horizon > 0, "> 0"),
                  ("nesting_depth", 1 <= int(self.nesting_depth) <= 16, "1..16"),
                  ("level_ratio", self.level_ratio > 1, "> 1"),
                  ("finest_radius_factor", self.finest_radius_factor >= 1, ">= 1"),
                  ("steering_interval", self.steering_interval > 0, "> 0 (a time in M)"),
                  ("guard_points", int(self.guard_points) >= 0, ">= 0"))
        for name, ok, expected in checks:
            value = getattr(self, name)
            if not ok or not math.isfinite(float(value)):
                raise ValueError(f"refinement.{name}: expected {expected}, got {value!r}")

    def to_wire(self) -> pb.RefinementPolicy:
        return pb.RefinementPolicy(points_across_horizon=float(self.points_across_horizon),
                                   nesting_depth=int(self.nesting_depth), level_ratio=float(self.level_ratio),
                                   finest_radius_factor=float(self.finest_radius_factor),
                                   steering_interval_m=float(self.steering_interval),
                                   guard_points=int(self.guard_points))

    @classmethod
    def from_wire(cls, p: pb.RefinementPolicy) -> "RefinementOptions":
        d = cls()
        return cls(points_across_horizon=p.points_across_horizon or d.points_across_horizon,
                   nesting_depth=p.nesting_depth or d.nesting_depth, level_ratio=p.level_ratio or d.level_ratio,
                   finest_radius_factor=p.finest_radius_factor or d.finest_radius_factor,
                   steering_interval=p.steering_interval_m or d.steering_interval,
                   guard_points=p.guard_points if p.HasField("guard_points") else d.guard_points)


_SYMMETRY_WIRE = {"none": pb.RunSpec.SYMMETRY_NONE, "bitant": pb.RunSpec.SYMMETRY_BITANT}
_SYMMETRY_NAMES = {v: k for k, v in _SYMMETRY_WIRE.items()}
_SHIFT_GAUGE_WIRE = {None: pb.RunSpec.SHIFT_GAUGE_UNSPECIFIED, "moving_puncture": pb.RunSpec.SHIFT_GAUGE_MOVING_PUNCTURE,
                     "other": pb.RunSpec.SHIFT_GAUGE_OTHER}
_SHIFT_GAUGE_NAMES = {v: k for k, v in _SHIFT_GAUGE_WIRE.items()}


@dataclass(frozen=True)
class RunSpec:
    """What the server needs to know about a run.

    Attributes:
        variable_set: "adm", "conformal_chi", "conformal_w" or "conformal_phi".
        bodies: expected bodies (at least one).
        name: free text shown by listings and watchers.
        mass_scale_solar_masses: what M is physically (0: not stated).
        finder: :class:`FinderOptions`.
        backlog: :class:`BacklogOptions`.
        refinement: :class:`RefinementOptions` of the guidance.
        part_deadline_s: for slices sent in parts (one per MPI rank), seconds from the first
            part's arrival until the server processes what arrived (0: the server's default).
        symmetry: "none" (the default), or "bitant": the run has mirror symmetry through z = 0
            and sends z >= 0 only (a node layer on z = 0); the server fills z < 0 with the right
            parity per component.
        excised_spheres: :class:`ExcisedSphere` s the evolution cuts out (values there are not
            data; pass the same to :func:`build_slice` so it accepts NaN there).
        shift_gauge: "moving_puncture" (puncture tracks are integrated from the shift the slices
            carry), "other", or None (not declared); only "moving_puncture" uses the shift.
    """

    variable_set: str
    bodies: Sequence[Body]
    name: str = ""
    mass_scale_solar_masses: float = 0.0
    finder: FinderOptions = field(default_factory=FinderOptions)
    backlog: BacklogOptions = field(default_factory=BacklogOptions)
    refinement: RefinementOptions = field(default_factory=RefinementOptions)
    part_deadline_s: float = 0.0
    symmetry: str = "none"
    excised_spheres: Sequence[ExcisedSphere] = ()
    shift_gauge: str | None = None

    def __post_init__(self) -> None:
        check_variable_set(self.variable_set)
        if not (math.isfinite(self.part_deadline_s) and self.part_deadline_s >= 0):
            raise ValueError(f"part_deadline_s: expected seconds > 0 (0 for the server's default), "
                             f"got {self.part_deadline_s!r}")
        spheres = tuple(self.excised_spheres)
        if not all(isinstance(sphere, ExcisedSphere) for sphere in spheres):
            raise ValueError(f"excised_spheres: expected ExcisedSphere values, got {list(self.excised_spheres)!r}")
        object.__setattr__(self, "excised_spheres", spheres)
        if self.shift_gauge not in _SHIFT_GAUGE_WIRE:
            raise ValueError(f"shift_gauge: expected 'moving_puncture', 'other' or None, got {self.shift_gauge!r}")
        if self.symmetry not in _SYMMETRY_WIRE:
            raise ValueError(f"symmetry: expected one of {sorted(_SYMMETRY_WIRE)}, got {self.symmetry!r}")
        bodies = tuple(self.bodies)
        if not bodies:
            raise ValueError("bodies: expected at least one Body")
        labels = [b.label for b in bodies]
        if len(set(labels)) != len(labels):
            raise ValueError(f"bodies: labels must be unique, got {labels}")
        object.__setattr__(self, "bodies", bodies)

    def to_wire(self) -> pb.RunSpec:
        return pb.RunSpec(
            display_name=self.name,
            variable_set=VARIABLE_SET_WIRE[self.variable_set],
            mass_scale_solar_masses=self.mass_scale_solar_masses,
            bodies=[
                pb.ExpectedBody(label=b.label, approximate_mass_m=b.mass,
                                approximate_position_m=pb.Vector3(x=b.position[0], y=b.position[1], z=b.position[2]))
                for b in self.bodies
            ],
            finder=pb.FinderSettings(lmax=self.finder.lmax, tolerance_per_m=self.finder.tolerance,
                                     max_iterations=self.finder.max_iterations, lmax_common=self.finder.lmax_common),
            backlog=pb.BacklogPolicy(policy=pb.BacklogPolicy.POLICY_KEEP_NEWEST, queue_depth=self.backlog.queue_depth),
            refinement=self.refinement.to_wire(),
            part_deadline_s=float(self.part_deadline_s),
            symmetry=_SYMMETRY_WIRE[self.symmetry],
            excised_spheres=[sphere.to_wire() for sphere in self.excised_spheres],
            shift_gauge=_SHIFT_GAUGE_WIRE[self.shift_gauge],
        )

    @classmethod
    def from_wire(cls, spec: pb.RunSpec) -> "RunSpec":
        return cls(
            variable_set=variable_set_from_wire(spec.variable_set, "spec.variable_set"),
            bodies=tuple(Body(b.label, tuple(_triple(b.approximate_position_m)), b.approximate_mass_m) for b in spec.bodies),
            name=spec.display_name,
            mass_scale_solar_masses=spec.mass_scale_solar_masses,
            finder=FinderOptions(lmax=spec.finder.lmax, tolerance=spec.finder.tolerance_per_m,
                                 max_iterations=spec.finder.max_iterations, lmax_common=spec.finder.lmax_common),
            backlog=BacklogOptions(queue_depth=spec.backlog.queue_depth or 4),
            refinement=RefinementOptions.from_wire(spec.refinement),
            part_deadline_s=spec.part_deadline_s,
            symmetry=_SYMMETRY_NAMES.get(spec.symmetry, "none"),
            excised_spheres=tuple(ExcisedSphere.from_wire(sphere) for sphere in spec.excised_spheres),
            shift_gauge=_SHIFT_GAUGE_NAMES.get(spec.shift_gauge),
        )


@dataclass(frozen=True)
class RunInfo:
    """A run as the server describes it.

    ``last_received_iteration`` / ``last_received_time`` (M): the newest slice the server accepted
    (-1 / NaN before the first): a watcher's lag is that time minus a surface's time.
    ``slices_incomplete``: slices sent in parts that were processed with parts missing.
    ``client_gaps_recorded``: outages of the client's link recorded on the run;
    ``slices_rejected``: slices refused after their header named the run.
    """

    run_id: str
    name: str
    state: str
    spec: RunSpec
    created_unix_s: float
    closed_unix_s: float
    slices_received: int
    slices_processed: int
    slices_skipped: int
    slices_duplicate: int
    last_seq: int
    archive_path: str
    last_received_iteration: int = -1
    last_received_time: float = _NAN
    slices_incomplete: int = 0
    client_gaps_recorded: int = 0
    slices_rejected: int = 0

    @classmethod
    def from_wire(cls, run: pb.Run) -> "RunInfo":
        return cls(
            run_id=run.run_id, name=run.spec.display_name, state=_STATE_NAMES.get(run.state, str(run.state)),
            spec=RunSpec.from_wire(run.spec), created_unix_s=run.create_time_unix_s,
            closed_unix_s=run.close_time_unix_s, slices_received=run.slices_received,
            slices_processed=run.slices_processed, slices_skipped=run.slices_skipped,
            slices_duplicate=run.slices_duplicate, last_seq=run.last_event_seq, archive_path=run.archive_path,
            last_received_iteration=run.last_received_iteration, last_received_time=run.last_received_time_m,
            slices_incomplete=run.slices_incomplete,
            client_gaps_recorded=run.client_gaps_recorded, slices_rejected=run.slices_rejected,
        )


@dataclass(frozen=True)
class SliceAck:
    """What became of a submitted slice.

    ``accepted``: new on the server and queued. ``duplicate``: the server had it already.
    ``skipped_locally``: dropped from the shim's own queue (keep-newest) before sending.
    ``skipped_iterations``: older slices the server skipped to make room for this one.
    ``cropped``: sent cut to the server's data windows (``bytes_sent`` of ``uncropped_bytes``).

    For a part of a slice sent in parts (``parts_expected`` > 1): ``accepted`` means the part was
    stored; ``waiting_for_parts`` that the slice still waits for other parts (else this part
    completed it and it was queued); ``parts_received`` counts the parts the server holds.
    ``duplicate``: the server held this part already.
    ``drop_reason``: for a slice skipped locally, why, in words (see
    :data:`penumbra_shim.DROP_REASONS`), e.g. "link down: server unreachable".
    """

    iteration: int
    accepted: bool
    duplicate: bool = False
    skipped_locally: bool = False
    bytes_sent: int = 0
    queue_position: int = -1
    skipped_iterations: tuple[int, ...] = ()
    attempts: int = 0
    cropped: bool = False
    uncropped_bytes: int = 0
    part_index: int = 0
    waiting_for_parts: bool = False
    parts_received: int = 1
    parts_expected: int = 1
    drop_reason: str = ""

    @classmethod
    def from_wire(cls, response: pb.SendSliceResponse, *, attempts: int, cropped: bool = False,
                  uncropped_bytes: int = 0, part_index: int = 0) -> "SliceAck":
        waiting = response.outcome == pb.SendSliceResponse.OUTCOME_PART_ACCEPTED
        return cls(
            part_index=part_index,
            waiting_for_parts=waiting,
            parts_received=response.parts_received or 1,
            parts_expected=response.parts_expected or 1,
            cropped=cropped,
            uncropped_bytes=uncropped_bytes,
            iteration=response.iteration,
            accepted=waiting or response.outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED,
            duplicate=response.outcome == pb.SendSliceResponse.OUTCOME_DUPLICATE,
            bytes_sent=response.received_bytes,
            queue_position=response.queue_position,
            skipped_iterations=tuple(response.skipped_iterations),
            attempts=attempts,
        )


@dataclass(frozen=True, eq=False)
class SurfaceReport:
    """One attempt on a surface: found (with its shape and quantities) or not (with a reason).

    Lengths in M, area in M^2, residual in 1/M; NaN where not found or not measured.
    ``coefficients`` are real spherical-harmonic coefficients of the radius, index l*l + l + m.
    """

    label: str
    time: float
    iteration: int
    found: bool
    status: int
    message: str = ""
    reason: str = ""
    centre: np.ndarray = field(default_factory=lambda: np.full(3, _NAN))
    lmax: int = 0
    coefficients: np.ndarray = field(default_factory=lambda: np.zeros(0))
    area: float = _NAN
    irreducible_mass: float = _NAN
    centroid: np.ndarray = field(default_factory=lambda: np.full(3, _NAN))
    radius_min: float = _NAN
    radius_mean: float = _NAN
    radius_max: float = _NAN
    circumference_xy: float = _NAN
    circumference_xz: float = _NAN
    circumference_yz: float = _NAN
    resolution_indicator: float = _NAN
    residual_max: float = _NAN
    residual_max_between_nodes: float = _NAN
    angular_momentum: np.ndarray = field(default_factory=lambda: np.full(3, _NAN))
    christodoulou_mass: float = _NAN
    iterations: int = 0
    wall_time_s: float = _NAN
    latency_s: float = _NAN
    method: str = ""

    @classmethod
    def from_result(cls, s: pb.SurfaceResult) -> "SurfaceReport":
        q = s.quantities
        return cls(
            label=s.label, time=s.time_m, iteration=s.iteration, found=True, status=s.finder_status,
            message="found", centre=_triple(s.centre_m), lmax=s.lmax,
            coefficients=np.asarray(s.coefficients_m, dtype=float), area=q.area_m2,
            irreducible_mass=q.irreducible_mass_m, centroid=_triple(q.centroid_m), radius_min=q.radius_min_m,
            radius_mean=q.radius_mean_m, radius_max=q.radius_max_m, circumference_xy=q.circumference_xy_m,
            circumference_xz=q.circumference_xz_m, circumference_yz=q.circumference_yz_m,
            resolution_indicator=q.resolution_indicator, residual_max=s.residual_max_per_m,
            residual_max_between_nodes=s.residual_max_between_nodes_per_m,
            angular_momentum=_triple(q.angular_momentum_m2), christodoulou_mass=q.christodoulou_mass_m,
            iterations=s.iterations, wall_time_s=s.wall_time_s, latency_s=s.latency_s, method=s.method,
        )

    @classmethod
    def from_not_found(cls, n: pb.SurfaceNotFound, *, time: float, iteration: int) -> "SurfaceReport":
        return cls(
            label=n.label, time=time, iteration=iteration, found=False, status=n.finder_status,
            message=n.message, reason=_REASON_NAMES.get(n.reason, str(n.reason)), residual_max=n.residual_max_per_m,
            iterations=n.iterations, wall_time_s=n.wall_time_s, latency_s=n.latency_s,
        )


@dataclass(frozen=True, eq=False)
class SurfaceState:
    """The latest state of one tracked surface (GetLatestSurfaces, or the shim's cache)."""

    label: str
    latest_found: SurfaceReport | None
    latest_attempt_found: bool
    latest_attempt_iteration: int
    latest_attempt_message: str
    consecutive_misses: int

    @classmethod
    def from_wire(cls, t: pb.TrackedSurface) -> "SurfaceState":
        return cls(
            label=t.label,
            latest_found=SurfaceReport.from_result(t.latest_found) if t.HasField("latest_found") else None,
            latest_attempt_found=t.latest_attempt_found,
            latest_attempt_iteration=t.latest_attempt_iteration,
            latest_attempt_message=t.latest_attempt_message,
            consecutive_misses=t.consecutive_misses,
        )

    def updated(self, report: SurfaceReport) -> "SurfaceState":
        """This state after one more attempt."""
        if report.found:
            return SurfaceState(self.label, report, True, report.iteration, "found", 0)
        return SurfaceState(self.label, self.latest_found, False, report.iteration, report.message,
                            self.consecutive_misses + 1)


@dataclass(frozen=True, eq=False)
class Event:
    """One event of a run, in sequence order.

    Attributes:
        seq: sequence number (from 1, no gaps).
        kind: one of :data:`EVENT_KINDS`, or "other" for kinds this shim does not name.
        time, iteration: the slice the event concerns (0 for run events).
        emitted_unix_s: server wall clock when the event was emitted (after archiving).
        surface: for surface_found / surface_not_found.
        state, reason: for run_state_changed ("open" / "closed", and why); for
            surface_not_found the reason name; for slice_processed the error ("" if none).
        skipped_iteration, superseded_by_iteration: for slice_skipped.
        latency_s, surfaces_found, surfaces_attempted: for slice_processed.
        label: the surface concerned (track_updated, common_horizon_formed, warning).
        track: for track_updated.
        common: for common_horizon_formed.
        guidance: for refinement_guidance.
        windows: for data_windows_wanted.
        For warning: ``state`` is the warning kind ("missing_data", "tracking") and ``reason``
        its text.
        For slice_parts_missing: ``missing_parts`` (indices), ``parts_expected``, ``state``
        ("processed" with what arrived, or "given_up") and ``reason`` (the server's text).
        For slice_rejected: ``iteration`` / ``time`` of the refused slice (time NaN if the header
        had none finite), ``state`` the status code name (e.g. "INVALID_ARGUMENT"), ``reason``
        the server's message.
        gap: for client_gap_recorded, the outage the client recorded (:class:`ClientGap`).
        raw: the wire message (penumbra.v1.RunEvent).
    """

    seq: int
    run_id: str
    kind: str
    time: float
    iteration: int
    emitted_unix_s: float
    surface: SurfaceReport | None = None
    state: str = ""
    reason: str = ""
    skipped_iteration: int = -1
    superseded_by_iteration: int = -1
    latency_s: float = _NAN
    surfaces_found: int = 0
    surfaces_attempted: int = 0
    label: str = ""
    track: "TrackUpdate | None" = None
    common: "CommonHorizon | None" = None
    guidance: "Guidance | None" = None
    windows: "DataWindows | None" = None
    missing_parts: tuple[int, ...] = ()
    parts_expected: int = 0
    gap: ClientGap | None = None
    raw: pb.RunEvent | None = None

    @classmethod
    def from_wire(cls, e: pb.RunEvent) -> "Event":
        kind = e.WhichOneof("kind") or "other"
        base = dict(seq=e.seq, run_id=e.run_id, time=e.time_m, iteration=e.iteration,
                    emitted_unix_s=e.emit_time_unix_s, raw=e)
        if kind == "surface_found":
            return cls(kind=kind, surface=SurfaceReport.from_result(e.surface_found.surface), **base)
        if kind == "surface_not_found":
            report = SurfaceReport.from_not_found(e.surface_not_found, time=e.time_m, iteration=e.iteration)
            return cls(kind=kind, surface=report, reason=report.reason, **base)
        if kind == "slice_skipped":
            s = e.slice_skipped
            return cls(kind=kind, skipped_iteration=s.skipped_iteration, superseded_by_iteration=s.superseded_by_iteration,
                       **base)
        if kind == "run_state_changed":
            r = e.run_state_changed
            return cls(kind=kind, state=_STATE_NAMES.get(r.state, str(r.state)), reason=r.reason, **base)
        if kind == "slice_processed":
            p = e.slice_processed
            return cls(kind=kind, latency_s=p.latency_s, surfaces_found=p.surfaces_found,
                       surfaces_attempted=p.surfaces_attempted, reason=p.error, **base)
        if kind == "track_updated":
            track = TrackUpdate.from_wire(e.track_updated)
            return cls(kind=kind, label=track.label, track=track, **base)
        if kind == "common_horizon_formed":
            common = CommonHorizon.from_wire(e.common_horizon_formed, time=e.time_m, iteration=e.iteration)
            return cls(kind=kind, label=common.label, common=common, **base)
        if kind == "refinement_guidance":
            return cls(kind=kind, guidance=Guidance.from_wire(e.refinement_guidance), **base)
        if kind == "data_windows_wanted":
            return cls(kind=kind, windows=DataWindows.from_wire(e.data_windows_wanted), **base)
        if kind == "warning":
            w = e.warning
            return cls(kind=kind, label=w.label, state=_WARNING_NAMES.get(w.kind, str(w.kind)), reason=w.message,
                       **base)
        if kind == "slice_parts_missing":
            m = e.slice_parts_missing
            return cls(kind=kind, missing_parts=tuple(m.missing_part_indices), parts_expected=m.parts_expected,
                       state=_DISPOSITION_NAMES.get(m.disposition, str(m.disposition)), reason=m.message, **base)
        if kind == "slice_rejected":
            r = e.slice_rejected
            base.update(time=r.time_m, iteration=r.iteration)
            return cls(kind=kind, state=r.status_code, reason=r.message, **base)
        if kind == "client_gap_recorded":
            return cls(kind=kind, gap=ClientGap.from_event(e.client_gap_recorded, event_seq=e.seq), **base)
        return cls(kind="other", **base)


# -- tracking and guidance --------------------------------------------------------------------------


def _vectors(values) -> np.ndarray:
    return np.array([[v.x, v.y, v.z] for v in values], dtype=float).reshape(-1, 3)


@dataclass(frozen=True, eq=False)
class TrackPoint:
    """One point of a body's track: time (M), iteration, position (3,) M, source ("horizon": the
    horizon's centroid; "puncture": integrated from the shift), uncertainty (M)."""

    time: float
    iteration: int
    position: np.ndarray
    source: str
    uncertainty: float

    @classmethod
    def from_wire(cls, p: pb.TrackPoint) -> "TrackPoint":
        return cls(time=p.time_m, iteration=p.iteration, position=_triple(p.position_m),
                   source=_SOURCE_NAMES.get(p.source, "unspecified"), uncertainty=p.uncertainty_m)


@dataclass(frozen=True, eq=False)
class PositionForecast:
    """Forecast positions of a body: model ("static", "polynomial", "orbit"), why, times (k,),
    positions (k, 3), expected error (k,) (inf: unknown), all in M; fit_window the samples used."""

    model: str
    reason: str
    times: np.ndarray
    positions: np.ndarray
    uncertainty: np.ndarray
    fit_window: tuple[float, float]

    @classmethod
    def from_wire(cls, f: pb.PositionForecast) -> "PositionForecast":
        return cls(model=_MODEL_NAMES.get(f.model, "unspecified"), reason=f.reason,
                   times=np.asarray(f.times_m, float), positions=_vectors(f.positions_m),
                   uncertainty=np.asarray(f.uncertainties_m, float), fit_window=(f.fit_from_m, f.fit_until_m))

    def at(self, time: float) -> tuple[np.ndarray, float]:
        """(position (3,), uncertainty) at ``time``, linear between the forecast times."""
        t = float(time)
        pos = np.array([np.interp(t, self.times, self.positions[:, a]) for a in range(3)])
        return pos, float(np.interp(t, self.times, self.uncertainty))


@dataclass(frozen=True, eq=False)
class TrackUpdate:
    """A body's track gained a point: the horizon centroid and/or the puncture position of the
    slice, the puncture scheme and its error order, and the forecast until the next regrid."""

    label: str
    horizon: TrackPoint | None
    puncture: TrackPoint | None
    puncture_method: str
    puncture_order: int
    horizon_points: int
    forecast: PositionForecast | None

    @classmethod
    def from_wire(cls, t: pb.TrackUpdated) -> "TrackUpdate":
        return cls(label=t.label,
                   horizon=TrackPoint.from_wire(t.horizon) if t.HasField("horizon") else None,
                   puncture=TrackPoint.from_wire(t.puncture) if t.HasField("puncture") else None,
                   puncture_method=t.puncture_method, puncture_order=t.puncture_order,
                   horizon_points=t.horizon_points,
                   forecast=PositionForecast.from_wire(t.forecast) if t.HasField("forecast") else None)


@dataclass(frozen=True, eq=False)
class CommonHorizon:
    """The common horizon's first appearance: label, time (M), iteration, the bodies it encloses,
    their coordinate separation then (M), its irreducible mass (M) and area (M^2)."""

    label: str
    time: float
    iteration: int
    body_labels: tuple[str, ...]
    separation: float
    irreducible_mass: float
    area: float

    @classmethod
    def from_wire(cls, c: pb.CommonHorizonFormed, *, time: float, iteration: int) -> "CommonHorizon":
        return cls(label=c.label, time=time, iteration=iteration, body_labels=tuple(c.body_labels),
                   separation=c.separation_m, irreducible_mass=c.irreducible_mass_m, area=c.area_m2)


@dataclass(frozen=True, eq=False)
class RefinedRegion:
    """One refined region on one level: sphere (centre, radius) and box (lower, upper) forms, M."""

    level: int
    spacing: float
    bodies: tuple[str, ...]
    centre: np.ndarray
    radius: float
    lower: np.ndarray
    upper: np.ndarray
    reason: str

    @classmethod
    def from_wire(cls, r: pb.RefinedRegion) -> "RefinedRegion":
        return cls(level=r.level, spacing=r.spacing_m, bodies=tuple(r.bodies), centre=_triple(r.centre_m),
                   radius=r.radius_m, lower=_triple(r.lower_m), upper=_triple(r.upper_m), reason=r.reason)

    @property
    def merged(self) -> bool:
        return len(self.bodies) > 1

    def sphere_contains(self, points, radius: float = 0.0) -> np.ndarray:
        """Whether balls of ``radius`` about (n, 3) points lie inside the sphere form."""
        p = np.atleast_2d(np.asarray(points, float))
        return np.linalg.norm(p - self.centre, axis=1) + radius <= self.radius * (1 + 1e-12)

    def box_contains(self, points, radius: float = 0.0) -> np.ndarray:
        """Whether balls of ``radius`` about (n, 3) points lie inside the box form."""
        p = np.atleast_2d(np.asarray(points, float))
        return np.all((p - radius >= self.lower) & (p + radius <= self.upper), axis=1)


@dataclass(frozen=True, eq=False)
class BodyRefinement:
    """The nested regions recommended for one body (before merging): per level 1 .. finest_level
    a sphere radius, spacing and box; the spacing the points across its horizon require, the
    margins of the finest radius and the reason for each number (M throughout)."""

    label: str
    centre: np.ndarray
    finest_level: int
    radii: np.ndarray
    spacings: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    required_spacing: float
    finest_spacing: float
    margins: dict
    reasons: dict
    horizon_max_radius: float
    horizon_min_diameter: float

    @property
    def finest_radius(self) -> float:
        return float(self.radii[-1])

    @classmethod
    def from_wire(cls, b: pb.BodyRefinement) -> "BodyRefinement":
        return cls(label=b.label, centre=_triple(b.centre_m), finest_level=b.finest_level,
                   radii=np.asarray(b.radii_m, float), spacings=np.asarray(b.spacings_m, float),
                   lower=_vectors(b.lowers_m), upper=_vectors(b.uppers_m), required_spacing=b.required_spacing_m,
                   finest_spacing=b.finest_spacing_m, margins=dict(b.margins_m), reasons=dict(b.reasons),
                   horizon_max_radius=b.horizon_max_radius_m, horizon_min_diameter=b.horizon_min_diameter_m)


@dataclass(frozen=True, eq=False)
class DataWindow:
    """A box of data the server wants in the next slice (M); ``name``: the surface(s) served."""

    name: str
    lower: np.ndarray
    upper: np.ndarray
    reason: str
    growth: int


@dataclass(frozen=True, eq=False)
class DataWindows:
    """The windows wanted for the next slice, valid for slices with times in
    [valid_from, valid_until] (M); crops keep ``extra_nodes`` nodes of each patch around a cut.
    A later slice is cropped to the windows grown by ``speed_bound`` (M per M; 0: not stated)
    times its lag behind ``valid_until``, at most ``growth_cap`` (M; 0: no cap): see
    :meth:`grown_bounds`."""

    time: float
    iteration: int
    valid_from: float
    valid_until: float
    extra_nodes: int
    windows: tuple[DataWindow, ...]
    speed_bound: float = 0.0
    growth_cap: float = 0.0

    @classmethod
    def from_wire(cls, w: pb.DataWindowsWanted) -> "DataWindows":
        return cls(time=w.time_m, iteration=w.iteration, valid_from=w.valid_from_m, valid_until=w.valid_until_m,
                   extra_nodes=w.extra_nodes,
                   windows=tuple(DataWindow(x.name, _triple(x.lower_m), _triple(x.upper_m), x.reason, x.growth)
                                 for x in w.windows),
                   speed_bound=w.speed_bound, growth_cap=w.growth_cap_m)

    def grown_bounds(self, time: float):
        """The windows for a slice at ``time``: :func:`penumbra_shim.cropping.grow_expired_windows`
        (a :class:`~penumbra_shim.cropping.WindowGrowth`), or None when they expired and no speed
        bound was stated."""
        from .cropping import grow_expired_windows  # numpy only

        return grow_expired_windows(self.bounds(), time=time, valid_from=self.valid_from,
                                    valid_until=self.valid_until, speed_bound=self.speed_bound,
                                    growth_cap=self.growth_cap)

    def covers(self, time: float) -> bool:
        """Whether a slice at ``time`` may be cropped to these windows."""
        slack = 1e-9 * max(1.0, abs(self.valid_until))
        return bool(self.windows) and self.valid_from - slack <= float(time) <= self.valid_until + slack

    def bounds(self) -> np.ndarray:
        """(m, 2, 3) (lower, upper) per window, the form :func:`penumbra_shim.cropping.crop_patches` takes."""
        return np.array([[w.lower, w.upper] for w in self.windows], dtype=float).reshape(-1, 2, 3)


@dataclass(frozen=True, eq=False)
class Guidance:
    """Refinement guidance (advisory: the evolution decides): valid over [valid_from, valid_until]
    (M), per-body nested regions, per level (coarsest first) the regions after merging, and after
    merger a single region around the remnant. ``windows`` are the data windows of the same
    reply or slice, when known."""

    time: float
    iteration: int
    valid_from: float
    valid_until: float
    post_merger: bool
    policy: RefinementOptions
    bodies: tuple[BodyRefinement, ...]
    levels: tuple[tuple[RefinedRegion, ...], ...]
    reasons: dict
    windows: DataWindows | None = None

    @classmethod
    def from_wire(cls, g: pb.RefinementGuidance, windows: DataWindows | None = None) -> "Guidance":
        return cls(time=g.time_m, iteration=g.iteration, valid_from=g.valid_from_m, valid_until=g.valid_until_m,
                   post_merger=g.post_merger, policy=RefinementOptions.from_wire(g.policy),
                   bodies=tuple(BodyRefinement.from_wire(b) for b in g.bodies),
                   levels=tuple(tuple(RefinedRegion.from_wire(r) for r in level.regions) for level in g.levels),
                   reasons=dict(g.reasons), windows=windows)

    @property
    def finest_regions(self) -> tuple[RefinedRegion, ...]:
        """Regions on the finest level any body uses."""
        return self.levels[-1] if self.levels else ()

    def regions_at(self, level: int) -> tuple[RefinedRegion, ...]:
        if not 1 <= level <= len(self.levels):
            raise ValueError(f"level: expected 1..{len(self.levels)}, got {level!r}")
        return self.levels[level - 1]

    def body(self, label: str) -> BodyRefinement:
        for b in self.bodies:
            if b.label == label:
                return b
        raise KeyError(f"label: no body {label!r} in this guidance (bodies {[b.label for b in self.bodies]})")

    def region_of(self, label: str, level: int | None = None) -> RefinedRegion:
        """The region covering ``label`` on ``level`` (default: the body's finest level)."""
        level = self.body(label).finest_level if level is None else level
        for region in self.regions_at(level):
            if label in region.bodies:
                return region
        raise KeyError(f"label: {label!r} has no region on level {level}")

    def valid_at(self, time: float) -> bool:
        return self.valid_from <= float(time) <= self.valid_until
