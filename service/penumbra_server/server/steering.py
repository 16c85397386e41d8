"""Per-run steering: the run's tracking state and its decisions after each processed slice.

One :class:`RunSteering` per run, owned by the run (``RunRecord.steering``). It reads and keeps
the run's :class:`~penumbra_server.server.surface_state.SurfaceState` s of the bodies and of the
common surface of a pair, and decides, after each slice (:meth:`RunSteering.observe`): when the
common horizon formed, which individual surfaces retire inside it, when a surface's data region
grows (a slice lacked data it needed), and which forecasts, guidance and data windows to
announce. The run's planner (:class:`penumbra_server.server.planning.SteeringPlanner`, the
default) reads it before a slice to place each search.

The numerics are the pure functions of :mod:`penumbra_server.tracking` (forecasts, the
common-horizon watch, guidance, the window rule of :mod:`~penumbra_server.tracking.data_windows`);
puncture tracks are :mod:`~penumbra_server.server.punctures`; events and archive rows are built
by :mod:`~penumbra_server.server._tracking_convert`.

Units: G = c = 1, lengths and times in the run's mass scale M.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import _layout as layout
from ..numerics.shift_sampling import spacing_near
from ..numerics.slices import Slice
from ..tracking import data_windows as rule
from ..tracking.common import CommonSearchAdvice, common_horizon_watch
from ..tracking.forecast import Forecast, forecast_polynomial
from ..tracking.orbit_forecast import forecast_pair
from ..tracking.guidance import RefinementGuidance, guidance_times, refinement_guidance
from ..tracking.motion import SPEED_SAFETY, UNKNOWN_SPEED, MotionBound, forecast_speed_bound, orbit_growth_cap
from ..tracking.windows import DataWindow, merge_overlapping_windows, window_coverage
from ._spec import RunSettings
from ._tracking_convert import (Notice, decode_wire, formed_notice, guidance_notice, guidance_regions_from_wire,
                                track_notice, warning_notice, windows_from_wire, windows_notice)
from .jobs import REASON_NOT_SEARCHED, REASON_OUTSIDE_DATA, SurfaceOutcome
from .punctures import PunctureTracks
from .search import crop_ghost_nodes
from .surface_state import LOST_AFTER_MISSES, SurfaceState

__all__ = ["COMMON_LABEL", "LOST_AFTER_MISSES", "RETIRE_AFTER_MISSES", "Notice", "RunSteering", "SeedForecast",
           "common_label_for"]

#: Label of the common surface of a two-body run (``common_2`` etc. if a body uses it).
COMMON_LABEL = "common"
#: After the common horizon formed, an individual surface missed this many times in a row is
#: no longer searched (it is inside the common horizon; "keep finding them while found").
RETIRE_AFTER_MISSES = 2
#: Slices whose common-search advice is kept (more than the slices a run has in flight).
_ADVICE_KEPT = 8


def common_label_for(body_labels: Sequence[str]) -> str:
    """:data:`COMMON_LABEL`, or a numbered variant that no body uses."""
    label, n = COMMON_LABEL, 1
    while label in body_labels:
        n += 1
        label = f"{COMMON_LABEL}_{n}"
    return label


@dataclass(frozen=True, eq=False)
class SeedForecast:
    """Where the planner expects a surface in a slice: position, uncertainty (M; inf unknown), model."""

    position: np.ndarray
    uncertainty: float
    model: str


class RunSteering:
    """The tracking state of one run (see the module docstring).

    ``states``: the run's surface states (label -> :class:`SurfaceState`); the steering adds
    those of the bodies and of the common surface when missing, and reads only those.
    """

    def __init__(self, settings: RunSettings, *, interpolation_order: int = 4, common_horizon: bool = True,
                 states: dict[str, SurfaceState] | None = None) -> None:
        self.settings = settings
        self.policy = settings.refinement
        self.order = int(interpolation_order)
        self.body_labels: tuple[str, ...] = settings.labels
        #: Label of the pair's common surface; None for other runs or with common_horizon False.
        self.common_label: str | None = (common_label_for(self.body_labels)
                                         if common_horizon and len(self.body_labels) == 2 else None)
        self.states: dict[str, SurfaceState] = states if states is not None else {}
        for b in settings.bodies:
            state = self.states.setdefault(b.label, SurfaceState(b.label))
            state.mass = b.mass
        if self.common_label is not None:
            state = self.states.setdefault(self.common_label, SurfaceState(self.common_label))
            state.mass = sum(b.mass for b in settings.bodies)
        #: The labels the steering tracks: the bodies, then the common surface.
        self.tracked_labels: tuple[str, ...] = self.body_labels + (
            (self.common_label,) if self.common_label is not None else ())
        self.punctures = PunctureTracks(settings, interpolation_order=self.order)
        self.common_searching = False
        self.common_formed: tuple[float, int] | None = None
        self.latest_windows: list[DataWindow] = []
        self.latest_windows_valid: tuple[float, float] = (math.nan, math.nan)
        self.previous_slice_time: float = math.nan
        self.last_slice_time: float = math.nan
        #: The advice per slice time, the latest few (with slices in flight the next slice may be
        #: planned before the one before it is observed: an observer asks for its own slice's).
        self.advice_by_time: dict[float, CommonSearchAdvice] = {}
        #: The guidance issued last: its merged regions stay merged until clear by the policy's
        #: separation margin (tracking.guidance, hysteresis), so regions do not thrash.
        self.last_guidance: RefinementGuidance | None = None

    # -- queries for the planner ------------------------------------------------------------------

    def history(self, label: str) -> SurfaceState | None:
        """The state of a tracked surface (None for labels the steering does not track)."""
        return self.states.get(label) if label in self.tracked_labels else None

    def cadence(self) -> float:
        """Coordinate time between the last two processed slices (0 before two)."""
        if math.isfinite(self.previous_slice_time) and math.isfinite(self.last_slice_time):
            return max(0.0, self.last_slice_time - self.previous_slice_time)
        return 0.0

    def body_masses(self, labels: Sequence[str]) -> tuple[float, ...]:
        """Irreducible masses of the latest finds (the spec's masses where unknown), M."""
        out = []
        for label in labels:
            h = self.states[label]
            m = h.irreducible_mass
            out.append(float(m) if np.isfinite(m) and m > 0 else float(h.mass))
        return tuple(out)

    def forecast_bodies(self, times) -> Forecast | None:
        """Forecast of the expected bodies that have a horizon track (a pair: orbit-aware)."""
        labels = [label for label in self.body_labels if self.states[label].track.count]
        if not labels:
            return None
        tracks = [self.states[label].track for label in labels]
        if len(labels) == 2:
            return forecast_pair(tracks[0], tracks[1], masses=self.body_masses(labels), times=times)
        if len(labels) == 1:
            return forecast_polynomial(tracks[0], times=times)
        parts = [forecast_polynomial(track, times=times) for track in tracks]
        return Forecast(bodies=tuple(labels), times=parts[0].times,
                        positions=np.concatenate([p.positions for p in parts]),
                        uncertainty=np.concatenate([p.uncertainty for p in parts]),
                        model="polynomial" if any(p.model == "polynomial" for p in parts) else "static",
                        reason="each body on its own (more than two bodies): " + "; ".join(p.reason for p in parts),
                        fit_window=(min(p.fit_window[0] for p in parts), max(p.fit_window[1] for p in parts)))

    def forecast_label(self, label: str, times) -> Forecast | None:
        """The forecast covering ``label``: the bodies' forecast, or the common surface's own."""
        if label in self.body_labels:
            return self.forecast_bodies(times)
        h = self.history(label)
        if h is None or not h.track.count:
            return None
        return forecast_polynomial(h.track, times=times)

    def seed_forecast(self, label: str, time: float) -> SeedForecast | None:
        """Where ``label`` is expected at ``time``: the forecast at that time (None if never found)."""
        fc = self.forecast_label(label, [float(time)])
        if fc is None or label not in fc.bodies:
            return None
        return SeedForecast(position=np.array(fc.positions_of(label)[0]),
                            uncertainty=float(fc.uncertainty_of(label)[0]), model=fc.model)

    def reach(self, label: str, uncertainty: float) -> float:
        """Half-width of the data region about a seeded surface (tracking.data_windows), M."""
        h = self.states[label]
        return rule.seeded_reach(h.radius_max, uncertainty, growth=h.growth,
                                 unknown_motion_factor=self.policy.unknown_motion_factor)

    def lost_scan(self, label: str, time: float) -> tuple[np.ndarray, tuple[float, float]]:
        """Scan centre and radii for a lost body: held at its last centroid, the outer radius
        widened by its last speed times the time since it was last found."""
        h = self.states[label]
        gap = max(0.0, float(time) - h.found_time)
        outer = max(2.0 * h.mass, 1.25 * h.radius_max) + h.speed() * gap
        return np.array(h.centroid), (0.1 * h.mass, outer * h.growth_factor)

    def common_advice(self, time: float) -> CommonSearchAdvice | None:
        """:func:`common_horizon_watch` for the pair at ``time`` and one cadence later."""
        if self.common_label is None:
            return None
        a, b = (self.states[label] for label in self.body_labels)
        if a.size() is None or b.size() is None:
            return None
        step = self.cadence()
        times = [float(time), float(time) + step] if step > 0 else [float(time)]
        fc = self.forecast_bodies(times)
        positions = []
        for h in (a, b):
            if h.lost or h.retired_at is not None or fc is None or h.label not in fc.bodies:
                positions.append(np.repeat(np.asarray(h.centroid)[None, :], len(times), axis=0))
            else:
                positions.append(np.array(fc.positions_of(h.label)))
        if all(h.found_time == self.last_slice_time for h in (a, b)):
            # Both found in the latest slice: their separation there is a measured row too (a
            # forecast from sparse, far-apart slices can overshoot an inspiral's separation).
            positions = [np.vstack([p, np.asarray(h.centroid, float)[None, :]]) for p, h in zip(positions, (a, b))]
        already = self.common_searching or self.common_formed is not None
        advice = common_horizon_watch(positions[0], positions[1], radius_a=a.radius_max, radius_b=b.radius_max,
                                      masses=self.body_masses(self.body_labels), already_searching=already)
        self.advice_by_time[float(time)] = advice
        while len(self.advice_by_time) > _ADVICE_KEPT:
            del self.advice_by_time[min(self.advice_by_time)]
        return advice

    # -- observation --------------------------------------------------------------------------------

    def observe(self, slice_: Slice, plans: Sequence, outcomes: Sequence[SurfaceOutcome]) -> list[Notice]:
        """Decide after one processed slice; return its events and archive rows.

        The outcomes are already recorded in the surface states (the run records each as its
        find returns: surface_state.record_outcome). Safe to run on a worker thread (it
        touches only this object, the run's states of its tracked surfaces and the slice).
        """
        t, it = float(slice_.time), int(slice_.iteration)
        # First, so that the cadence used below and by the next plan is t - t_previous.
        self.previous_slice_time, self.last_slice_time = self.last_slice_time, t
        notices: list[Notice] = []
        planned = {plan.label: plan for plan in plans}
        new_points: dict[str, dict] = {}
        for outcome in outcomes:
            h = self.history(outcome.label)
            if h is None:
                continue  # a surface some custom planner added: not tracked
            if outcome.label == self.common_label and planned.get(outcome.label) is not None:
                self.common_searching = True
            if outcome.found:
                new_points[h.label] = {"iteration": it, "time": t, "position": h.centroid.tolist(),
                                       "source": layout.TRACK_SOURCES["horizon"], "uncertainty": 0.0, "order": 0}
            elif outcome.reason == REASON_OUTSIDE_DATA:
                notice = self._missing_data(h, outcome, slice_, t, it)
                if notice is not None:
                    notices.append(notice)
        if self.common_label is not None:
            common = self.states[self.common_label]
            if self.common_formed is None and common.label in new_points:
                self.common_formed = (t, it)
                notices.insert(0, self._formed_notice(common, t, it))
            if self.common_formed is not None:
                for label in self.body_labels:
                    h = self.states[label]
                    if h.retired_at is None and h.misses >= RETIRE_AFTER_MISSES:
                        h.retired_at = (t, it)
        bodies = [self.states[label] for label in self.body_labels]
        punctures, tracking_warnings = self.punctures.advance(bodies, slice_, t, it, new_points)
        notices.extend(tracking_warnings)
        times = guidance_times(t, policy=self.policy, samples=layout.FORECAST_LEADS)
        body_fc = self.forecast_bodies(times)
        track_notices = []
        for label in self.tracked_labels:
            h = self.states[label]
            point, puncture = new_points.get(label), punctures.get(label)
            if point is None and puncture is None:
                continue
            fc = body_fc if label in self.body_labels else self.forecast_label(label, times)
            track_notices.append(track_notice(label, h.track.count, point, puncture, fc, t, it))
        # Order of a slice's events: tracks, common formed, warnings, guidance, windows.
        formed = [n for n in notices if n.kind == "common_horizon_formed"]
        others = [n for n in notices if n.kind != "common_horizon_formed"]
        result = track_notices + formed + others
        guidance = self._guidance(times, body_fc)
        if guidance is not None:
            self.last_guidance = guidance
            sizes = {b.body: self.states[b.body].size() for b in guidance.bodies}
            result.append(guidance_notice(guidance, sizes, t, it))
        windows = self._windows(slice_, times, body_fc)
        if windows:
            self.latest_windows = list(windows)
            self.latest_windows_valid = (float(times[0]), float(times[-1]))
            # extra nodes: the ghost nodes of the server's own crop (search.py)
            result.append(windows_notice(windows, self.latest_windows_valid, t, it, self._motion(times, body_fc),
                                         extra_nodes=crop_ghost_nodes(self.order)))
        return result

    def _missing_data(self, h: SurfaceState, outcome: SurfaceOutcome, slice_: Slice, t: float,
                      it: int) -> Notice | None:
        """A warning when the slice lacked data the surface needed, and the surface's window grown.

        "Lacked": the search for a surface found before ran out of data (finder status "outside
        data"): the slice did not hold all of the window the server asked for, or the surface moved
        or grew beyond it. A search for a surface never found yet that runs off the data (a common
        surface before it exists, a first scan) is a plain not-found: its iterates wander, and a
        warning would only say that the surface does not exist yet.
        """
        if not h.ever_found:
            return None
        coverage, fraction = "", 1.0
        for window in self.latest_windows:
            if h.label in window.name.split("+"):
                fraction = window_coverage(window, slice_.patches)
                coverage = (f"; its data window {np.round(window.lower, 3).tolist()} .. "
                            f"{np.round(window.upper, 3).tolist()} was {100 * fraction:.0f}% covered by the slice")
                break
        grown = h.growth < rule.MAX_GROWTH
        h.growth = min(rule.MAX_GROWTH, h.growth + 1)
        h.finds_since_growth = 0
        text = (f"slice {it} (t = {t:.6g} M) lacked data surface {h.label!r} needs: {outcome.message}{coverage}; "
                + (f"its next data window and search region are grown x{rule.GROWTH_FACTOR:g}" if grown else
                   f"its data window is already grown {rule.MAX_GROWTH} times (x{h.growth_factor:.3g}); send more "
                   f"of the grid around it"))
        return warning_notice(pb.RunWarning.KIND_MISSING_DATA, h.label, text)

    def _formed_notice(self, common: SurfaceState, t: float, it: int) -> Notice:
        a, b = (self.states[label] for label in self.body_labels)
        separation = (float(np.linalg.norm(a.centroid - b.centroid))
                      if a.centroid is not None and b.centroid is not None else math.nan)
        return formed_notice(common.label, self.body_labels, separation, common.irreducible_mass, t, it)

    # -- guidance and windows ----------------------------------------------------------------------------

    def _guidance(self, times: np.ndarray, body_fc: Forecast | None) -> RefinementGuidance | None:
        if self.common_formed is not None:
            common = self.states[self.common_label]
            size = common.size()
            fc = self.forecast_label(self.common_label, times)
            if size is None or fc is None:
                return None
            return refinement_guidance(fc, {common.label: size}, policy=self.policy, post_merger=True,
                                       previous=self.last_guidance)
        if body_fc is None:
            return None
        sizes = {label: self.states[label].size() for label in body_fc.bodies}
        keep = [i for i, label in enumerate(body_fc.bodies) if sizes[label] is not None]
        if not keep:
            return None
        if len(keep) < len(body_fc.bodies):
            body_fc = Forecast(bodies=tuple(body_fc.bodies[i] for i in keep), times=body_fc.times,
                               positions=body_fc.positions[keep], uncertainty=body_fc.uncertainty[keep],
                               model=body_fc.model, reason=body_fc.reason, fit_window=body_fc.fit_window,
                               details=body_fc.details)
        return refinement_guidance(body_fc, {label: sizes[label] for label in body_fc.bodies}, policy=self.policy,
                                   previous=self.last_guidance)

    def _windows(self, slice_: Slice, times: np.ndarray, body_fc: Forecast | None) -> list[DataWindow]:
        """Boxes of data the next slice must hold: the data regions of the next searches plus
        slack (tracking.data_windows), so a cropped slice holds every node the server crops."""
        windows: list[DataWindow] = []
        t_next = float(times[0]) + (self.cadence() or float(times[1] - times[0]))
        unknown = self.policy.unknown_motion_factor
        for label in self.body_labels:
            h = self.states[label]
            if h.retired_at is not None:
                continue
            if not h.ever_found:
                centre = next(b.position for b in self.settings.bodies if b.label == label)
                windows.append(rule.scan_window(label, centre, 2.0 * h.mass,
                                                reason=f"wide scan about the spec position of {label} (never found yet)"))
                continue
            spacing = spacing_near(slice_, h.centroid)
            if body_fc is not None and label in body_fc.bodies:
                windows.append(rule.forecast_path_window(
                    label, f"{label} ({body_fc.model})", body_fc.positions_of(label), body_fc.uncertainty_of(label),
                    radius_max=h.radius_max, growth=h.growth, spacing=spacing, unknown_motion_factor=unknown))
            if h.lost:
                centre, (_, outer) = self.lost_scan(label, t_next)
                windows.append(rule.scan_window(label, centre, outer, spacing=spacing, growth=h.growth,
                                                reason=f"scan about the last centroid of lost body {label}"))
        if self.common_label is not None:
            common = self.states[self.common_label]
            if self.common_formed is not None and common.ever_found and not common.lost:
                fc = self.forecast_label(common.label, times)
                path = np.asarray(fc.positions_of(common.label))
                windows.append(rule.forecast_path_window(
                    common.label, f"the common surface ({fc.model})", path, fc.uncertainty_of(common.label),
                    radius_max=common.radius_max, growth=common.growth,
                    spacing=min(spacing_near(slice_, p) for p in path), unknown_motion_factor=unknown))
            if self.common_formed is None or common.misses > 0:
                advice = self.common_advice(t_next)
                if advice is not None and advice.search:
                    radius = max(advice.radius, common.radius_max) if common.ever_found else advice.radius
                    windows.append(rule.search_window(common.label, advice.centre, radius, growth=common.growth,
                                                      spacing=spacing_near(slice_, advice.centre)))
        return merge_overlapping_windows(windows)

    def _motion(self, times: np.ndarray, body_fc: Forecast | None) -> MotionBound:
        """How fast, and at most how far, the surfaces the windows serve can move (tracking.motion)."""
        if self.common_formed is not None:
            fc = self.forecast_label(self.common_label, times)
            return MotionBound(forecast_speed_bound(fc), 0.0, "the common surface's forecast")
        speeds = [forecast_speed_bound(body_fc)] if body_fc is not None else []
        for label in self.body_labels:
            h = self.states[label]
            if h.retired_at is not None:
                continue
            if body_fc is None or label not in body_fc.bodies:
                speeds.append(UNKNOWN_SPEED)  # never found: no track to bound its motion
            elif h.lost:
                speeds.append(SPEED_SAFETY * h.speed())  # its forecast failed: its last measured speed
        speed = max(speeds) if speeds else UNKNOWN_SPEED
        cap = 0.0
        pair = [self.states[label] for label in self.body_labels]
        if (len(pair) == 2 and body_fc is not None and all(label in body_fc.bodies for label in self.body_labels)
                and not any(h.lost for h in pair)):
            unc = np.asarray(body_fc.uncertainty)
            if np.all(np.isfinite(unc)):
                paths = [np.concatenate([h.track.positions, body_fc.positions_of(h.label)]) for h in pair]
                cap = orbit_growth_cap(paths, self.body_masses(self.body_labels), uncertainty=float(np.max(unc)))
        reason = (f"bodies' forecast ({body_fc.model})" if body_fc is not None else "no forecast yet") + (
            "; cap: the disc the pair's orbit swept" if cap > 0 else "")
        return MotionBound(speed, cap, reason)

    # -- restart ------------------------------------------------------------------------------------------

    def restore(self, surface_reasons: Mapping[str, Sequence[tuple[float, int, int]]],
                tracking_events: Mapping[str, np.ndarray]) -> None:
        """Rebuild the decisions from the archive (server restart); the surface states are
        restored by the run (restore.py).

        ``surface_reasons``: label -> (time, iteration, not-found reason) of each archived
        attempt in commit order. Retirement, the common-horizon formation and the latest windows
        come back; puncture tracks resume as new segments (the shift of earlier slices is not
        archived); window growth restarts.
        """
        for label, rows in surface_reasons.items():
            h = self.history(label)
            if h is None:
                continue
            for time, iteration, reason in rows:
                if reason == REASON_NOT_SEARCHED and h.retired_at is None:
                    h.retired_at = (float(time), int(iteration))
            if label == self.common_label and len(rows):
                self.common_searching = True
        kinds = list(tracking_events.get("kind", []))
        for index, kind in enumerate(kinds):
            if kind == "common_horizon_formed" and self.common_formed is None:
                self.common_formed = (float(tracking_events["time"][index]), int(tracking_events["iteration"][index]))
            if kind == "refinement_guidance":
                self.last_guidance = guidance_regions_from_wire(decode_wire(tracking_events["wire"][index]).refinement_guidance)
            if kind == "data_windows_wanted":
                w = decode_wire(tracking_events["wire"][index]).data_windows_wanted
                self.latest_windows = windows_from_wire(w)
                self.latest_windows_valid = (w.valid_from_m, w.valid_until_m)
