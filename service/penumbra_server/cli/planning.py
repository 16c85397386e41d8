"""The surface planner `penumbra serve` runs with: every body, plus a common surface when two are close.

The server's default planner (:class:`penumbra_server.server.ExpectedBodiesPlanner`) looks for
each expected body only. A binary run also needs the common apparent horizon: this planner adds
one surface, labelled :data:`COMMON_LABEL`, for runs with exactly two bodies,

* once both bodies have been found and :func:`penumbra_server.tracking.common.common_horizon_watch`
  says they are close (separation at the slice's time, each body's centroid moved on at its last
  velocity, below that module's default factor times the sum of the horizons' largest
  radii; the reasoning and its source are in that module), and from then on in every slice;
* seeded from the previous common surface re-centred on its predicted centroid when there is
  one, else from the sphere about the mass-weighted centre that encloses both horizons
  (:func:`~penumbra_server.tracking.common.common_surface_guess`);
* with no sphere scan (see the comment in the code) and a data region around the seed, inside
  the slice's bounds.

This lives with the command line because `serve` is where it is plugged in
(``ServerOptions(planner_factory=...)``); it uses only the server's planner protocol and the
tracking module's advice, so it can move to ``server/`` or ``tracking/`` unchanged.
"""

from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np

from penumbra_server.server.scheduler import ExpectedBodiesPlanner, SurfacePlan, SurfaceTrack, recentred
from penumbra_server.tracking.common import common_horizon_watch

__all__ = ["COMMON_LABEL", "BinaryPlanner", "binary_planner_factory", "common_label_for"]

#: Label of the common surface (``common_2`` etc. if a body already uses it).
COMMON_LABEL = "common"
# A fresh seed sphere may use this fraction of the distance from its centre to the data's edge.
_DATA_MARGIN = 0.9
# Data region about the common surface: its (guess or largest) radius times this, plus motion.
_REGION_FACTOR = 1.6


def common_label_for(body_labels: Sequence[str]) -> str:
    """:data:`COMMON_LABEL`, or a numbered variant that no body uses."""
    label, n = COMMON_LABEL, 1
    while label in body_labels:
        n += 1
        label = f"{COMMON_LABEL}_{n}"
    return label


