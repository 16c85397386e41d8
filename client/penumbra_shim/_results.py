"""What the server answers about a run: its description, slice acknowledgements, surface
reports and the latest state of each surface. Frozen dataclasses; lengths in units of M."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._spec_types import RunSpec
from ._wire import horizons_pb2 as pb
from ._wire_values import NAN, triple

__all__ = ["RunInfo", "SliceAck", "SurfaceReport", "SurfaceState", "STATE_NAMES"]

#: Run states by wire value.
STATE_NAMES = {pb.Run.STATE_OPEN: "open", pb.Run.STATE_CLOSED: "closed", pb.Run.STATE_UNSPECIFIED: "unspecified"}
_REASON_NAMES = {
    pb.SurfaceNotFound.REASON_UNSPECIFIED: "unspecified",
    pb.SurfaceNotFound.REASON_NOT_CONVERGED: "not_converged",
    pb.SurfaceNotFound.REASON_NO_CANDIDATE: "no_candidate",
    pb.SurfaceNotFound.REASON_OUTSIDE_DATA: "outside_data",
    pb.SurfaceNotFound.REASON_WORKER_FAILED: "worker_failed",
    pb.SurfaceNotFound.REASON_NOT_SEARCHED: "not_searched",
    pb.SurfaceNotFound.REASON_NEEDS_EXCISED_DATA: "needs_excised_data",
}


@dataclass(frozen=True)
class RunInfo:
    """A run as the server describes it.

    ``last_received_iteration`` / ``last_received_time`` (M): the newest slice the server accepted
    (-1 / NaN before the first): a watcher's lag is that time minus a surface's time.
    ``slices_incomplete``: slices sent in parts that were processed with parts missing.
    ``client_gaps_recorded``: outages of the client's link recorded on the run;
    ``slices_rejected``: slices refused after their header named the run.
    ``highest_held_iteration``: the highest iteration the server holds, archived or kept in its
    spool on disk (-1: none): after a server restart, slices up to it need no resend. A slice sent
    in parts counts once every part is on the server's disk; the parts of a slice still waiting
    for others are kept too (a resent part is answered as a duplicate) but do not count here.
    ``slices_spooled``: acknowledged slices on the server's disk, not yet archived;
    ``slices_replayed``: slices the server found in its spool at its last start and queued again.
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
    last_received_time: float = NAN
    slices_incomplete: int = 0
    client_gaps_recorded: int = 0
    slices_rejected: int = 0
    highest_held_iteration: int = -1
    slices_spooled: int = 0
    slices_replayed: int = 0

    @classmethod
    def from_wire(cls, run: pb.Run) -> "RunInfo":
        return cls(
            run_id=run.run_id, name=run.spec.display_name, state=STATE_NAMES.get(run.state, str(run.state)),
            spec=RunSpec.from_wire(run.spec), created_unix_s=run.create_time_unix_s,
            closed_unix_s=run.close_time_unix_s, slices_received=run.slices_received,
            slices_processed=run.slices_processed, slices_skipped=run.slices_skipped,
            slices_duplicate=run.slices_duplicate, last_seq=run.last_event_seq, archive_path=run.archive_path,
            last_received_iteration=run.last_received_iteration, last_received_time=run.last_received_time_m,
            slices_incomplete=run.slices_incomplete,
            client_gaps_recorded=run.client_gaps_recorded, slices_rejected=run.slices_rejected,
            highest_held_iteration=run.highest_held_iteration, slices_spooled=run.slices_spooled,
            slices_replayed=run.slices_replayed,
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
    ``persisted``: the server wrote the accepted slice (or part) to its disk before answering (it
    survives a crash of the server).
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
    persisted: bool = False

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
            persisted=response.persisted,
        )


