"""Plain values the shim hands out: run specs, run descriptions, acknowledgements, surfaces,
events. All frozen dataclasses; lengths, times and masses in units of M."""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from ._fields import check_variable_set
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
]

_LABEL = re.compile(r"^[A-Za-z0-9_-]{1,32}$")
_NAN = float("nan")
_VARIABLE_SET_NAMES = {
    pb.VARIABLE_SET_ADM: "adm",
    pb.VARIABLE_SET_CONFORMAL_CHI: "conformal_chi",
    pb.VARIABLE_SET_CONFORMAL_W: "conformal_w",
    pb.VARIABLE_SET_CONFORMAL_PHI: "conformal_phi",
}
_VARIABLE_SET_WIRE = {v: k for k, v in _VARIABLE_SET_NAMES.items()}
_STATE_NAMES = {pb.Run.STATE_OPEN: "open", pb.Run.STATE_CLOSED: "closed", pb.Run.STATE_UNSPECIFIED: "unspecified"}
_REASON_NAMES = {
    pb.SurfaceNotFound.REASON_UNSPECIFIED: "unspecified",
    pb.SurfaceNotFound.REASON_NOT_CONVERGED: "not_converged",
    pb.SurfaceNotFound.REASON_NO_CANDIDATE: "no_candidate",
    pb.SurfaceNotFound.REASON_OUTSIDE_DATA: "outside_data",
    pb.SurfaceNotFound.REASON_WORKER_FAILED: "worker_failed",
}

#: Event kinds the shim names (others arrive as kind "other" with the message in ``raw``).
EVENT_KINDS = ("surface_found", "surface_not_found", "slice_skipped", "run_state_changed", "slice_processed")


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
    """Finder settings: highest harmonic degree, tolerance on max |Theta| (1/M), iteration cap."""

    lmax: int = 8
    tolerance: float = 1e-8
    max_iterations: int = 40


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
class RunSpec:
    """What the server needs to know about a run.

    Attributes:
        variable_set: "adm", "conformal_chi", "conformal_w" or "conformal_phi".
        bodies: expected bodies (at least one).
        name: free text shown by listings and watchers.
        mass_scale_solar_masses: what M is physically (0: not stated).
        finder: :class:`FinderOptions`.
        backlog: :class:`BacklogOptions`.
    """

    variable_set: str
    bodies: Sequence[Body]
    name: str = ""
    mass_scale_solar_masses: float = 0.0
    finder: FinderOptions = field(default_factory=FinderOptions)
    backlog: BacklogOptions = field(default_factory=BacklogOptions)

    def __post_init__(self) -> None:
        check_variable_set(self.variable_set)
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
            variable_set=_VARIABLE_SET_WIRE[self.variable_set],
            mass_scale_solar_masses=self.mass_scale_solar_masses,
            bodies=[
                pb.ExpectedBody(label=b.label, approximate_mass_m=b.mass,
                                approximate_position_m=pb.Vector3(x=b.position[0], y=b.position[1], z=b.position[2]))
                for b in self.bodies
            ],
            finder=pb.FinderSettings(lmax=self.finder.lmax, tolerance_per_m=self.finder.tolerance,
                                     max_iterations=self.finder.max_iterations),
            backlog=pb.BacklogPolicy(policy=pb.BacklogPolicy.POLICY_KEEP_NEWEST, queue_depth=self.backlog.queue_depth),
        )

    @classmethod
    def from_wire(cls, spec: pb.RunSpec) -> "RunSpec":
        return cls(
            variable_set=_VARIABLE_SET_NAMES.get(spec.variable_set, "adm"),
            bodies=tuple(Body(b.label, tuple(_triple(b.approximate_position_m)), b.approximate_mass_m) for b in spec.bodies),
            name=spec.display_name,
            mass_scale_solar_masses=spec.mass_scale_solar_masses,
            finder=FinderOptions(lmax=spec.finder.lmax, tolerance=spec.finder.tolerance_per_m,
                                 max_iterations=spec.finder.max_iterations),
            backlog=BacklogOptions(queue_depth=spec.backlog.queue_depth or 4),
        )


@dataclass(frozen=True)
class RunInfo:
    """A run as the server describes it.

    ``last_received_iteration`` / ``last_received_time`` (M): the newest slice the server accepted
    (-1 / NaN before the first): a watcher's lag is that time minus a surface's time.
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

    @classmethod
    def from_wire(cls, run: pb.Run) -> "RunInfo":
        return cls(
            run_id=run.run_id, name=run.spec.display_name, state=_STATE_NAMES.get(run.state, str(run.state)),
            spec=RunSpec.from_wire(run.spec), created_unix_s=run.create_time_unix_s,
            closed_unix_s=run.close_time_unix_s, slices_received=run.slices_received,
            slices_processed=run.slices_processed, slices_skipped=run.slices_skipped,
            slices_duplicate=run.slices_duplicate, last_seq=run.last_event_seq, archive_path=run.archive_path,
            last_received_iteration=run.last_received_iteration, last_received_time=run.last_received_time_m,
        )


@dataclass(frozen=True)
class SliceAck:
    """What became of a submitted slice.

    ``accepted``: new on the server and queued. ``duplicate``: the server had it already.
    ``skipped_locally``: dropped from the shim's own queue (keep-newest) before sending.
    ``skipped_iterations``: older slices the server skipped to make room for this one.
    """

    iteration: int
    accepted: bool
    duplicate: bool = False
    skipped_locally: bool = False
    bytes_sent: int = 0
    queue_position: int = -1
    skipped_iterations: tuple[int, ...] = ()
    attempts: int = 0

    @classmethod
    def from_wire(cls, response: pb.SendSliceResponse, *, attempts: int) -> "SliceAck":
        return cls(
            iteration=response.iteration,
            accepted=response.outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED,
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
        return cls(kind="other", **base)
