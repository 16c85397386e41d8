"""Per-run steering state: tracks, forecasts, the common-horizon watch, refinement guidance and
data windows, turned into events and archive rows after each processed slice.

One :class:`RunSteering` per run, owned by the run (``RunRecord.steering``). The run's planner
(:class:`penumbra_server.server.planning.SteeringPlanner`, the default) reads it before a slice
to place each search; :meth:`RunSteering.observe` updates it after the slice and returns the
:class:`Notice` s (event payload plus archive rows) the run commits before its
``slice_processed`` event. The numerics are the pure functions of :mod:`penumbra_server.tracking`;
this module only keeps their inputs over time and decides when to call them.

What is kept per surface label (bodies, and the common surface of a pair):

* the horizon track: the area-weighted centroid of every surface found
  (:class:`~penumbra_server.tracking.tracks.Track`, source "horizon");
* the puncture track, when the run declares a moving-puncture shift gauge
  (``RunSettings.tracks_punctures``; any other shift, e.g. a Kerr-Schild one, does not follow a
  puncture and is ignored for tracking, with one warning when no gauge was declared) and slices
  carry shift_x/y/z: started at the first horizon centroid found in a slice with a shift and
  advanced between consecutive such slices by
  :func:`~penumbra_server.tracking.tracks.advance_puncture_track` (d x^i / dt = -beta^i;
  Campanelli et al., PRL 96, 111101 (2006); Baker et al., PRL 96, 111102 (2006)). The shift is
  interpolated in space by 4th-order Lagrange interpolation (error O(h^4)) from the finest patch
  covering the stencil, and in time linearly (two slices: Heun step, global error O(dt^2) at the
  slice cadence dt) or quadratically (three slices: third-order Runge-Kutta, O(dt^3)). A slice
  without the shift, or a step the data cannot serve, restarts the track at the next centroid
  (a new segment; its starting offset from the true puncture is not known, so the stated
  uncertainty counts the integration error since the segment began);
* the latest surface found, its largest coordinate radius and smallest coordinate diameter,
  consecutive misses, and how many times its data window has been grown.

Units: G = c = 1, lengths and times in the run's mass scale M.
"""

from __future__ import annotations

import base64
import json
import math
from collections import deque
from dataclasses import dataclass, field
from typing import Callable, Mapping, Sequence

import numpy as np

from penumbra_shim._wire import horizons_pb2 as pb

from ..archive import _layout as layout
from ..numerics.interpolation import lagrange_weights
from ..numerics.slices import Slice
from ..numerics.surfaces import Surface, degree_of_index, harmonic_values
from ..tracking.common import CommonSearchAdvice, common_horizon_watch
from ..tracking.forecast import Forecast, forecast_pair, forecast_polynomial
from ..tracking.guidance import HorizonSize, RefinementGuidance, guidance_times, refinement_guidance
from ..tracking.motion import SPEED_SAFETY, UNKNOWN_SPEED, MotionBound, forecast_speed_bound, orbit_growth_cap
from ..tracking.tracks import ShiftSample, Track, TrackError, advance_puncture_track
from ..tracking.windows import DataWindow, merge_overlapping_windows, window_coverage
from ._convert import vector
from ._spec import RunSettings, refinement_to_wire
from .jobs import REASON_NOT_SEARCHED, REASON_OUTSIDE_DATA, SurfaceOutcome

__all__ = [
    "COMMON_LABEL",
    "Notice",
    "RunSteering",
    "SurfaceHistory",
    "common_label_for",
    "shift_field",
    "smallest_diameter",
    "BOX_FACTOR",
    "SEARCH_BOX_FACTOR",
    "WINDOW_SLACK_POINTS",
    "GROWTH_FACTOR",
]

#: Label of the common surface of a two-body run (``common_2`` etc. if a body uses it).
COMMON_LABEL = "common"
#: Data region about a seeded surface: its largest coordinate radius times this (a margin for
#: growth and distortion between slices), plus the forecast uncertainty. The data windows use
#: the same reach, so a slice cropped to them holds every node the server's own crop takes.
BOX_FACTOR = 1.6
#: Data region of a common-surface search from the sphere enclosing both horizons (not yet found,
#: or lost): the sphere's radius times this. The sphere already clears both horizons by 10 %
#: (tracking.common); Newton from it moves inward to the common surface when one exists.
SEARCH_BOX_FACTOR = 1.25
#: Windows are grown by this many finest grid points beyond that reach (slack for the search).
WINDOW_SLACK_POINTS = 2
#: Half-width factor applied to a surface's data region and window each time a slice lacked
#: data the surface needed (compounding; at most :data:`MAX_GROWTH` times).
GROWTH_FACTOR = 1.5
MAX_GROWTH = 4
#: Finds in a row after which one growth step is taken back.
_FINDS_PER_SHRINK = 3
#: Misses in a row after which a body counts as lost (held at its last centroid, wide scan).
LOST_AFTER_MISSES = 2
#: After the common horizon formed, an individual surface missed this many times in a row is
#: no longer searched (it is inside the common horizon; "keep finding them while found").
RETIRE_AFTER_MISSES = 2
#: The uncertainty margin of a data region is capped at this many horizon radii (a noisy
#: forecast must not make every crop the whole grid; the scan fallback still covers the rest).
_UNCERTAINTY_CAP_RADII = 3.0
_SHIFT_NAMES = ("shift_x", "shift_y", "shift_z")
_MODEL_WIRE = {"static": pb.PositionForecast.MODEL_STATIC, "polynomial": pb.PositionForecast.MODEL_POLYNOMIAL,
               "orbit": pb.PositionForecast.MODEL_ORBIT}


