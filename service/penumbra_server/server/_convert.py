"""Events <-> archive rows, and finder outcomes -> wire messages.

Events are built first; their archive rows are derived from them (so the two cannot
disagree), and a restarted server rebuilds events from the rows.
"""

from __future__ import annotations

import logging
import math

import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import METHOD_CODES, SLICE_OUTCOME_FAILED, SLICE_OUTCOME_PROCESSED, SLICE_OUTCOME_SKIPPED
from ..archive import ArchivedDisplacement, displacement_from_row, displacement_row
from ..archive import _layout as layout
from ..numerics.finder import STATUS_MESSAGES
from .jobs import REASON_FOUND, SurfaceOutcome

__all__ = [
    "vector",
    "surface_result_from_outcome",
    "not_found_from_outcome",
    "surface_row",
    "slice_row",
    "surface_event_from_row",
    "slice_event_from_row",
]

_NAN = float("nan")
_log = logging.getLogger(__name__)
_METHOD_NAMES = {code: name for name, code in METHOD_CODES.items()}
_REASON_TEXT = {
    pb.SurfaceNotFound.REASON_NOT_CONVERGED: "the solver did not converge",
    pb.SurfaceNotFound.REASON_NO_CANDIDATE: ("no candidate (no trapped surface here yet): no sign change of the mean "
                                             "expansion in the searched radii, or no MOTS from the starting surfaces"),
    pb.SurfaceNotFound.REASON_OUTSIDE_DATA: "the surface needs data the slice does not provide",
    pb.SurfaceNotFound.REASON_WORKER_FAILED: "the worker failed",
    pb.SurfaceNotFound.REASON_NOT_SEARCHED: "not searched: lost inside the common horizon after the merger",
    pb.SurfaceNotFound.REASON_NEEDS_EXCISED_DATA: "the surface needs data inside an excised region",
}


def vector(values) -> pb.Vector3:
    x, y, z = (float(v) for v in values)
    return pb.Vector3(x=x, y=y, z=z)


def _triple(v: pb.Vector3) -> list[float]:
    return [v.x, v.y, v.z]


#: Spin-related quantity names (worker dict and archive columns) -> SurfaceQuantities field, for scalars.
SPIN_SCALARS = {
    "akv_angular_momentum": "akv_angular_momentum_m2",
    "dimensionless_spin": "dimensionless_spin",
    "akv_christodoulou_mass": "akv_christodoulou_mass_m",
    "killing_quality": "killing_quality",
    "spin_equatorial_circumference": "spin_equatorial_circumference_m",
    "spin_polar_circumference": "spin_polar_circumference_m",
    "spin_circumference_ratio": "spin_circumference_ratio",
    "area_error": "area_error_m2",
    "irreducible_mass_error": "irreducible_mass_error_m",
    "akv_christodoulou_mass_error": "akv_christodoulou_mass_error_m",
    "akv_angular_momentum_error": "akv_angular_momentum_error_m2",
    "dimensionless_spin_error": "dimensionless_spin_error",
    "stability_eigenvalue": "stability_eigenvalue_per_m2",
    "stability_eigenvalue_error": "stability_eigenvalue_error_per_m2",
    "circumference_spin": "circumference_spin",
    "centroid_error": "centroid_error_m",
    "spin_direction_error": "spin_direction_error_rad",
    "spin_equatorial_circumference_error": "spin_equatorial_circumference_error_m",
    "spin_polar_circumference_error": "spin_polar_circumference_error_m",
}
#: Multipoles carried, index n = 0 .. MULTIPOLE_COUNT - 1 (archives before n = 8 hold 5).
MULTIPOLE_COUNT = layout.MULTIPOLE_COUNT
#: Per-multipole columns (worker dict and archive) -> SurfaceQuantities repeated field.
MULTIPOLE_LISTS = {
    "mass_multipoles": "mass_multipoles", "spin_multipoles": "spin_multipoles",
    "mass_multipoles_error": "mass_multipoles_error", "spin_multipoles_error": "spin_multipoles_error",
}


