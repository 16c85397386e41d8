"""The vocabulary of the refinement guidance (guidance.py computes it): the policy a run asks
for (:class:`RefinementPolicy`), a horizon's size (:class:`HorizonSize`), the guidance per body
(:class:`BodyGuidance`) and per level (:class:`LevelRegion`), the whole answer
(:class:`RefinementGuidance`) and :class:`GuidanceError` for bad input.

Units: geometric (G = c = 1), lengths and times in the run's mass scale M.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from ._arrays import frozen_float_array

__all__ = ["GuidanceError", "RefinementPolicy", "HorizonSize", "BodyGuidance", "LevelRegion", "RefinementGuidance"]


class GuidanceError(ValueError):
    """Bad input to the guidance. The message names the field at fault."""


@dataclass(frozen=True)
class RefinementPolicy:
    """The run's refinement policy (part of the run spec).

    Attributes:
        points_across_horizon: grid points across the horizon's smallest coordinate diameter on
            its finest level (default 30; common practice: 20-40, docs/references.md item 15).
        nesting_depth: depth of the nest of refinement levels around the bodies (default 6).
        level_ratio: spacing and radius ratio between neighbouring levels (default 2,
            common practice).
        finest_radius_factor: finest-level radius in units of the horizon's largest coordinate
            radius, before margins (default 1.5; common practice: 1.2-2, docs/references.md item 15).
        steering_interval: coordinate time between the evolution's steering steps (where it moves
            its refined regions), units of M (default
            4 M, a choice of ours: the forecast interval the guidance must cover).
        guard_points: guard width around the finest region, in grid points of the finest spacing
            (default 4).
        unknown_motion_factor: margin, in units of r_max, used in place of the forecast
            uncertainty when the forecast cannot estimate it (a single sample).
        separation_margin: hysteresis of merging (dimensionless, default 0.25, our choice):
            regions merged in the previous guidance stay merged until the distance of their
            centres exceeds (1 + separation_margin) times the sum of their radii.
    """

    points_across_horizon: float = 30.0
    nesting_depth: int = 6
    level_ratio: float = 2.0
    finest_radius_factor: float = 1.5
    steering_interval: float = 4.0
    guard_points: int = 4
    unknown_motion_factor: float = 1.0
    separation_margin: float = 0.25

    def __post_init__(self) -> None:
        checks = {
            "points_across_horizon": self.points_across_horizon > 0,
            "nesting_depth": isinstance(self.nesting_depth, (int, np.integer)) and self.nesting_depth >= 1,
            "level_ratio": self.level_ratio > 1,
            "finest_radius_factor": self.finest_radius_factor >= 1,
            "steering_interval": self.steering_interval > 0,
            "guard_points": isinstance(self.guard_points, (int, np.integer)) and self.guard_points >= 0,
            "unknown_motion_factor": self.unknown_motion_factor >= 0,
            "separation_margin": self.separation_margin >= 0,
        }
        expected = {
            "points_across_horizon": "a positive number",
            "nesting_depth": "an integer >= 1",
            "level_ratio": "a number > 1",
            "finest_radius_factor": "a number >= 1 (the region must hold the horizon)",
            "steering_interval": "a positive time in M",
            "guard_points": "an integer >= 0",
            "unknown_motion_factor": "a number >= 0",
            "separation_margin": "a number >= 0 (a fraction of the summed radii)",
        }
        for name, ok in checks.items():
            value = getattr(self, name)
            if not ok or not np.isfinite(float(value)):
                raise GuidanceError(f"policy.{name}: expected {expected[name]}, got {value!r}")


@dataclass(frozen=True)
class HorizonSize:
    """Coordinate size of a horizon (from the last surface found), units of M.

    Attributes:
        max_radius: largest coordinate distance of the surface from its centre.
        min_diameter: smallest coordinate diameter (e.g. twice the smallest coordinate radius).
    """

    max_radius: float
    min_diameter: float

    def __post_init__(self) -> None:
        if not (np.isfinite(self.max_radius) and self.max_radius > 0):
            raise GuidanceError(f"max_radius: expected a positive number, got {self.max_radius!r}")
        if not (np.isfinite(self.min_diameter) and 0 < self.min_diameter <= 2 * self.max_radius * (1 + 1e-12)):
            raise GuidanceError(
                f"min_diameter: expected a positive number no larger than 2 x max_radius "
                f"({2 * self.max_radius!r}), got {self.min_diameter!r}"
            )


@dataclass(frozen=True, eq=False)
class BodyGuidance:
    """The nested regions recommended for one body.

    Attributes:
        body: body name.
        centre: (3,) recommended centre, units of M.
        finest_level: this body's finest level (<= policy.nesting_depth).
        radii: (finest_level,) sphere radius per level, index l - 1 for level l, units of M.
        lower, upper: (finest_level, 3) box corners per level, units of M.
        spacings: (finest_level,) grid spacing per level, units of M.
        required_spacing: smallest coordinate diameter / points_across_horizon, units of M.
        finest_spacing: spacing of ``finest_level`` (<= required_spacing), units of M.
        margins: the terms of the finest radius (horizon, motion, uncertainty, guard), M.
        reasons: name of each number -> why it has its value.
    """

    body: str
    centre: np.ndarray
    finest_level: int
    radii: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    spacings: np.ndarray
    required_spacing: float
    finest_spacing: float
    margins: Mapping[str, float]
    reasons: Mapping[str, str]

    def __post_init__(self) -> None:
        for name in ("centre", "radii", "lower", "upper", "spacings"):
            object.__setattr__(self, name, frozen_float_array(getattr(self, name)))
        object.__setattr__(self, "margins", dict(self.margins))
        object.__setattr__(self, "reasons", dict(self.reasons))

    @property
    def finest_radius(self) -> float:
        return float(self.radii[-1])


@dataclass(frozen=True, eq=False)
class LevelRegion:
    """One refined region on one level, sphere and box forms.

    Attributes:
        level: level number (1 coarsest .. policy.nesting_depth finest).
        spacing: grid spacing on this level, units of M.
        bodies: the bodies this region covers (two or more when merged).
        centre, radius: sphere form, units of M.
        lower, upper: (3,) box form, units of M.
        reason: why this region (single body or merged, and why).
    """

    level: int
    spacing: float
    bodies: tuple[str, ...]
    centre: np.ndarray
    radius: float
    lower: np.ndarray
    upper: np.ndarray
    reason: str

    def __post_init__(self) -> None:
        for name in ("centre", "lower", "upper"):
            object.__setattr__(self, name, frozen_float_array(getattr(self, name)))

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
class RefinementGuidance:
    """Refinement guidance valid over [valid_from, valid_until].

    Attributes:
        valid_from, valid_until: the time window (the forecast interval), units of M.
        bodies: per-body recommendations.
        levels: per level, coarsest first, the regions after merging overlapping spheres.
        post_merger: True when the guidance is for the remnant after a common horizon formed.
        policy: the policy used.
        reasons: notes on the whole guidance (validity, merging, post-merger).
    """

    valid_from: float
    valid_until: float
    bodies: tuple[BodyGuidance, ...]
    levels: tuple[tuple[LevelRegion, ...], ...]
    post_merger: bool
    policy: RefinementPolicy
    reasons: Mapping[str, str] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "reasons", dict(self.reasons))

    @property
    def finest_regions(self) -> tuple[LevelRegion, ...]:
        """Regions on the finest level any body uses."""
        return self.levels[-1]

    def regions_at(self, level: int) -> tuple[LevelRegion, ...]:
        if not 1 <= level <= len(self.levels):
            raise GuidanceError(f"level: expected 1..{len(self.levels)}, got {level!r}")
        return self.levels[level - 1]

    def body(self, name: str) -> BodyGuidance:
        for b in self.bodies:
            if b.body == name:
                return b
        raise GuidanceError(f"body: {name!r} is not in this guidance")

    def region_of(self, body: str, level: int) -> LevelRegion:
        """The region covering ``body`` on ``level``."""
        for region in self.regions_at(level):
            if body in region.bodies:
                return region
        raise GuidanceError(f"body {body!r} has no region on level {level} (its finest level is lower)")