def common_label_for(body_labels: Sequence[str]) -> str:
    """:data:`COMMON_LABEL`, or a numbered variant that no body uses."""
    label, n = COMMON_LABEL, 1
    while label in body_labels:
        n += 1
        label = f"{COMMON_LABEL}_{n}"
    return label


# -- small numerics ----------------------------------------------------------------------------


def smallest_diameter(surface: Surface, *, samples: int | None = None) -> float:
    """Smallest coordinate diameter h(n) + h(-n) of a star-shaped surface through its centre, M.

    For real harmonics Y_lm(-n) = (-1)^l Y_lm(n), so h(n) + h(-n) = 2 sum over even l of
    a_lm Y_lm(n); it is minimised over a grid of ``samples`` x 2 ``samples`` directions
    (default 4 (l_max + 2)).
    """
    n_theta = int(samples or 4 * (surface.lmax + 2))
    theta = (np.arange(n_theta) + 0.5) * np.pi / n_theta
    phi = (np.arange(2 * n_theta) + 0.5) * np.pi / n_theta
    tt, pp = np.meshgrid(theta, phi, indexing="ij")
    values = harmonic_values(surface.lmax, tt.ravel(), pp.ravel())
    even = (degree_of_index(surface.lmax) % 2 == 0).astype(float)
    return float(np.min(2.0 * values @ (surface.coefficients * even)))


@dataclass(frozen=True, eq=False)
class _ShiftBlock:
    origin: np.ndarray
    spacing: np.ndarray
    values: np.ndarray  # (3, nx, ny, nz)


def shift_field(slice_: Slice, lower, upper, *, order: int = 4) -> Callable[[np.ndarray], np.ndarray] | None:
    """The shift of ``slice_`` in the box [lower, upper] as a callable points (N, 3) -> (N, 3).

    Each patch carrying shift_x/y/z is cut to the box plus the stencil (copied, so the slice
    can be released); a point is served by the finest patch whose ``order``-node Lagrange stencil
    fits inside the cut (interpolation error O(h^order)); points no patch serves give NaN.
    Returns None when no patch carries the shift inside the box.
    """
    lower = np.asarray(lower, float)
    upper = np.asarray(upper, float)
    blocks = []
    for patch in sorted(slice_.patches, key=lambda p: -p.level):
        if not all(name in patch.fields for name in _SHIFT_NAMES):
            continue
        n = np.asarray(patch.shape)
        first = np.clip(np.floor((lower - patch.origin) / patch.spacing).astype(int) - order, 0, n - 1)
        last = np.clip(np.ceil((upper - patch.origin) / patch.spacing).astype(int) + order, 0, n - 1)
        if np.any(last - first + 1 < order):
            continue
        cut = tuple(slice(int(a), int(b) + 1) for a, b in zip(first, last))
        values = np.stack([np.asarray(patch.fields[name])[cut] for name in _SHIFT_NAMES])
        blocks.append(_ShiftBlock(patch.origin + first * patch.spacing, patch.spacing.copy(), values))
    if not blocks:
        return None
    half = order // 2

    def shift(points) -> np.ndarray:
        pts = np.atleast_2d(np.asarray(points, float))
        out = np.full((pts.shape[0], 3), np.nan)
        todo = np.ones(pts.shape[0], bool)
        for block in blocks:
            if not todo.any():
                break
            size = np.asarray(block.values.shape[1:])
            s = (pts - block.origin) / block.spacing
            base = np.floor(s).astype(int) - (half - 1)
            fits = todo & np.all(base >= 0, axis=1) & np.all(base + order <= size, axis=1)
            for index in np.nonzero(fits)[0]:
                b = base[index]
                w = [lagrange_weights(np.array([s[index, a] - b[a]]), order)[0] for a in range(3)]
                cube = block.values[:, b[0]:b[0] + order, b[1]:b[1] + order, b[2]:b[2] + order]
                out[index] = np.einsum("cijk,i,j,k->c", cube, w[0], w[1], w[2])
            todo &= ~fits
        return out

    return shift


def _spacing_near(slice_: Slice, point) -> float:
    """Largest spacing component of the finest patch containing ``point`` (else the finest), M."""
    p = np.asarray(point, float)
    best = None
    for patch in slice_.patches:
        inside = np.all(p >= patch.origin) and np.all(p <= patch.upper)
        if inside and (best is None or patch.level > best.level):
            best = patch
    if best is None:
        return float(min(np.max(patch.spacing) for patch in slice_.patches))
    return float(np.max(best.spacing))


