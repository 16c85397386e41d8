"""The default surface planner: every expected body seeded at its forecast position, and the
common horizon of a pair once the common-horizon watch says so.

Per expected body, in each slice at coordinate time t:

* never found: a wide scan of coordinate spheres about the spec's position, radii 0.1 m .. 2 m
  (m the body's approximate mass; as :class:`~penumbra_server.server.scheduler.ExpectedBodiesPlanner`);
* found before: the last surface re-centred (l = 1 part dropped) on the forecast position at t
  (:mod:`penumbra_server.tracking.forecast`: orbit-aware for a bound pair, else a low-order
  polynomial; its expected error is archived with the surface row), the data region its
  largest radius times 1.6 plus the forecast uncertainty, and a scan about the forecast position
  inside that region as the fallback;
* lost (missed :data:`~penumbra_server.server.surface_state.LOST_AFTER_MISSES` times in a row): the
  seed as above, and the scan held at the last centroid with its outer radius widened by the
  body's last speed times the time since it was found (an old velocity carried over a long gap
  drifts off the orbit; holding and widening brings the body back);
* skipped slices (the time since the last find well beyond the track's usual spacing) or a miss:
  the seed's uncertainty grows with the elapsed time, and the worker, when seed and scan fail,
  looks for the body about the metric's peaks within a radius of the forecast that grows with
  it (:mod:`penumbra_server.server.skip_planning`, :mod:`penumbra_server.server.relocation`);
* after the common horizon formed: searched while found; missed twice in a row it is reported
  "not searched" every slice (it lies inside the common horizon).

The common surface (label "common", two-body runs): planned once both bodies have been found and
:func:`penumbra_server.tracking.common.common_horizon_watch` finds the forecast separation at the
slice (and one cadence later) below its threshold, then in every slice. Seeds: the previous common
surface moved rigidly with its centroid's forecast, and (until it is found, or when it was missed) the sphere about
the pair's neck enclosing both horizons (:func:`penumbra_server.tracking.common.common_neck_point`:
the bodies weighted by the square root of the other's mass; a freshly formed common horizon is
well resolved about its waist, not about the centre of mass), with a data region 1.25 times that
sphere's radius. The finder raises l_max up to ``RunSpec.finder.lmax_cap`` when the surface is
not resolved. No sphere scan: about the centre of a pair a scan mostly finds the individual horizons'
sign changes. Its expansion has its own degree (``RunSpec.finder.lmax_common``, default
max(16, lmax): a freshly formed common horizon has a narrow waist), and until it is first found
the search is Newton only (no fast-flow fallback, no second try on a wider region: the search
repeats every slice for a surface that may not exist yet), and a search that finds nothing from
starting surfaces the data covers says "no trapped surface here yet" (reason no candidate), not
"not converged" or "outside data". After the common surface is found it is the remnant: it is searched in
every slice, with the flow fallback.

This planner replaces the linear extrapolation of
:class:`~penumbra_server.server.scheduler.ExpectedBodiesPlanner` (kept for custom planners that
wrap it) as the server's default (``ServerOptions.planner_factory`` unset).

Data regions follow the window rule of :mod:`penumbra_server.tracking.data_windows`; a region grown
after a slice lacked data is grown in the data windows too, so a cropped slice always holds what
the next search crops.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from ..numerics.slices import Slice
from ..numerics.surfaces import Surface
from ._spec import RunSettings
from ..tracking.data_windows import SCAN_BOX_FACTOR, search_reach
from .scheduler import SCAN_RADIUS_FACTORS, SurfacePlan, recentred
from .steering import RunSteering
from .skip_planning import skipped_relocation
from .surface_state import SurfaceState

__all__ = ["SteeringPlanner", "steering_planner_factory"]


class SteeringPlanner:
    """The default planner (module docstring). The run attaches its :class:`RunSteering`."""

    def __init__(self, steering: RunSteering | None = None) -> None:
        self.steering = steering

    def attach(self, steering: RunSteering) -> None:
        """Called by the run with its steering state before the first slice."""
        self.steering = steering

    def plan(self, settings: RunSettings, tracks: Mapping[str, SurfaceState], slice_: Slice) -> list[SurfacePlan]:
        if self.steering is None:
            self.steering = RunSteering(settings)
        steering = self.steering
        t = float(slice_.time)
        plans = [self._body_plan(steering, body, t) for body in settings.bodies]
        common = self._common_plan(steering, settings, t)
        if common is not None:
            plans.append(common)
        return plans

    def _body_plan(self, steering: RunSteering, body, t: float) -> SurfacePlan:
        h = steering.history(body.label)
        lo_factor, hi_factor = SCAN_RADIUS_FACTORS
        if h.retired_at is not None:
            since_t, since_it = h.retired_at
            note = (f"not searched: lost inside the common horizon {steering.common_label!r} since t = "
                    f"{since_t:.6g} M (iteration {since_it})")
            centre = np.asarray(h.centroid, float)
            return SurfacePlan(body.label, None, None, None, centre, centre, search=False, note=note)
        if not h.ever_found:
            centre = np.asarray(body.position, float)
            radii = (lo_factor * body.mass, hi_factor * body.mass)
            reach = SCAN_BOX_FACTOR * radii[1]
            return SurfacePlan(body.label, None, centre, radii, centre - reach, centre + reach)
        forecast = steering.seed_forecast(body.label, t)
        if forecast is None:  # cannot happen once found; kept for safety
            position, uncertainty, model = np.asarray(h.centroid, float), float("inf"), "static"
        else:
            position, uncertainty, model = forecast.position, forecast.uncertainty, forecast.model
        seed = recentred(h.surface, position)
        others = [steering.history(label) for label in steering.body_labels if label != body.label]
        relocate = skipped_relocation(h, body, t, position, uncertainty, others)
        if relocate is not None:
            uncertainty = relocate.uncertainty
        reach = steering.reach(body.label, uncertainty)
        lower, upper = position - reach, position + reach
        if h.lost:
            scan_centre, scan_radii = steering.lost_scan(body.label, t)
            half = SCAN_BOX_FACTOR * scan_radii[1]
            lower = np.minimum(lower, scan_centre - half)
            upper = np.maximum(upper, scan_centre + half)
        else:
            scan_centre = position
            scan_radii = (lo_factor * body.mass, max(reach / SCAN_BOX_FACTOR, 2.0 * lo_factor * body.mass))
        extra = {}
        if relocate is not None:
            # Skipped slices or a miss: the search region holds the whole relocation ball.
            lower = np.minimum(lower, relocate.lower)
            upper = np.maximum(upper, relocate.upper)
            extra = {"relocate": relocate.relocation}
        return SurfacePlan(body.label, seed, np.asarray(scan_centre, float), scan_radii, lower, upper,
                           seed_position=position, seed_uncertainty=uncertainty, seed_model=model, **extra)

    def _common_plan(self, steering: RunSteering, settings: RunSettings, t: float) -> SurfacePlan | None:
        label = steering.common_label
        if label is None:
            return None
        advice = steering.common_advice(t)
        if advice is None or not advice.search:
            return None
        common: SurfaceState = steering.history(label)
        lmax = settings.common_lmax
        fresh = Surface.sphere(advice.centre, advice.radius, lmax)
        seeds: list[Surface] = []
        position, uncertainty, model = None, float("nan"), ""
        radius = advice.radius
        if common.ever_found and not common.lost:
            forecast = steering.seed_forecast(label, t)
            position, uncertainty, model = forecast.position, forecast.uncertainty, forecast.model
            # Moved rigidly with its centroid's forecast, about its own expansion centre: a common
            # horizon's shape is resolved about its neck, not about its centroid (recentred()).
            moved = common.surface.centre + (np.asarray(position, float) - np.asarray(common.centroid, float))
            seeds.append(common.surface.translated(moved).with_lmax(lmax))
            radius = max(radius, common.radius_max)
        if not common.ever_found or common.misses > 0:
            seeds.append(fresh)
        centre = seeds[0].centre
        if position is not None:  # found before: its own region, as for a body
            reach = steering.reach(label, uncertainty)
            if len(seeds) > 1:  # and the fresh sphere's (a miss last slice)
                reach = max(reach, search_reach(radius, growth=common.growth)
                            + float(np.max(np.abs(fresh.centre - centre))))
        else:
            reach = search_reach(radius, growth=common.growth)
        # Before the common horizon formed the search runs every slice for a surface that may not
        # exist yet: Newton only (the flow's hundreds of iterations would dominate every slice),
        # and no second try on a wider region when the iterates run off the data.
        formed = steering.common_formed is not None
        # A "common" surface that misses a body is that body's own horizon (or a spurious MOTS).
        # A lost body counts at its last centroid: better a common horizon announced a slice late
        # than one announced that is really the other body's horizon.
        bodies = (steering.history(b) for b in steering.body_labels)
        enclose = tuple(h.centroid for h in bodies if h.centroid is not None)
        return SurfacePlan(label, seeds[0], None, None, centre - reach, centre + reach, extra_seeds=tuple(seeds[1:]),
                           seed_position=position, seed_uncertainty=uncertainty, seed_model=model, lmax=lmax,
                           fallback_to_flow=formed, retry_wider=formed, must_enclose=enclose,
                           may_not_exist=not formed)


def steering_planner_factory(settings: RunSettings) -> SteeringPlanner:
    """``ServerOptions.planner_factory`` default: one :class:`SteeringPlanner` per run."""
    return SteeringPlanner()
