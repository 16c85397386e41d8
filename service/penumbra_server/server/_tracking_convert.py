"""Tracking results -> events and archive rows: the :class:`Notice` s the steering hands the run.

Each builder takes plain results (tracks, forecasts, guidance, windows) and returns one
:class:`Notice`: the RunEvent payload, a one-line summary and the archive rows it adds. The run
commits a notice's rows together with its event (run_commits.py); a tracking event is also archived in
its wire form (:func:`encode_wire`), from which a restarted server replays it.
"""

from __future__ import annotations

import base64
import json
import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import _layout as layout
from ..tracking.forecast import Forecast
from ..tracking.guidance import HorizonSize, LevelRegion, RefinementGuidance
from ..tracking.motion import MotionBound
from ..tracking.windows import DataWindow
from ._convert import vector
from ._spec import refinement_from_wire, refinement_to_wire

__all__ = ["Notice", "encode_wire", "decode_wire", "wire_triple", "warning_notice", "track_notice",
           "formed_notice", "guidance_notice", "guidance_regions_from_wire", "windows_notice", "windows_from_wire"]

_MODEL_WIRE = {"static": pb.PositionForecast.MODEL_STATIC, "polynomial": pb.PositionForecast.MODEL_POLYNOMIAL,
               "orbit": pb.PositionForecast.MODEL_ORBIT}


@dataclass(frozen=True, eq=False)
class Notice:
    """One event the run commits for a slice, with its archive rows.

    Attributes:
        kind: the RunEvent oneof field ("track_updated", "common_horizon_formed",
            "refinement_guidance", "data_windows_wanted", "warning").
        payload: the message for that field.
        label: the surface concerned ("" for guidance and windows).
        message: warnings: the text; else a one-line summary (archived).
        group_rows: archive group path -> rows (``event_seq`` is filled in by the run).
    """

    kind: str
    payload: object
    label: str = ""
    message: str = ""
    group_rows: Mapping[str, list[dict]] = field(default_factory=dict)


def encode_wire(event: pb.RunEvent) -> str:
    """The archived wire form of an event (base64 of its serialization)."""
    return base64.b64encode(event.SerializeToString()).decode("ascii")


def decode_wire(text: str) -> pb.RunEvent:
    return pb.RunEvent.FromString(base64.b64decode(str(text).encode("ascii")))


def wire_triple(v: pb.Vector3) -> np.ndarray:
    return np.array([v.x, v.y, v.z])


def warning_notice(kind: int, label: str, text: str) -> Notice:
    """A RunWarning of ``kind`` (pb.RunWarning.KIND_*) about ``label`` ("" for the run)."""
    return Notice("warning", pb.RunWarning(kind=kind, label=label, message=text), label=label, message=text)


def _track_point(row: dict, source: int) -> pb.TrackPoint:
    return pb.TrackPoint(time_m=row["time"], iteration=row["iteration"], position_m=vector(row["position"]),
                         source=source, uncertainty_m=row["uncertainty"])


def track_notice(label: str, horizon_points: int, point: dict | None, puncture: dict | None,
                 fc: Forecast | None, t: float, it: int) -> Notice:
    """track_updated for ``label``: its new horizon and puncture points (archive rows of
    ``tracks/<label>``, the puncture row with a "method") and its forecast, if any."""
    payload = pb.TrackUpdated(label=label, horizon_points=horizon_points)
    rows: dict[str, list[dict]] = {}
    track_rows = []
    if point is not None:
        payload.horizon.CopyFrom(_track_point(point, pb.TrackPoint.SOURCE_HORIZON))
        track_rows.append(point)
    if puncture is not None:
        payload.puncture.CopyFrom(_track_point(puncture, pb.TrackPoint.SOURCE_PUNCTURE))
        if puncture["method"] != "start":
            payload.puncture_method = puncture["method"]
            payload.puncture_order = int(puncture["order"])
        track_rows.append({k: v for k, v in puncture.items() if k != "method"})
    rows[f"{layout.TRACKS_GROUP}/{label}"] = track_rows
    summary = f"track {label!r}: {horizon_points} horizon point(s)"
    if fc is not None and label in fc.bodies:
        positions, unc = fc.positions_of(label), fc.uncertainty_of(label)
        payload.forecast.CopyFrom(pb.PositionForecast(
            model=_MODEL_WIRE.get(fc.model, pb.PositionForecast.MODEL_UNSPECIFIED), reason=fc.reason,
            times_m=[float(v) for v in fc.times], positions_m=[vector(p) for p in positions],
            uncertainties_m=[float(u) for u in unc], fit_from_m=fc.fit_window[0], fit_until_m=fc.fit_window[1]))
        rows[f"{layout.FORECASTS_GROUP}/{label}"] = [{
            "iteration": it, "time": t, "model": layout.FORECAST_MODELS.get(fc.model, 0),
            "fit_from": fc.fit_window[0], "fit_until": fc.fit_window[1], "lead_time": np.asarray(fc.times),
            "position": np.asarray(positions), "uncertainty": np.asarray(unc), "reason": fc.reason,
        }]
        summary += f"; {fc.model} forecast, uncertainty at the interval's end {float(unc[-1]):.3g} M"
    return Notice("track_updated", payload, label=label, message=summary, group_rows=rows)