@dataclass(frozen=True, eq=False)
class SurfaceReport:
    """One attempt on a surface: found (with its shape and quantities) or not (with a reason).

    Lengths in M, area in M^2, residual in 1/M; NaN where not found or not measured.
    Spin from the approximate Killing vector: ``akv_angular_momentum`` J (M^2) about the unit
    vector ``spin_direction``, ``dimensionless_spin`` chi = J / M_chr^2, ``akv_christodoulou_mass``
    (M), ``killing_quality`` (lowest AKV eigenvalue lambda R^2, 0 for an exact Killing field),
    circumferences about the spin axis (M), their ratio polar / equatorial and
    ``circumference_spin``, the chi that ratio has on a Kerr horizon (Brandt & Seidel, PRD 52,
    870 (1995)), a second spin estimate beside ``dimensionless_spin``;
    ``mass_multipoles`` / ``spin_multipoles`` M_n / M^(n+1), J_n / M^(n+1), index n = 0..8.
    ``<name>_error`` (same unit as ``<name>``; the direction's as an angle in radians, the
    centroid's as one length): error estimates of area, irreducible_mass, akv_christodoulou_mass,
    akv_angular_momentum, dimensionless_spin, centroid, spin_direction, the two spin-axis
    circumferences and (per index) the multipoles (NaN: not estimated).
    ``radius_min`` / ``radius_mean`` / ``radius_max``: coordinate extent about ``centre``.
    ``stability_eigenvalue`` (1/M^2): principal eigenvalue of the MOTS stability operator for
    l = n + s, k = (n - s) / 2 (positive: strictly stable, e.g. an outer horizon; negative:
    unstable, e.g. an inner common MOTS), with ``stability_eigenvalue_error``.
    ``angular_momentum`` is the older coordinate-rotation estimate (3-vector, M^2).
    ``coefficients`` are real spherical-harmonic coefficients of the radius, index l*l + l + m.
    """

    label: str
    time: float
    iteration: int
    found: bool
    status: int
    message: str = ""
    reason: str = ""
    centre: np.ndarray = field(default_factory=lambda: np.full(3, NAN))
    lmax: int = 0
    coefficients: np.ndarray = field(default_factory=lambda: np.zeros(0))
    area: float = NAN
    irreducible_mass: float = NAN
    centroid: np.ndarray = field(default_factory=lambda: np.full(3, NAN))
    radius_min: float = NAN
    radius_mean: float = NAN
    radius_max: float = NAN
    resolution_indicator: float = NAN
    residual_max: float = NAN
    residual_max_between_nodes: float = NAN
    angular_momentum: np.ndarray = field(default_factory=lambda: np.full(3, NAN))
    christodoulou_mass: float = NAN
    akv_angular_momentum: float = NAN
    spin_direction: np.ndarray = field(default_factory=lambda: np.full(3, NAN))
    dimensionless_spin: float = NAN
    akv_christodoulou_mass: float = NAN
    killing_quality: float = NAN
    spin_equatorial_circumference: float = NAN
    spin_polar_circumference: float = NAN
    spin_circumference_ratio: float = NAN
    mass_multipoles: np.ndarray = field(default_factory=lambda: np.zeros(0))
    spin_multipoles: np.ndarray = field(default_factory=lambda: np.zeros(0))
    area_error: float = NAN
    irreducible_mass_error: float = NAN
    akv_christodoulou_mass_error: float = NAN
    akv_angular_momentum_error: float = NAN
    dimensionless_spin_error: float = NAN
    stability_eigenvalue: float = NAN
    stability_eigenvalue_error: float = NAN
    circumference_spin: float = NAN
    centroid_error: float = NAN
    spin_direction_error: float = NAN
    spin_equatorial_circumference_error: float = NAN
    spin_polar_circumference_error: float = NAN
    mass_multipoles_error: np.ndarray = field(default_factory=lambda: np.zeros(0))
    spin_multipoles_error: np.ndarray = field(default_factory=lambda: np.zeros(0))
    iterations: int = 0
    wall_time_s: float = NAN
    latency_s: float = NAN
    method: str = ""

    @classmethod
    def from_result(cls, s: pb.SurfaceResult) -> "SurfaceReport":
        q = s.quantities
        return cls(
            label=s.label, time=s.time_m, iteration=s.iteration, found=True, status=s.finder_status,
            message="found", centre=triple(s.centre_m), lmax=s.lmax,
            coefficients=np.asarray(s.coefficients_m, dtype=float), area=q.area_m2,
            irreducible_mass=q.irreducible_mass_m, centroid=triple(q.centroid_m), radius_min=q.radius_min_m,
            radius_mean=q.radius_mean_m, radius_max=q.radius_max_m, resolution_indicator=q.resolution_indicator, residual_max=s.residual_max_per_m,
            residual_max_between_nodes=s.residual_max_between_nodes_per_m,
            angular_momentum=triple(q.angular_momentum_m2), christodoulou_mass=q.christodoulou_mass_m,
            akv_angular_momentum=q.akv_angular_momentum_m2,
            spin_direction=triple(q.spin_direction) if q.HasField("spin_direction") else np.full(3, NAN),
            dimensionless_spin=q.dimensionless_spin, akv_christodoulou_mass=q.akv_christodoulou_mass_m,
            killing_quality=q.killing_quality, spin_equatorial_circumference=q.spin_equatorial_circumference_m,
            spin_polar_circumference=q.spin_polar_circumference_m,
            spin_circumference_ratio=q.spin_circumference_ratio,
            mass_multipoles=np.asarray(q.mass_multipoles, dtype=float),
            spin_multipoles=np.asarray(q.spin_multipoles, dtype=float),
            area_error=q.area_error_m2, irreducible_mass_error=q.irreducible_mass_error_m,
            akv_christodoulou_mass_error=q.akv_christodoulou_mass_error_m,
            akv_angular_momentum_error=q.akv_angular_momentum_error_m2,
            dimensionless_spin_error=q.dimensionless_spin_error,
            stability_eigenvalue=q.stability_eigenvalue_per_m2,
            stability_eigenvalue_error=q.stability_eigenvalue_error_per_m2,
            circumference_spin=q.circumference_spin, centroid_error=q.centroid_error_m,
            spin_direction_error=q.spin_direction_error_rad,
            spin_equatorial_circumference_error=q.spin_equatorial_circumference_error_m,
            spin_polar_circumference_error=q.spin_polar_circumference_error_m,
            mass_multipoles_error=np.asarray(q.mass_multipoles_error, dtype=float),
            spin_multipoles_error=np.asarray(q.spin_multipoles_error, dtype=float),
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