# -- state ---------------------------------------------------------------------------------------


@dataclass
class SurfaceHistory:
    """What the run keeps about one surface label (mutated by :class:`RunSteering` only)."""

    label: str
    mass: float
    track: Track
    puncture: Track | None = None
    puncture_order: int = 0
    shift_samples: deque = field(default_factory=lambda: deque(maxlen=3))
    surface: Surface | None = None
    centroid: np.ndarray | None = None
    found_time: float = float("nan")
    found_iteration: int = -1
    radius_max: float = float("nan")
    min_diameter: float = float("nan")
    irreducible_mass: float = float("nan")
    misses: int = 0
    growth: int = 0
    finds_since_growth: int = 0
    retired_at: tuple[float, int] | None = None

    @property
    def ever_found(self) -> bool:
        return self.surface is not None

    @property
    def lost(self) -> bool:
        return self.ever_found and self.misses >= LOST_AFTER_MISSES

    @property
    def growth_factor(self) -> float:
        return GROWTH_FACTOR ** self.growth

    def size(self) -> HorizonSize | None:
        if not self.ever_found or not (np.isfinite(self.radius_max) and self.radius_max > 0):
            return None
        diameter = self.min_diameter if np.isfinite(self.min_diameter) and self.min_diameter > 0 else self.radius_max
        return HorizonSize(max_radius=self.radius_max, min_diameter=min(diameter, 2.0 * self.radius_max))

    def speed(self) -> float:
        """Coordinate speed between the last two horizon points (0 with fewer), M per M."""
        if self.track.count < 2:
            return 0.0
        dt = float(self.track.times[-1] - self.track.times[-2])
        return float(np.linalg.norm(self.track.positions[-1] - self.track.positions[-2]) / dt) if dt > 0 else 0.0


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


@dataclass(frozen=True, eq=False)
class SeedForecast:
    """Where the planner expects a surface in a slice: position, uncertainty (M; inf unknown), model."""

    position: np.ndarray
    uncertainty: float
    model: str