def spin_fields(get) -> dict:
    """SurfaceQuantities keyword arguments of the spin quantities; ``get(name, default)`` reads a
    worker dict or an archive row (older archives lack these columns: NaN)."""
    fields = {wire: float(get(name, _NAN)) for name, wire in SPIN_SCALARS.items()}
    fields["spin_direction"] = vector(get("spin_direction", [_NAN] * 3))
    for name, wire in MULTIPOLE_LISTS.items():
        fields[wire] = [float(v) for v in get(name, [_NAN] * MULTIPOLE_COUNT)]
    return fields


def spin_row(q: pb.SurfaceQuantities) -> dict:
    """Archive row values of the spin quantities of a SurfaceQuantities message."""
    row = {name: getattr(q, wire) for name, wire in SPIN_SCALARS.items()}
    row["spin_direction"] = _triple(q.spin_direction) if q.HasField("spin_direction") else np.full(3, _NAN)
    for name, wire in MULTIPOLE_LISTS.items():
        values = np.full(MULTIPOLE_COUNT, _NAN)
        got = np.asarray(getattr(q, wire), dtype=float)[:MULTIPOLE_COUNT]
        values[: got.size] = got
        row[name] = values
    return row


def surface_result_from_outcome(outcome: SurfaceOutcome, *, time_m: float, iteration: int, latency_s: float) -> pb.SurfaceResult:
    q = outcome.quantities
    centroid = q.get("centroid", [_NAN] * 3)
    return pb.SurfaceResult(
        label=outcome.label,
        time_m=time_m,
        iteration=iteration,
        centre_m=vector(outcome.centre),
        lmax=outcome.lmax,
        coefficients_m=[float(c) for c in outcome.coefficients],
        quantities=pb.SurfaceQuantities(
            area_m2=q.get("area", _NAN),
            irreducible_mass_m=q.get("irreducible_mass", _NAN),
            centroid_m=vector(centroid),
            radius_min_m=q.get("radius_min", _NAN),
            radius_mean_m=q.get("radius_mean", _NAN),
            radius_max_m=q.get("radius_max", _NAN),
            resolution_indicator=q.get("resolution_indicator", _NAN),
            angular_momentum_m2=vector(q.get("angular_momentum", [_NAN] * 3)),
            christodoulou_mass_m=q.get("christodoulou_mass", _NAN),
            **spin_fields(lambda name, default: q.get(name, default)),
        ),
        residual_max_per_m=outcome.residual_max,
        residual_max_between_nodes_per_m=outcome.residual_max_between_nodes,
        iterations=outcome.iterations,
        wall_time_s=outcome.wall_time_s,
        latency_s=latency_s,
        method=outcome.method,
        finder_status=outcome.status,
        displacement=displacement_to_wire(outcome.displaced),
    )


def displacement_to_wire(surface) -> pb.InnerDisplacement | None:
    """The wire form of a numerics.displaced.DisplacedSurface (None: not in that representation)."""
    if surface is None:
        return None
    ref = surface.reference
    return pb.InnerDisplacement(reference_lmax=ref.lmax, reference_position_m=ref.position.ravel().tolist(),
                                reference_direction=ref.direction.ravel().tolist(), lmax=surface.lmax,
                                displacement_m=surface.coefficients.tolist())


def displacement_from_wire(message: pb.InnerDisplacement):
    """The DisplacedSurface of a wire InnerDisplacement (ValueError naming the field on bad sizes)."""
    from ..numerics.displaced import DisplacedSurface, ReferenceSurface

    rows = (message.reference_lmax + 1) ** 2
    for name in ("reference_position_m", "reference_direction"):
        if len(getattr(message, name)) != 3 * rows:
            raise ValueError(f"displacement.{name}: expected {3 * rows} values for reference_lmax "
                             f"{message.reference_lmax}, got {len(getattr(message, name))}")
    reference = ReferenceSurface(message.reference_lmax, np.reshape(message.reference_position_m, (rows, 3)),
                                 np.reshape(message.reference_direction, (rows, 3)))
    return DisplacedSurface(reference, message.lmax, np.asarray(message.displacement_m, dtype=float))


