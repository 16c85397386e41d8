"""A run rebuilt from its archive after a server restart: counters, surface states, steering
decisions, link records and the event log, exactly as announced before.

:func:`read_archive` does the disk reads (any thread); :func:`restore_run` applies them to a
fresh :class:`~penumbra_server.server.runs.RunRecord` before it is registered, so no slice can
reach a half-restored run.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import ArchiveView, displacement_from_row, open_archive
from ..numerics.surfaces import Surface
from . import _convert as convert
from ._tracking_convert import decode_wire, wire_triple
from .run_events import STATE_VALUES
from .surface_state import SurfaceState

if TYPE_CHECKING:
    from .runs import RunRecord

__all__ = ["ArchivedRun", "read_archive", "restore_run"]


@dataclass(frozen=True, eq=False)
class ArchivedRun:
    """What a restore reads: the archive view, the slice columns, label -> surface columns and
    the tracking events' columns."""

    view: ArchiveView
    slices: dict
    surfaces: dict
    tracking_events: dict


def read_archive(path: Path) -> ArchivedRun:
    """The disk reads of a restore (any thread)."""
    view = open_archive(path)
    return ArchivedRun(view, view.slices(), {label: view.surface(label) for label in view.surface_labels},
                       view.tracking_events())


def restore_run(run: "RunRecord", archived: ArchivedRun) -> None:
    """Rebuild ``run``'s counters, surface states, steering and event log from ``archived``."""
    view, slices, surfaces = archived.view, archived.slices, archived.surfaces
    tracking_events = archived.tracking_events or {}
    events: list[pb.RunEvent] = []
    n = len(slices.get("iteration", []))
    for i in range(n):
        row = {name: values[i] for name, values in slices.items()}
        run.accepted_iterations.add(int(row["iteration"]))
        events.append(convert.slice_event_from_row(run.run_id, row))
    if n:
        newest = int(np.argmax(slices["iteration"]))
        run.last_received = (int(slices["iteration"][newest]), float(slices["time"][newest]))
    outcome = slices.get("outcome", np.zeros(0))
    run.slices_received = n
    run.slices_skipped = int(np.sum(outcome == 2))
    run.slices_processed = n - run.slices_skipped
    reasons: dict[str, list[tuple[float, int, int]]] = {}
    for label, cols in surfaces.items():
        state = run.states.setdefault(label, SurfaceState(label))
        if label not in run.surface_labels:
            run.surface_labels.append(label)
        lmax = view.surface_lmax(label)
        run.displaced.pop(label, None)
        for i in range(len(cols["iteration"])):
            row = {name: values[i] for name, values in cols.items()}
            event = convert.surface_event_from_row(run.run_id, label, row, lmax)
            events.append(event)
            reasons.setdefault(label, []).append((float(row["time"]), int(row["iteration"]), int(row["reason"])))
            if event.WhichOneof("kind") == "surface_found":
                s = event.surface_found.surface
                state.record_found(Surface(row["centre"], lmax, row["coefficients"]), wire_triple(s.quantities.centroid_m),
                                   s.quantities.radius_max_m, time=float(row["time"]), iteration=int(row["iteration"]),
                                   irreducible_mass=float(row["irreducible_mass"]), message=s)
                # The follow seed of a surface tracked as a displacement (the inner common MOTS):
                # the surface itself, as archived, not its star-shaped fit (NaN once it folds).
                # A row it cannot be rebuilt from costs only the seed (then re-seeded inward).
                try:
                    archived_displacement = displacement_from_row(row)
                    if archived_displacement is not None:
                        run.displaced[label] = archived_displacement.surface()
                except ValueError:
                    run.displaced.pop(label, None)
            else:
                n_f = event.surface_not_found
                state.record_miss(n_f.message, int(row["iteration"]),
                                  searched=n_f.reason != pb.SurfaceNotFound.REASON_NOT_SEARCHED)
    # Tracking events come back from their archived wire form, exactly as announced.
    for index, wire in enumerate(tracking_events.get("wire", [])):
        event = decode_wire(wire)
        event.emit_time_unix_s = float(tracking_events["archived_unix_s"][index])
        events.append(event)
        kind = event.WhichOneof("kind")
        if kind == "refinement_guidance":
            run.latest_guidance_event = event
        elif kind == "data_windows_wanted":
            run.latest_windows_event = event
        elif kind == "slice_parts_missing":
            if event.slice_parts_missing.disposition == pb.SlicePartsMissing.DISPOSITION_PROCESSED:
                run.slices_incomplete += 1
            else:
                run.parts.given_up.add(int(event.iteration))
        elif kind == "formation_forecast":  # the c_min history of the formation watch (formation.py)
            for observer in run.slice_observers:
                getattr(observer, "restore_event", lambda _: None)(event)
    run.steering.restore(reasons, tracking_events)
    run.link.restore(view.client_gaps(), tracking_events)
    for entry in run.state_events:
        event = pb.RunEvent(seq=int(entry["seq"]), run_id=run.run_id, emit_time_unix_s=float(entry["unix_s"]))
        event.run_state_changed.CopyFrom(
            pb.RunStateChanged(state=STATE_VALUES[entry["state"]], reason=entry.get("reason", "")))
        events.append(event)
    run.log.preload(events)