class BinaryPlanner:
    """Every expected body (as the default planner does) plus a common surface for a pair.

    For a pair it also looks for a body that is being missed where its partner says it is: the
    pair's centre of mass moves little over a few slices, so a missed body sits opposite its
    found partner, x_lost = c - (m_partner / m_lost) (x_partner - c), with c the mass-weighted
    centre (spec masses) of the last slice in which both were found. That brings a body back
    after the default planner's linear extrapolation has lost it on a curved orbit.

    Holds per-run state (that centre, whether a common search has started); a run gets its own
    planner from :func:`binary_planner_factory`.
    """

    def __init__(self, *, body_planner: ExpectedBodiesPlanner | None = None) -> None:
        self._bodies = body_planner or ExpectedBodiesPlanner()
        self._searching = False
        self._centre_of_mass: np.ndarray | None = None
        self.last_advice = None  # the latest CommonSearchAdvice, for logs and tests

    def plan(self, settings, tracks: Mapping[str, SurfaceTrack], slice_) -> list[SurfacePlan]:
        plans = list(self._bodies.plan(settings, tracks, slice_))
        if len(settings.bodies) != 2:
            return plans
        plans = self._opposite_partner(settings, tracks, plans, float(slice_.time))
        common = self._common_plan(settings, tracks, slice_)
        if common is not None:
            plans.append(common)
        return plans

    def _opposite_partner(self, settings, tracks, plans: list[SurfacePlan], time: float) -> list[SurfacePlan]:
        """Re-aim the plan of a missed body at the point opposite its found partner."""
        bodies = settings.bodies
        found = [tracks.get(b.label) for b in bodies]
        if all(t is not None and t.centroid is not None and t.consecutive_misses == 0 for t in found) and \
                found[0].found_time == found[1].found_time:
            masses = np.array([b.mass for b in bodies], dtype=float)
            self._centre_of_mass = (masses[0] * found[0].centroid + masses[1] * found[1].centroid) / masses.sum()
        if self._centre_of_mass is None:
            return plans
        out = []
        for plan in plans:
            index = next((i for i, b in enumerate(bodies) if b.label == plan.label), None)
            track = found[index] if index is not None else None
            partner = found[1 - index] if index is not None else None
            if (track is None or track.centroid is None or track.consecutive_misses == 0
                    or partner is None or partner.centroid is None or partner.consecutive_misses != 0):
                out.append(plan)
                continue
            c = self._centre_of_mass
            ratio = bodies[1 - index].mass / bodies[index].mass
            estimate = c - ratio * (partner.predicted_centroid(time) - c)
            shift = estimate - (plan.seed.centre if plan.seed is not None else plan.scan_centre)
            seed = recentred(plan.seed, estimate) if plan.seed is not None else None
            out.append(SurfacePlan(label=plan.label, seed=seed, scan_centre=estimate, scan_radii=plan.scan_radii,
                                   box_lower=plan.box_lower + shift, box_upper=plan.box_upper + shift))
        return out

    def _common_plan(self, settings, tracks: Mapping[str, SurfaceTrack], slice_) -> SurfacePlan | None:
        time = float(slice_.time)
        body_a, body_b = settings.bodies
        label = common_label_for([b.label for b in settings.bodies])
        track_a, track_b = tracks.get(body_a.label), tracks.get(body_b.label)
        common = tracks.get(label)
        if track_a is None or track_b is None or track_a.centroid is None or track_b.centroid is None:
            return None
        if not (np.isfinite(track_a.radius_max) and np.isfinite(track_b.radius_max)):
            return None
        next_a, next_b = _expected_position(track_a, time), _expected_position(track_b, time)
        advice = common_horizon_watch(
            next_a, next_b,
            radius_a=track_a.radius_max, radius_b=track_b.radius_max,
            masses=(body_a.mass, body_b.mass), already_searching=self._searching,
        )
        self.last_advice = advice
        if not advice.search:
            return None
        self._searching = True
        lower, upper = slice_.bounds()
        if common is not None and common.surface is not None and common.consecutive_misses < 2:
            predicted = _expected_position(common, time)
            seed = recentred(common.surface, predicted)
            reach = _REGION_FACTOR * common.radius_max + float(np.linalg.norm(predicted - common.centroid))
        else:
            # The sphere enclosing both horizons where they are expected at the slice's time, kept
            # inside the data (a seed that leaves the grid cannot even be evaluated).
            room = float(np.min(np.minimum(advice.centre - lower, upper - advice.centre)))
            radius = min(advice.radius, _DATA_MARGIN * room) if room > 0 else advice.radius
            seed = _sphere(advice.centre, radius, settings.lmax)
            reach = _REGION_FACTOR * radius
        middle = seed.centre
        # No sphere scan: Newton from a sphere enclosing both horizons converges to the outer
        # common surface when one exists, and a scan about the centre of mass of two holes mostly
        # finds the individual horizons' sign changes; it would only make every miss dearer.
        return SurfacePlan(label=label, seed=seed, scan_centre=None, scan_radii=None,
                           box_lower=np.maximum(middle - reach, lower), box_upper=np.minimum(middle + reach, upper))


def _expected_position(track: SurfaceTrack, time: float) -> np.ndarray:
    """Where a surface should be at ``time``: moved on at its last velocity while it is being
    found, held where it was last seen once it is being missed (an old velocity carried over a
    long gap sends the estimate off the grid)."""
    if track.consecutive_misses == 0:
        return track.predicted_centroid(time)
    return np.asarray(track.centroid, dtype=float)


def _sphere(centre, radius: float, lmax: int):
    from penumbra_server.numerics.surfaces import Surface

    return Surface.sphere(np.asarray(centre, dtype=float), float(radius), lmax)


def binary_planner_factory(settings) -> BinaryPlanner:
    """``ServerOptions.planner_factory``: one :class:`BinaryPlanner` per run."""
    return BinaryPlanner()