class RunSteering:
    """The tracking state of one run (see the module docstring)."""

    def __init__(self, settings: RunSettings, *, interpolation_order: int = 4, common_horizon: bool = True) -> None:
        self.settings = settings
        self.policy = settings.refinement
        self.order = int(interpolation_order)
        self.body_labels: tuple[str, ...] = settings.labels
        #: Label of the pair's common surface; None for other runs or with common_horizon False.
        self.common_label: str | None = (common_label_for(self.body_labels)
                                         if common_horizon and len(self.body_labels) == 2 else None)
        self.histories: dict[str, SurfaceHistory] = {
            b.label: SurfaceHistory(b.label, b.mass, Track.empty(b.label)) for b in settings.bodies
        }
        if self.common_label is not None:
            total = sum(b.mass for b in settings.bodies)
            self.histories[self.common_label] = SurfaceHistory(self.common_label, total, Track.empty(self.common_label))
        self.common_searching = False
        #: Whether the run was told once that its shift is ignored for tracking (no gauge declared).
        self.shift_ignored_told = False
        self.common_formed: tuple[float, int] | None = None
        self.latest_windows: list[DataWindow] = []
        self.latest_windows_valid: tuple[float, float] = (math.nan, math.nan)
        self.previous_slice_time: float = math.nan
        self.last_slice_time: float = math.nan
        self.last_advice: CommonSearchAdvice | None = None

    # -- queries for the planner ------------------------------------------------------------------

    def history(self, label: str) -> SurfaceHistory | None:
        return self.histories.get(label)

    @property
    def tracked_labels(self) -> tuple[str, ...]:
        return tuple(self.histories)

    def cadence(self) -> float:
        """Coordinate time between the last two processed slices (0 before two)."""
        if math.isfinite(self.previous_slice_time) and math.isfinite(self.last_slice_time):
            return max(0.0, self.last_slice_time - self.previous_slice_time)
        return 0.0

    def body_masses(self, labels: Sequence[str]) -> tuple[float, ...]:
        """Irreducible masses of the latest finds (the spec's masses where unknown), M."""
        out = []
        for label in labels:
            h = self.histories[label]
            m = h.irreducible_mass
            out.append(float(m) if np.isfinite(m) and m > 0 else float(h.mass))
        return tuple(out)

    def forecast_bodies(self, times) -> Forecast | None:
        """Forecast of the expected bodies that have a horizon track (a pair: orbit-aware)."""
        labels = [label for label in self.body_labels if self.histories[label].track.count]
        if not labels:
            return None
        tracks = [self.histories[label].track for label in labels]
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
        h = self.histories.get(label)
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
        """Half-width of the data region about a seeded surface (see :data:`BOX_FACTOR`), M."""
        h = self.histories[label]
        r = h.radius_max
        if np.isfinite(uncertainty):
            u = min(float(uncertainty), _UNCERTAINTY_CAP_RADII * r)
        else:
            u = self.policy.unknown_motion_factor * r
        return h.growth_factor * BOX_FACTOR * r + u

    def lost_scan(self, label: str, time: float) -> tuple[np.ndarray, tuple[float, float]]:
        """Scan centre and radii for a lost body: held at its last centroid, the outer radius
        widened by its last speed times the time since it was last found."""
        h = self.histories[label]
        gap = max(0.0, float(time) - h.found_time)
        outer = max(2.0 * h.mass, 1.25 * h.radius_max) + h.speed() * gap
        return np.array(h.centroid), (0.1 * h.mass, outer * h.growth_factor)

    def common_advice(self, time: float) -> CommonSearchAdvice | None:
        """:func:`common_horizon_watch` for the pair at ``time`` and one cadence later."""
        if self.common_label is None:
            return None
        a, b = (self.histories[label] for label in self.body_labels)
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
        already = self.common_searching or self.common_formed is not None
        advice = common_horizon_watch(positions[0], positions[1], radius_a=a.radius_max, radius_b=b.radius_max,
                                      masses=self.body_masses(self.body_labels), already_searching=already)
        self.last_advice = advice
        return advice

    # -- observation --------------------------------------------------------------------------------

    def observe(self, slice_: Slice, plans: Sequence, outcomes: Sequence[SurfaceOutcome]) -> list[Notice]:
        """Update the state with one processed slice; return its events and archive rows.

        Safe to run on a worker thread (it touches only this object and the slice).
        """
        t, it = float(slice_.time), int(slice_.iteration)
        # First, so that the cadence used below and by the next plan is t - t_previous.
        self.previous_slice_time, self.last_slice_time = self.last_slice_time, t
        notices: list[Notice] = []
        planned = {plan.label: plan for plan in plans}
        new_points: dict[str, dict] = {}
        for outcome in outcomes:
            h = self.histories.get(outcome.label)
            if h is None:
                continue  # a surface some custom planner added: not tracked
            if outcome.label == self.common_label and planned.get(outcome.label) is not None:
                self.common_searching = True
            if outcome.found:
                new_points[h.label] = self._record_found(h, outcome, t, it)
            elif outcome.reason != REASON_NOT_SEARCHED:
                h.misses += 1
                if outcome.reason == REASON_OUTSIDE_DATA:
                    notice = self._missing_data_notice(h, outcome, slice_, t, it)
                    if notice is not None:
                        notices.append(notice)
        if self.common_label is not None:
            common = self.histories[self.common_label]
            if self.common_formed is None and common.label in new_points:
                self.common_formed = (t, it)
                notices.insert(0, self._formed_notice(common, t, it))
            if self.common_formed is not None:
                for label in self.body_labels:
                    h = self.histories[label]
                    if h.retired_at is None and h.misses >= RETIRE_AFTER_MISSES:
                        h.retired_at = (t, it)
        punctures, tracking_warnings = self._advance_punctures(slice_, t, it, new_points)
        notices.extend(tracking_warnings)
        times = guidance_times(t, policy=self.policy, samples=layout.FORECAST_LEADS)
        body_fc = self.forecast_bodies(times)
        track_notices = []
        for label, h in self.histories.items():
            point, puncture = new_points.get(label), punctures.get(label)
            if point is None and puncture is None:
                continue
            fc = body_fc if label in self.body_labels else self.forecast_label(label, times)
            track_notices.append(self._track_notice(h, point, puncture, fc, t, it))
        # Order of a slice's events: tracks, common formed, warnings, guidance, windows.
        formed = [n for n in notices if n.kind == "common_horizon_formed"]
        others = [n for n in notices if n.kind != "common_horizon_formed"]
        result = track_notices + formed + others
        guidance = self._guidance(times, body_fc)
        if guidance is not None:
            result.append(self._guidance_notice(guidance, t, it))
        windows = self._windows(slice_, times, body_fc, guidance)
        if windows:
            result.append(self._windows_notice(windows, times, t, it, self._motion(times, body_fc)))
        return result

    def _record_found(self, h: SurfaceHistory, outcome: SurfaceOutcome, t: float, it: int) -> dict:
        q = outcome.quantities
        surface = Surface(outcome.centre, outcome.lmax, outcome.coefficients)
        centroid = np.asarray(q.get("centroid", outcome.centre), float)
        if not np.all(np.isfinite(centroid)):
            centroid = np.asarray(outcome.centre, float)
        radius_max = float(q.get("radius_max", math.nan))
        if not (np.isfinite(radius_max) and radius_max > 0):
            radius_max = 1.5 * surface.mean_radius
        h.surface = surface
        h.centroid = centroid
        h.found_time, h.found_iteration = t, it
        h.radius_max = radius_max
        h.min_diameter = smallest_diameter(surface)
        h.irreducible_mass = float(q.get("irreducible_mass", math.nan))
        h.misses = 0
        if h.growth:
            h.finds_since_growth += 1
            if h.finds_since_growth >= _FINDS_PER_SHRINK:
                h.growth -= 1
                h.finds_since_growth = 0
        if h.track.count == 0 or t > h.track.latest_time:
            h.track = h.track.append(t, centroid)
        return {"iteration": it, "time": t, "position": centroid.tolist(),
                "source": layout.TRACK_SOURCES["horizon"], "uncertainty": 0.0, "order": 0}

    def _missing_data_notice(self, h: SurfaceHistory, outcome: SurfaceOutcome, slice_: Slice, t: float,
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
        grown = h.growth < MAX_GROWTH
        h.growth = min(MAX_GROWTH, h.growth + 1)
        h.finds_since_growth = 0
        text = (f"slice {it} (t = {t:.6g} M) lacked data surface {h.label!r} needs: {outcome.message}{coverage}; "
                + (f"its next data window and search region are grown x{GROWTH_FACTOR:g}" if grown else
                   f"its data window is already grown {MAX_GROWTH} times (x{h.growth_factor:.3g}); send more "
                   f"of the grid around it"))
        payload = pb.RunWarning(kind=pb.RunWarning.KIND_MISSING_DATA, label=h.label, message=text)
        return Notice("warning", payload, label=h.label, message=text)

    def _formed_notice(self, common: SurfaceHistory, t: float, it: int) -> Notice:
        a, b = (self.histories[label] for label in self.body_labels)
        separation = (float(np.linalg.norm(a.centroid - b.centroid))
                      if a.centroid is not None and b.centroid is not None else math.nan)
        area = 16.0 * math.pi * common.irreducible_mass ** 2 if np.isfinite(common.irreducible_mass) else math.nan
        payload = pb.CommonHorizonFormed(label=common.label, body_labels=list(self.body_labels),
                                         separation_m=separation, irreducible_mass_m=common.irreducible_mass,
                                         area_m2=area)
        text = (f"common horizon {common.label!r} first found at t = {t:.6g} M (iteration {it}), bodies "
                f"{separation:.4g} M apart, M_irr = {common.irreducible_mass:.6g} M")
        return Notice("common_horizon_formed", payload, label=common.label, message=text)

    # -- punctures ------------------------------------------------------------------------------------

    def _advance_punctures(self, slice_: Slice, t: float, it: int,
                           new_points: Mapping[str, dict]) -> tuple[dict[str, dict], list[Notice]]:
        carries_shift = any(all(n in p.fields for n in _SHIFT_NAMES) for p in slice_.patches)
        points: dict[str, dict] = {}
        warnings: list[Notice] = []
        if carries_shift and not self.settings.tracks_punctures:
            if self.settings.shift_gauge == "unspecified" and not self.shift_ignored_told:
                self.shift_ignored_told = True
                text = ("the slices carry the shift, but the run spec declares no shift gauge: puncture tracks are "
                        "integrated only for a moving-puncture shift (SHIFT_GAUGE_MOVING_PUNCTURE); the shift is "
                        "not used for tracking")
                warnings.append(Notice("warning", pb.RunWarning(kind=pb.RunWarning.KIND_TRACKING, label="",
                                                                message=text), label="", message=text))
            carries_shift = False  # e.g. a Kerr-Schild shift: it does not follow a puncture
        for label in self.body_labels:
            h = self.histories[label]
            if not carries_shift:
                h.shift_samples.clear()
                continue
            anchor = h.puncture.latest_position if h.puncture is not None and h.puncture.count else h.centroid
            if anchor is None:
                continue
            half = 2.0 * h.radius_max if np.isfinite(h.radius_max) else 2.0 * h.mass
            field_ = shift_field(slice_, anchor - half, anchor + half, order=self.order)
            if field_ is None:
                h.shift_samples.clear()
                continue
            sample = ShiftSample(t, field_)
            previous = h.shift_samples[-1].time if h.shift_samples else math.nan
            consecutive = (h.puncture is not None and h.puncture.count and
                           np.isclose(h.puncture.latest_time, previous, rtol=0, atol=1e-9 * max(1.0, abs(previous))))
            h.shift_samples.append(sample)
            if consecutive:
                samples = list(h.shift_samples)
                try:
                    h.puncture, step = advance_puncture_track(h.puncture, samples[-3:] if len(samples) >= 3 else samples[-2:])
                except TrackError as exc:
                    text = (f"puncture track of {label!r} not advanced to t = {t:.6g} M: {exc}; it restarts from the "
                            f"next horizon centroid")
                    warnings.append(Notice("warning", pb.RunWarning(kind=pb.RunWarning.KIND_TRACKING, label=label,
                                                                    message=text), label=label, message=text))
                    h.puncture = None
                    h.shift_samples.clear()
                    h.shift_samples.append(sample)
                    continue
                h.puncture_order = step.order
                points[label] = {"iteration": it, "time": t, "position": step.position.tolist(),
                                 "source": layout.TRACK_SOURCES["puncture"],
                                 "uncertainty": float(h.puncture.point_uncertainty()[-1]), "order": step.order,
                                 "method": step.method}
            elif label in new_points:
                # A new segment starts at the horizon centroid of this slice.
                start = np.asarray(new_points[label]["position"], float)
                if h.puncture is not None and h.puncture.count and t > h.puncture.latest_time:
                    h.puncture = h.puncture.append(t, start, uncertainty=0.0)
                else:
                    h.puncture = Track(body=label, times=[t], positions=[start], uncertainty=[0.0], source="puncture")
                h.puncture_order = 0
                h.shift_samples.clear()
                h.shift_samples.append(sample)
                points[label] = {"iteration": it, "time": t, "position": start.tolist(),
                                 "source": layout.TRACK_SOURCES["puncture"], "uncertainty": 0.0, "order": 0,
                                 "method": "start"}
            else:
                h.shift_samples.clear()
        return points, warnings

    # -- notices ---------------------------------------------------------------------------------------

    def _track_notice(self, h: SurfaceHistory, point: dict | None, puncture: dict | None, fc: Forecast | None,
                      t: float, it: int) -> Notice:
        payload = pb.TrackUpdated(label=h.label, horizon_points=h.track.count)
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
        rows[f"{layout.TRACKS_GROUP}/{h.label}"] = track_rows
        summary = f"track {h.label!r}: {h.track.count} horizon point(s)"
        if fc is not None and h.label in fc.bodies:
            positions, unc = fc.positions_of(h.label), fc.uncertainty_of(h.label)
            payload.forecast.CopyFrom(pb.PositionForecast(
                model=_MODEL_WIRE.get(fc.model, pb.PositionForecast.MODEL_UNSPECIFIED), reason=fc.reason,
                times_m=[float(v) for v in fc.times], positions_m=[vector(p) for p in positions],
                uncertainty_m=[float(u) for u in unc], fit_from_m=fc.fit_window[0], fit_until_m=fc.fit_window[1]))
            rows[f"{layout.FORECASTS_GROUP}/{h.label}"] = [{
                "iteration": it, "time": t, "model": layout.FORECAST_MODELS.get(fc.model, 0),
                "fit_from": fc.fit_window[0], "fit_until": fc.fit_window[1], "lead_time": np.asarray(fc.times),
                "position": np.asarray(positions), "uncertainty": np.asarray(unc), "reason": fc.reason,
            }]
            summary += f"; {fc.model} forecast, uncertainty at the interval's end {float(unc[-1]):.3g} M"
        return Notice("track_updated", payload, label=h.label, message=summary, group_rows=rows)

    # -- guidance and windows ----------------------------------------------------------------------------

    def _guidance(self, times: np.ndarray, body_fc: Forecast | None) -> RefinementGuidance | None:
        if self.common_formed is not None:
            common = self.histories[self.common_label]
            size = common.size()
            fc = self.forecast_label(self.common_label, times)
            if size is None or fc is None:
                return None
            return refinement_guidance(fc, {common.label: size}, policy=self.policy, post_merger=True)
        if body_fc is None:
            return None
        sizes = {label: self.histories[label].size() for label in body_fc.bodies}
        keep = [i for i, label in enumerate(body_fc.bodies) if sizes[label] is not None]
        if not keep:
            return None
        if len(keep) < len(body_fc.bodies):
            body_fc = Forecast(bodies=tuple(body_fc.bodies[i] for i in keep), times=body_fc.times,
                               positions=body_fc.positions[keep], uncertainty=body_fc.uncertainty[keep],
                               model=body_fc.model, reason=body_fc.reason, fit_window=body_fc.fit_window,
                               details=body_fc.details)
        return refinement_guidance(body_fc, {label: sizes[label] for label in body_fc.bodies}, policy=self.policy)

    def _guidance_notice(self, g: RefinementGuidance, t: float, it: int) -> Notice:
        payload = pb.RefinementGuidance(time_m=t, iteration=it, valid_from_m=g.valid_from, valid_until_m=g.valid_until,
                                        post_merger=g.post_merger, policy=refinement_to_wire(g.policy),
                                        reasons=dict(g.reasons))
        body_rows, region_rows = [], []
        for b in g.bodies:
            size = self.histories[b.body].size()
            entry = payload.bodies.add(
                label=b.body, centre_m=vector(b.centre), finest_level=b.finest_level,
                radii_m=[float(r) for r in b.radii], spacings_m=[float(h) for h in b.spacings],
                lower_m=[vector(v) for v in b.lower], upper_m=[vector(v) for v in b.upper],
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

    def _windows(self, slice_: Slice, times: np.ndarray, body_fc: Forecast | None,
                 guidance: RefinementGuidance | None) -> list[DataWindow]:
        """Boxes of data the next slice must hold (module docstring of tracking.windows; here each
        box is grown by the planner's own reach so a cropped slice holds every node it crops)."""
        windows: list[DataWindow] = []
        t_next = float(times[0]) + (self.cadence() or float(times[1] - times[0]))
        for label in self.body_labels:
            h = self.histories[label]
            if h.retired_at is not None:
                continue
            if not h.ever_found:
                centre = np.asarray(next(b.position for b in self.settings.bodies if b.label == label), float)
                half = 1.25 * 2.0 * h.mass
                windows.append(DataWindow(name=label, lower=centre - half, upper=centre + half,
                                          reason=f"wide scan about the spec position of {label} (never found yet)"))
                continue
            spacing = _spacing_near(slice_, h.centroid)
            slack = WINDOW_SLACK_POINTS * spacing
            if body_fc is not None and label in body_fc.bodies:
                path = body_fc.positions_of(label)
                unc = body_fc.uncertainty_of(label)
                u = float(np.max(unc)) if np.all(np.isfinite(unc)) else self.policy.unknown_motion_factor * h.radius_max
                u = min(u, _UNCERTAINTY_CAP_RADII * h.radius_max)
                grow = h.growth_factor * BOX_FACTOR * h.radius_max + u + slack
                windows.append(DataWindow(
                    name=label, lower=path.min(axis=0) - grow, upper=path.max(axis=0) + grow,
                    reason=(f"forecast path of {label} ({body_fc.model}) grown by {h.growth_factor * BOX_FACTOR:.3g} x "
                            f"r_max {h.radius_max:.4g} + uncertainty {u:.4g} + {WINDOW_SLACK_POINTS} x "
                            f"{spacing:.4g} M"), growth=h.growth))
            if h.lost:
                centre, (_, outer) = self.lost_scan(label, t_next)
                half = 1.25 * outer + slack
                windows.append(DataWindow(name=label, lower=centre - half, upper=centre + half,
                                          reason=f"scan about the last centroid of lost body {label}", growth=h.growth))
        if self.common_label is not None:
            common = self.histories[self.common_label]
            if self.common_formed is not None and common.ever_found and not common.lost:
                fc = self.forecast_label(common.label, times)
                path = np.asarray(fc.positions_of(common.label))
                unc = fc.uncertainty_of(common.label)
                u = (float(np.max(unc)) if np.all(np.isfinite(unc))
                     else self.policy.unknown_motion_factor * common.radius_max)
                u = min(u, _UNCERTAINTY_CAP_RADII * common.radius_max)
                spacing = min(_spacing_near(slice_, p) for p in path)
                grow = common.growth_factor * BOX_FACTOR * common.radius_max + u + WINDOW_SLACK_POINTS * spacing
                windows.append(DataWindow(
                    name=common.label, lower=path.min(axis=0) - grow, upper=path.max(axis=0) + grow,
                    reason=(f"forecast path of the common surface ({fc.model}) grown by "
                            f"{common.growth_factor * BOX_FACTOR:.3g} x r_max {common.radius_max:.4g} + uncertainty "
                            f"{u:.4g} + {WINDOW_SLACK_POINTS} x {spacing:.4g} M"), growth=common.growth))
            if self.common_formed is None or common.misses > 0:
                advice = self.common_advice(t_next)
                if advice is not None and advice.search:
                    radius = max(advice.radius, common.radius_max) if common.ever_found else advice.radius
                    spacing = _spacing_near(slice_, advice.centre)
                    grow = common.growth_factor * SEARCH_BOX_FACTOR * radius + WINDOW_SLACK_POINTS * spacing
                    windows.append(DataWindow(
                        name=common.label, lower=advice.centre - grow, upper=advice.centre + grow,
                        reason=(f"common-surface search: the guess sphere about the pair's centre grown by "
                                f"{common.growth_factor * SEARCH_BOX_FACTOR:.3g} x radius {radius:.4g} + "
                                f"{WINDOW_SLACK_POINTS} x {spacing:.4g} M"), growth=common.growth))
        return merge_overlapping_windows(windows)

    def _motion(self, times: np.ndarray, body_fc: Forecast | None) -> MotionBound:
        """How fast, and at most how far, the surfaces the windows serve can move (tracking.motion)."""
        if self.common_formed is not None:
            fc = self.forecast_label(self.common_label, times)
            return MotionBound(forecast_speed_bound(fc), 0.0, "the common surface's forecast")
        speeds = [forecast_speed_bound(body_fc)] if body_fc is not None else []
        for label in self.body_labels:
            h = self.histories[label]
            if h.retired_at is not None:
                continue
            if body_fc is None or label not in body_fc.bodies:
                speeds.append(UNKNOWN_SPEED)  # never found: no track to bound its motion
            elif h.lost:
                speeds.append(SPEED_SAFETY * h.speed())  # its forecast failed: its last measured speed
        speed = max(speeds) if speeds else UNKNOWN_SPEED
        cap = 0.0
        pair = [self.histories[label] for label in self.body_labels]
        if (len(pair) == 2 and body_fc is not None and all(label in body_fc.bodies for label in self.body_labels)
                and not any(h.lost for h in pair)):
            unc = np.asarray(body_fc.uncertainty)
            if np.all(np.isfinite(unc)):
                paths = [np.concatenate([h.track.positions, body_fc.positions_of(h.label)]) for h in pair]
                cap = orbit_growth_cap(paths, self.body_masses(self.body_labels), uncertainty=float(np.max(unc)))
        reason = (f"bodies' forecast ({body_fc.model})" if body_fc is not None else "no forecast yet") + (
            "; cap: the disc the pair's orbit swept" if cap > 0 else "")
        return MotionBound(speed, cap, reason)

    def _windows_notice(self, windows: list[DataWindow], times: np.ndarray, t: float, it: int,
                        motion: MotionBound) -> Notice:
        valid_from, valid_until = float(times[0]), float(times[-1])
        extra = self.order + 2  # the ghost nodes of the server's own crop (runs.RunRecord._find)
        payload = pb.DataWindowsWanted(time_m=t, iteration=it, valid_from_m=valid_from, valid_until_m=valid_until,
                                       extra_nodes=extra, speed_bound=motion.speed_bound,
                                       growth_cap_m=motion.growth_cap)
        rows = []
        for w in windows:
            payload.windows.add(name=w.name, lower_m=vector(w.lower), upper_m=vector(w.upper), reason=w.reason,
                                growth=w.growth)
            rows.append({"iteration": it, "time": t, "valid_from": valid_from, "valid_until": valid_until,
                         "name": w.name, "lower": w.lower, "upper": w.upper, "growth": w.growth,
                         "extra_nodes": extra, "reason": w.reason})
        self.latest_windows = list(windows)
        self.latest_windows_valid = (valid_from, valid_until)
        volume = sum(float(np.prod(w.upper - w.lower)) for w in windows)
        text = (f"{len(windows)} data window(s) for the next slice, {volume:.4g} M^3 in all; bodies move at most "
                f"{motion.speed_bound:.3g} M/M" + (f", {motion.growth_cap:.3g} M in all" if motion.growth_cap > 0 else "")
                + f" ({motion.reason})")
        return Notice("data_windows_wanted", payload, message=text, group_rows={layout.WINDOWS_GROUP: rows})

    # -- restart ------------------------------------------------------------------------------------------

    def restore(self, surfaces: Mapping[str, Mapping[str, np.ndarray]],
                tracking_events: Mapping[str, np.ndarray]) -> None:
        """Rebuild the state from archived surface rows and tracking events (server restart).

        Horizon tracks, latest surfaces, misses and retirement come back; puncture tracks resume
        as new segments (the shift of earlier slices is not archived); window growth restarts.
        """
        for label, cols in surfaces.items():
            h = self.histories.get(label)
            if h is None:
                continue
            order = np.argsort(np.asarray(cols["time"], float), kind="stable")
            for i in order:
                row = {name: values[i] for name, values in cols.items()}
                if bool(row["found"]):
                    outcome = SurfaceOutcome(
                        label=label, found=True, reason=0, status=int(row["status"]), message="",
                        centre=np.asarray(row["centre"], float),
                        lmax=int(round(math.sqrt(np.size(row["coefficients"])))) - 1,
                        coefficients=np.asarray(row["coefficients"], float),
                        quantities={"centroid": np.asarray(row["centroid"], float),
                                    "radius_max": float(row["radius_max"]),
                                    "irreducible_mass": float(row["irreducible_mass"])})
                    self._record_found(h, outcome, float(row["time"]), int(row["iteration"]))
                elif int(row["reason"]) == REASON_NOT_SEARCHED:
                    if h.retired_at is None:
                        h.retired_at = (float(row["time"]), int(row["iteration"]))
                else:
                    h.misses += 1
            if label == self.common_label and len(order):
                self.common_searching = True
        kinds = list(tracking_events.get("kind", []))
        for index, kind in enumerate(kinds):
            if kind == "common_horizon_formed" and self.common_formed is None:
                self.common_formed = (float(tracking_events["time"][index]), int(tracking_events["iteration"][index]))
            if kind == "data_windows_wanted":
                event = decode_wire(tracking_events["wire"][index])
                w = event.data_windows_wanted
                self.latest_windows = [DataWindow(name=x.name, lower=_triple(x.lower_m), upper=_triple(x.upper_m),
                                                  reason=x.reason, growth=x.growth) for x in w.windows]
                self.latest_windows_valid = (w.valid_from_m, w.valid_until_m)


def encode_wire(event: pb.RunEvent) -> str:
    """The archived wire form of an event (base64 of its serialization)."""
    return base64.b64encode(event.SerializeToString()).decode("ascii")


def decode_wire(text: str) -> pb.RunEvent:
    return pb.RunEvent.FromString(base64.b64decode(str(text).encode("ascii")))


def _triple(v: pb.Vector3) -> np.ndarray:
    return np.array([v.x, v.y, v.z])


def _track_point(row: dict, source: int) -> pb.TrackPoint:
    return pb.TrackPoint(time_m=row["time"], iteration=row["iteration"], position_m=vector(row["position"]),
                         source=source, uncertainty_m=row["uncertainty"])