def _displacement_columns(s: pb.SurfaceResult) -> dict:
    """The ``displacement*`` archive columns of a found surface (degrees -1 and NaN when it was
    not followed in the displacement representation). A displacement the group's columns cannot
    hold is left out with a warning: the row itself must still be archived."""
    archived = None
    try:
        if s.HasField("displacement"):
            d = s.displacement
            archived = ArchivedDisplacement(d.reference_lmax, d.reference_position_m, d.reference_direction,
                                            d.lmax, d.displacement_m)
        return displacement_row(s.lmax, archived)
    except ValueError as exc:
        _log.warning("surface %s at iteration %d: displacement form not archived: %s", s.label, s.iteration, exc)
        return displacement_row(s.lmax, None)


def _displacement_from_archive(row: dict) -> pb.InnerDisplacement | None:
    archived = displacement_from_row(row)
    if archived is None:
        return None
    return pb.InnerDisplacement(reference_lmax=archived.reference_lmax,
                                reference_position_m=archived.reference_position.ravel().tolist(),
                                reference_direction=archived.reference_direction.ravel().tolist(),
                                lmax=archived.lmax, displacement_m=archived.coefficients.tolist())


def not_found_from_outcome(outcome: SurfaceOutcome, *, latency_s: float) -> pb.SurfaceNotFound:
    return pb.SurfaceNotFound(
        label=outcome.label,
        reason=outcome.reason,
        message=outcome.message,
        finder_status=outcome.status,
        residual_max_per_m=outcome.residual_max,
        iterations=outcome.iterations,
        wall_time_s=outcome.wall_time_s,
        latency_s=latency_s,
    )


def surface_row(event: pb.RunEvent, archived_unix_s: float) -> tuple[str, dict]:
    """(label, archive row) of a surface_found or surface_not_found event."""
    kind = event.WhichOneof("kind")
    row = {"iteration": event.iteration, "time": event.time_m, "event_seq": event.seq, "archived_unix_s": archived_unix_s}
    if kind == "surface_found":
        s = event.surface_found.surface
        q = s.quantities
        row.update(
            status=s.finder_status, found=True, reason=REASON_FOUND,
            centre=_triple(s.centre_m), coefficients=np.asarray(s.coefficients_m, dtype=float),
            area=q.area_m2, irreducible_mass=q.irreducible_mass_m, centroid=_triple(q.centroid_m),
            coordinate_radius=np.array([q.radius_min_m, q.radius_mean_m, q.radius_max_m]),
            resolution_indicator=q.resolution_indicator,
            angular_momentum=_triple(q.angular_momentum_m2), christodoulou_mass=q.christodoulou_mass_m,
            **spin_row(q),
            residual_max=s.residual_max_per_m, residual_max_between_nodes=s.residual_max_between_nodes_per_m,
            iterations=s.iterations, wall_time_s=s.wall_time_s,
            latency_s=s.latency_s, method=METHOD_CODES.get(s.method, -1),
            **_displacement_columns(s),
        )
        return s.label, row
    if kind == "surface_not_found":
        n = event.surface_not_found
        row.update(
            status=n.finder_status, found=False, reason=n.reason, residual_max=n.residual_max_per_m,
            iterations=n.iterations, wall_time_s=n.wall_time_s, latency_s=n.latency_s,
        )
        return n.label, row
    raise ValueError(f"event: expected a surface event, got {kind}")


def slice_row(event: pb.RunEvent, *, arrival_unix_s: float, nbytes: int, archived_unix_s: float) -> dict:
    """Archive row of a slice_processed or slice_skipped event (outcome failed if it has an error)."""
    kind = event.WhichOneof("kind")
    row = {"arrival_unix_s": arrival_unix_s, "bytes": nbytes, "event_seq": event.seq, "archived_unix_s": archived_unix_s}
    if kind == "slice_processed":
        p = event.slice_processed
        row.update(
            iteration=event.iteration, time=event.time_m,
            outcome=SLICE_OUTCOME_FAILED if p.error else SLICE_OUTCOME_PROCESSED,
            latency_s=p.latency_s, queue_wait_s=p.queue_wait_s,
            surfaces_attempted=p.surfaces_attempted, surfaces_found=p.surfaces_found,
        )
        return row
    if kind == "slice_skipped":
        s = event.slice_skipped
        row.update(iteration=s.skipped_iteration, time=s.skipped_time_m, outcome=SLICE_OUTCOME_SKIPPED,
                   superseded_by_iteration=s.superseded_by_iteration)
        return row
    raise ValueError(f"event: expected a slice event, got {kind}")


