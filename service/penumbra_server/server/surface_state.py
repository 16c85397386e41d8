"""What a run knows about one tracked surface, updated in one place.

One :class:`SurfaceState` per surface label of a run (the expected bodies, the common surface of
a pair, and any surface a custom planner adds). The run records every attempt's outcome with
:func:`record_outcome` as soon as the find returns, before the slice's commit (and again
from the archive after a restart; GetLatestSurfaces shows the run's archived view instead); the planners read the state, and the run's steering
(:class:`~penumbra_server.server.steering.RunSteering`) keeps its own decisions in it (window
growth, retirement, the puncture track).

Units: G = c = 1, lengths and times in the run's mass scale M.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field

import numpy as np

from ..numerics.surface_diameter import smallest_diameter
from ..numerics.surfaces import Surface
from ..tracking.data_windows import growth_factor
from ..tracking.guidance import HorizonSize
from ..tracking.tracks import Track
from .jobs import REASON_NOT_SEARCHED, SurfaceOutcome

__all__ = ["SurfaceState", "record_outcome", "LOST_AFTER_MISSES", "FINDS_PER_SHRINK"]

#: Misses in a row after which a surface counts as lost (held at its last centroid, wide scan).
LOST_AFTER_MISSES = 2
#: Finds in a row after which one growth step of its data region is taken back.
FINDS_PER_SHRINK = 3


@dataclass
class SurfaceState:
    """One surface of a run (mutated on the run's behalf only; see the module docstring).

    Attributes:
        label: the surface's label; mass: its approximate mass, M (the spec's; the pair's sum
            for the common surface; 0 when unknown).
        surface: the latest surface found (None if never found); centroid: its area-weighted
            centroid (3,), or None; found_time, found_iteration: its slice (NaN / -1 before).
        radius_max: its largest coordinate radius, M; min_diameter: its smallest coordinate
            diameter, M; irreducible_mass: M (NaN where unknown).
        velocity, displacement: (3,) centroid change between the last two finds per unit
            coordinate time, and in all (zero with fewer than two finds).
        track: the horizon track (centroid of every find, in time order).
        latest_found: wire message of the latest surface found (GetLatestSurfaces).
        latest_attempt_found, latest_attempt_iteration, latest_attempt_message: the latest try.
        consecutive_misses: attempts since the last find (including "not searched").
        misses: searches since the last find (a "not searched" slice does not count).
        growth, finds_since_growth: growth steps of its data region and finds since the last one.
        retired_at: (time, iteration) from which it is no longer searched (inside the common horizon).
        puncture, puncture_order, shift_samples: the puncture track (steering.py).
    """

    label: str
    mass: float = 0.0
    surface: Surface | None = None
    centroid: np.ndarray | None = None
    found_time: float = math.nan
    found_iteration: int = -1
    radius_max: float = math.nan
    min_diameter: float = math.nan
    irreducible_mass: float = math.nan
    velocity: np.ndarray = field(default_factory=lambda: np.zeros(3))
    displacement: np.ndarray = field(default_factory=lambda: np.zeros(3))
    track: Track | None = None
    latest_found: object | None = None
    latest_attempt_found: bool = False
    latest_attempt_iteration: int = -1
    latest_attempt_message: str = ""
    consecutive_misses: int = 0
    misses: int = 0
    growth: int = 0
    finds_since_growth: int = 0
    retired_at: tuple[float, int] | None = None
    puncture: Track | None = None
    puncture_order: int = 0
    shift_samples: deque = field(default_factory=lambda: deque(maxlen=3))

    def __post_init__(self) -> None:
        if self.track is None:
            self.track = Track.empty(self.label)

    # -- updates (the one place) -------------------------------------------------------------

    def record_found(self, surface: Surface, centroid, radius_max: float, *, time: float, iteration: int,
                     irreducible_mass: float = math.nan, message: object | None = None) -> None:
        """One more find. A non-finite centroid falls back to the surface's expansion centre, a
        radius that is not finite and positive to 1.5 times its mean radius."""
        centroid = np.asarray(centroid, dtype=float)
        if not np.all(np.isfinite(centroid)):
            centroid = np.asarray(surface.centre, dtype=float)
        radius_max = float(radius_max)
        if not (np.isfinite(radius_max) and radius_max > 0):
            radius_max = 1.5 * surface.mean_radius
        time = float(time)
        if self.centroid is not None:
            self.displacement = centroid - self.centroid
            if time > self.found_time:
                self.velocity = self.displacement / (time - self.found_time)
        self.surface = surface
        self.centroid = centroid
        self.found_time, self.found_iteration = time, int(iteration)
        self.radius_max = radius_max
        self.min_diameter = smallest_diameter(surface)
        self.irreducible_mass = float(irreducible_mass)
        self.latest_found = message
        self.latest_attempt_found = True
        self.latest_attempt_iteration = int(iteration)
        self.latest_attempt_message = "found"
        self.consecutive_misses = 0
        self.misses = 0
        if self.growth:
            self.finds_since_growth += 1
            if self.finds_since_growth >= FINDS_PER_SHRINK:
                self.growth -= 1
                self.finds_since_growth = 0
        if self.track.count == 0 or time > self.track.latest_time:
            self.track = self.track.append(time, centroid)

    def record_miss(self, message: str, iteration: int, *, searched: bool = True) -> None:
        """One more attempt without a find (``searched`` False: the surface was not searched)."""
        self.latest_attempt_found = False
        self.latest_attempt_iteration = int(iteration)
        self.latest_attempt_message = message
        self.consecutive_misses += 1
        if searched:
            self.misses += 1

    # -- queries ------------------------------------------------------------------------------

    @property
    def ever_found(self) -> bool:
        return self.surface is not None

    @property
    def lost(self) -> bool:
        return self.ever_found and self.misses >= LOST_AFTER_MISSES

    @property
    def growth_factor(self) -> float:
        return growth_factor(self.growth)

    def size(self) -> HorizonSize | None:
        """Largest radius and smallest diameter of the latest find (None before one)."""
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

    def predicted_centroid(self, time: float) -> np.ndarray:
        """The centroid moved on at the last velocity to coordinate time ``time`` (linear)."""
        return self.centroid + self.velocity * (float(time) - self.found_time)


def record_outcome(state: SurfaceState, outcome: SurfaceOutcome, *, time: float, iteration: int,
                   message: object | None = None) -> None:
    """Record one finder outcome (``message``: the announced wire SurfaceResult, if any)."""
    if outcome.found:
        q = outcome.quantities
        state.record_found(Surface(outcome.centre, outcome.lmax, outcome.coefficients),
                           q.get("centroid", outcome.centre), q.get("radius_max", math.nan), time=time,
                           iteration=iteration, irreducible_mass=q.get("irreducible_mass", math.nan),
                           message=message)
    else:
        state.record_miss(outcome.message, iteration, searched=outcome.reason != REASON_NOT_SEARCHED)
