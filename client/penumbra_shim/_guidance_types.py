"""Tracking and guidance results: track points and forecasts, the common horizon, refinement
guidance and data windows. Frozen dataclasses; lengths and times in units of M."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._spec_types import RefinementOptions
from ._wire import horizons_pb2 as pb
from ._wire_values import triple, vectors

__all__ = ["TrackPoint", "PositionForecast", "TrackUpdate", "CommonHorizon", "RefinedRegion", "BodyRefinement",
           "DataWindow", "DataWindows", "Guidance"]

_SOURCE_NAMES = {pb.TrackPoint.SOURCE_HORIZON: "horizon", pb.TrackPoint.SOURCE_PUNCTURE: "puncture"}
_MODEL_NAMES = {pb.PositionForecast.MODEL_STATIC: "static", pb.PositionForecast.MODEL_POLYNOMIAL: "polynomial",
                pb.PositionForecast.MODEL_ORBIT: "orbit"}


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
        return cls(time=p.time_m, iteration=p.iteration, position=triple(p.position_m),
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
                   times=np.asarray(f.times_m, float), positions=vectors(f.positions_m),
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
        return cls(level=r.level, spacing=r.spacing_m, bodies=tuple(r.bodies), centre=triple(r.centre_m),
                   radius=r.radius_m, lower=triple(r.lower_m), upper=triple(r.upper_m), reason=r.reason)

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
        return cls(label=b.label, centre=triple(b.centre_m), finest_level=b.finest_level,
                   radii=np.asarray(b.radii_m, float), spacings=np.asarray(b.spacings_m, float),
                   lower=vectors(b.lowers_m), upper=vectors(b.uppers_m), required_spacing=b.required_spacing_m,
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
                   windows=tuple(DataWindow(x.name, triple(x.lower_m), triple(x.upper_m), x.reason, x.growth)
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