def formed_notice(label: str, body_labels: Sequence[str], separation: float, irreducible_mass: float,
                  t: float, it: int) -> Notice:
    """common_horizon_formed: the common surface ``label`` first found, the bodies ``separation`` M apart."""
    area = 16.0 * math.pi * irreducible_mass ** 2 if np.isfinite(irreducible_mass) else math.nan
    payload = pb.CommonHorizonFormed(label=label, body_labels=list(body_labels), separation_m=separation,
                                     irreducible_mass_m=irreducible_mass, area_m2=area)
    text = (f"common horizon {label!r} first found at t = {t:.6g} M (iteration {it}), bodies "
            f"{separation:.4g} M apart, M_irr = {irreducible_mass:.6g} M")
    return Notice("common_horizon_formed", payload, label=label, message=text)


def guidance_notice(g: RefinementGuidance, sizes: Mapping[str, HorizonSize], t: float, it: int) -> Notice:
    """refinement_guidance with the rows of ``guidance/`` (updates, bodies, regions)."""
    payload = pb.RefinementGuidance(time_m=t, iteration=it, valid_from_m=g.valid_from, valid_until_m=g.valid_until,
                                    post_merger=g.post_merger, policy=refinement_to_wire(g.policy),
                                    reasons=dict(g.reasons))
    body_rows, region_rows = [], []
    for b in g.bodies:
        size = sizes[b.body]
        entry = payload.bodies.add(
            label=b.body, centre_m=vector(b.centre), finest_level=b.finest_level,
            radii_m=[float(r) for r in b.radii], spacings_m=[float(h) for h in b.spacings],
            lowers_m=[vector(v) for v in b.lower], uppers_m=[vector(v) for v in b.upper],
            required_spacing_m=b.required_spacing, finest_spacing_m=b.finest_spacing,
            horizon_max_radius_m=size.max_radius, horizon_min_diameter_m=size.min_diameter,
        )
        entry.margins_m.update({k: float(v) for k, v in b.margins.items()})
        entry.reasons.update(dict(b.reasons))
        body_rows.append({
            "iteration": it, "time": t, "label": b.body, "centre": b.centre, "finest_level": b.finest_level,
            "finest_radius": b.finest_radius, "finest_spacing": b.finest_spacing,
            "required_spacing": b.required_spacing, "finest_lower": b.lower[-1], "finest_upper": b.upper[-1],
            "horizon_max_radius": size.max_radius, "horizon_min_diameter": size.min_diameter,
            "margin_horizon": b.margins["horizon"], "margin_motion": b.margins["motion"],
            "margin_uncertainty": b.margins["uncertainty"], "margin_guard": b.margins["guard"],
            "reasons": json.dumps(dict(b.reasons), sort_keys=True),
        })
    for index, regions in enumerate(g.levels):
        level = payload.levels.add(level=index + 1, spacing_m=regions[0].spacing if regions else math.nan)
        for r in regions:
            level.regions.add(level=r.level, spacing_m=r.spacing, bodies=list(r.bodies), centre_m=vector(r.centre),
                              radius_m=r.radius, lower_m=vector(r.lower), upper_m=vector(r.upper), reason=r.reason)
            region_rows.append({"iteration": it, "time": t, "level": r.level, "spacing": r.spacing,
                                "bodies": "+".join(r.bodies), "centre": r.centre, "radius": r.radius,
                                "lower": r.lower, "upper": r.upper, "reason": r.reason})
    finest = min(b.finest_spacing for b in g.bodies)
    update_row = {"iteration": it, "time": t, "valid_from": g.valid_from, "valid_until": g.valid_until,
                  "post_merger": g.post_merger, "nesting_depth": g.policy.nesting_depth, "finest_spacing": finest,
                  "reasons": json.dumps(dict(g.reasons), sort_keys=True)}
    regions_text = ", ".join(f"{'+'.join(r.bodies)} r={r.radius:.3g}" for r in g.finest_regions)
    text = (f"guidance valid {g.valid_from:.6g}..{g.valid_until:.6g} M, finest spacing {finest:.4g} M, "
            f"finest regions: {regions_text}" + (" (post merger)" if g.post_merger else ""))
    return Notice("refinement_guidance", payload, message=text, group_rows={
        layout.GUIDANCE_UPDATES_GROUP: [update_row], layout.GUIDANCE_BODIES_GROUP: body_rows,
        layout.GUIDANCE_REGIONS_GROUP: region_rows})