def _row_value(row: dict, name: str, default):
    """A column of an archived row; ``default`` for archives written before the column existed."""
    value = row.get(name)
    return default if value is None else value


def _num(value, default: float) -> float:
    value = float(value)
    return default if math.isnan(value) else value


def _radius_fields(row: dict) -> dict:
    """radius_min/mean/max_m of an archived row: the column ``coordinate_radius`` (least, mean,
    largest), or the three columns archives written before it held."""
    radius = row.get("coordinate_radius")
    least, mean, largest = ((radius[0], radius[1], radius[2]) if radius is not None else
                            (row["radius_min"], row["radius_mean"], row["radius_max"]))
    return {"radius_min_m": float(least), "radius_mean_m": float(mean), "radius_max_m": float(largest)}


def surface_event_from_row(run_id: str, label: str, row: dict, lmax: int) -> pb.RunEvent:
    """The event an archived surface row announced (messages are the status table's wording)."""
    event = pb.RunEvent(seq=int(row["event_seq"]), run_id=run_id, emit_time_unix_s=_num(row["archived_unix_s"], 0.0),
                        time_m=float(row["time"]), iteration=int(row["iteration"]))
    if bool(row["found"]):
        event.surface_found.surface.CopyFrom(
            pb.SurfaceResult(
                label=label, time_m=float(row["time"]), iteration=int(row["iteration"]),
                centre_m=vector(row["centre"]), lmax=lmax,
                coefficients_m=[float(c) for c in row["coefficients"]],
                quantities=pb.SurfaceQuantities(
                    area_m2=float(row["area"]), irreducible_mass_m=float(row["irreducible_mass"]),
                    centroid_m=vector(row["centroid"]),
                    **_radius_fields(row),
                    resolution_indicator=float(row["resolution_indicator"]),
                    angular_momentum_m2=vector(_row_value(row, "angular_momentum", [_NAN] * 3)),
                    christodoulou_mass_m=float(_row_value(row, "christodoulou_mass", _NAN)),
                    **spin_fields(lambda name, default: _row_value(row, name, default)),
                ),
                residual_max_per_m=float(row["residual_max"]),
                residual_max_between_nodes_per_m=float(_row_value(row, "residual_max_between_nodes", _NAN)),
                iterations=int(row["iterations"]),
                wall_time_s=float(row["wall_time_s"]), latency_s=float(row["latency_s"]),
                finder_status=int(row["status"]), method=_METHOD_NAMES.get(int(row["method"]), ""),
                displacement=_displacement_from_archive(row),
            )
        )
    else:
        reason = int(row["reason"])
        status = int(row["status"])
        event.surface_not_found.CopyFrom(
            pb.SurfaceNotFound(
                label=label, reason=reason,
                message=STATUS_MESSAGES.get(status, _REASON_TEXT.get(reason, "not found")) + " (rebuilt from the archive)",
                finder_status=status, residual_max_per_m=float(row["residual_max"]),
                iterations=int(row["iterations"]), wall_time_s=float(row["wall_time_s"]),
                latency_s=float(row["latency_s"]),
            )
        )
    return event


def slice_event_from_row(run_id: str, row: dict) -> pb.RunEvent:
    event = pb.RunEvent(seq=int(row["event_seq"]), run_id=run_id, emit_time_unix_s=_num(row["archived_unix_s"], 0.0),
                        time_m=float(row["time"]), iteration=int(row["iteration"]))
    if int(row["outcome"]) == SLICE_OUTCOME_SKIPPED:
        event.slice_skipped.CopyFrom(
            pb.SliceSkipped(skipped_iteration=int(row["iteration"]), skipped_time_m=float(row["time"]),
                            superseded_by_iteration=int(row["superseded_by_iteration"]))
        )
    else:
        failed = int(row["outcome"]) == SLICE_OUTCOME_FAILED
        event.slice_processed.CopyFrom(
            pb.SliceProcessed(surfaces_attempted=int(row["surfaces_attempted"]), surfaces_found=int(row["surfaces_found"]),
                              latency_s=float(row["latency_s"]), queue_wait_s=float(row["queue_wait_s"]),
                              error="processing failed (details in the server log)" if failed else "")
        )
    return event