def windows_notice(windows: Sequence[DataWindow], valid: tuple[float, float], t: float, it: int,
                   motion: MotionBound, extra_nodes: int) -> Notice:
    """data_windows_wanted for the interval ``valid`` with the rows of ``windows/``."""
    valid_from, valid_until = valid
    payload = pb.DataWindowsWanted(time_m=t, iteration=it, valid_from_m=valid_from, valid_until_m=valid_until,
                                   extra_nodes=extra_nodes, speed_bound=motion.speed_bound,
                                   growth_cap_m=motion.growth_cap)
    rows = []
    for w in windows:
        payload.windows.add(name=w.name, lower_m=vector(w.lower), upper_m=vector(w.upper), reason=w.reason,
                            growth=w.growth)
        rows.append({"iteration": it, "time": t, "valid_from": valid_from, "valid_until": valid_until,
                     "name": w.name, "lower": w.lower, "upper": w.upper, "growth": w.growth,
                     "extra_nodes": extra_nodes, "reason": w.reason})
    volume = sum(float(np.prod(w.upper - w.lower)) for w in windows)
    text = (f"{len(windows)} data window(s) for the next slice, {volume:.4g} M^3 in all; bodies move at most "
            f"{motion.speed_bound:.3g} M/M" + (f", {motion.growth_cap:.3g} M in all" if motion.growth_cap > 0 else "")
            + f" ({motion.reason})")
    return Notice("data_windows_wanted", payload, message=text, group_rows={layout.WINDOWS_GROUP: rows})


def windows_from_wire(w: pb.DataWindowsWanted) -> list[DataWindow]:
    """The windows of an archived data_windows_wanted payload."""
    return [DataWindow(name=x.name, lower=wire_triple(x.lower_m), upper=wire_triple(x.upper_m), reason=x.reason,
                       growth=x.growth) for x in w.windows]


def guidance_regions_from_wire(g: pb.RefinementGuidance) -> RefinementGuidance:
    """The levels' regions of an archived refinement_guidance payload, without the per-body
    detail: what a restarted steering needs to keep merged regions merged (hysteresis)."""
    levels = tuple(
        tuple(LevelRegion(level=r.level, spacing=r.spacing_m, bodies=tuple(r.bodies), centre=wire_triple(r.centre_m),
                          radius=r.radius_m, lower=wire_triple(r.lower_m), upper=wire_triple(r.upper_m),
                          reason=r.reason) for r in level.regions)
        for level in g.levels)
    return RefinementGuidance(valid_from=g.valid_from_m, valid_until=g.valid_until_m, bodies=(), levels=levels,
                              post_merger=g.post_merger, policy=refinement_from_wire(g.policy), reasons=dict(g.reasons))
