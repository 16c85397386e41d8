"""Refinement guidance: where the evolution's finest levels should sit until the next regrid.

Advisory only: the evolution code decides what to do with it.

Units: geometric (G = c = 1), lengths and times in the run's mass scale M.

Levels are numbered 1 (coarsest of the nested levels around the bodies) to ``policy.nesting_depth``
(finest); level l has the grid spacing h_fine x level_ratio^(nesting_depth - l), one spacing per level
for the whole run as in nested (Berger-Oliger style) mesh refinement. h_fine is set by the body
needing the finest spacing: smallest coordinate diameter / points_across_horizon. A body whose
horizon is level_ratio^n times larger needs n fewer levels; it gets its own finest level
``finest_level`` (< nesting_depth), whose spacing still meets the requested points across it.

Per body (``BodyGuidance``), with r_max the horizon's largest coordinate radius:

* centre: centre of the bounding box of the forecast path over the interval;
* finest radius = finest_radius_factor x r_max  (the horizon and a shell around it)
                + motion  (largest distance from the centre to the forecast path)
                + uncertainty  (largest forecast uncertainty over the interval)
                + guard_points x the finest spacing  (the guard zone around the refined grid);
* each coarser level's radius is level_ratio times the next finer one;
* box form: the forecast path's bounding box grown by the same non-motion margins on the finest
  level, and each coarser box level_ratio times wider about the same centre.

Per level (``LevelRegion``): bodies whose spheres on that level overlap get one merged region
(the smallest sphere enclosing both spheres; the union of their boxes). After merger the
caller passes the remnant's forecast (``post_merger=True``): a single region around it.

Hysteresis: regions merge as soon as their spheres overlap (d < r1 + r2) but separate again only
when they are clear by a margin, d > (1 + policy.separation_margin) (r1 + r2). Whether two
bodies were merged on a level is read from the previous guidance, passed explicitly
(``previous=``); without it the plain overlap rule applies. So a pair approaching slowly, or one
whose separation wobbles around the threshold, changes its merged state at most once instead of
switching back and forth.

The types (policy, sizes, per-body and per-level answers) are in guidance_types.py and
importable from here.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from ._arrays import merge_until_disjoint
from .forecast import Forecast
from .guidance_types import (
    BodyGuidance,
    GuidanceError,
    HorizonSize,
    LevelRegion,
    RefinementGuidance,
    RefinementPolicy,
)

__all__ = [
    "GuidanceError",
    "RefinementPolicy",
    "HorizonSize",
    "BodyGuidance",
    "LevelRegion",
    "RefinementGuidance",
    "refinement_guidance",
    "guidance_times",
]


def guidance_times(now: float, *, policy: RefinementPolicy, samples: int = 9) -> np.ndarray:
    """The forecast times a guidance needs: ``samples`` times from ``now`` to now + steering_interval."""
    if int(samples) < 2:
        raise GuidanceError(f"samples: expected at least 2, got {samples!r}")
    return np.linspace(float(now), float(now) + policy.steering_interval, int(samples))


def _spheres_overlap(a: dict, b: dict) -> bool:
    return bool(np.linalg.norm(a["centre"] - b["centre"]) < a["radius"] + b["radius"])


def _previously_merged_pairs(previous: "RefinementGuidance | None", level: int) -> set[frozenset[str]]:
    """Pairs of bodies that shared a region on ``level`` in the previous guidance."""
    if previous is None or level > len(previous.levels):
        return set()
    pairs = set()
    for region in previous.regions_at(level):
        for i, a in enumerate(region.bodies):
            for b in region.bodies[i + 1:]:
                pairs.add(frozenset((a, b)))
    return pairs


def _sticky_overlap(merged_pairs: set[frozenset[str]], margin: float):
    """Overlap test with hysteresis: groups holding a previously merged pair stay merged until
    they are clear by ``margin`` times the summed radii."""

    def overlaps(a: dict, b: dict) -> bool:
        d = float(np.linalg.norm(a["centre"] - b["centre"]))
        reach = a["radius"] + b["radius"]
        if d < reach:
            return True
        were_merged = any(frozenset((x, y)) in merged_pairs for x in a["bodies"] for y in b["bodies"])
        return were_merged and d <= (1.0 + margin) * reach

    return overlaps


def _merge_groups(a: dict, b: dict) -> dict:
    """One region from two overlapping ones: the smallest sphere enclosing both, the union box."""
    centre, radius = _merge_spheres(a["centre"], a["radius"], b["centre"], b["radius"])
    return dict(bodies=a["bodies"] + b["bodies"], centre=centre, radius=radius,
                lower=np.minimum(a["lower"], b["lower"]), upper=np.maximum(a["upper"], b["upper"]))


def _member_spheres(group: dict, bodies, level: int):
    """Pairs of the level's body spheres within a merged group."""
    own = [dict(centre=b.centre, radius=float(b.radii[level - 1])) for b in bodies if b.body in group["bodies"]]
    return [(own[i], own[j]) for i in range(len(own)) for j in range(i + 1, len(own))]


def _merge_spheres(c1, r1, c2, r2):
    """Smallest sphere containing spheres (c1, r1) and (c2, r2)."""
    d = float(np.linalg.norm(c2 - c1))
    if d + r2 <= r1:
        return c1.copy(), r1
    if d + r1 <= r2:
        return c2.copy(), r2
    radius = 0.5 * (d + r1 + r2)
    centre = c1 + (radius - r1) * (c2 - c1) / d
    return centre, radius


def refinement_guidance(
    forecast: Forecast,
    sizes: Mapping[str, HorizonSize],
    *,
    policy: RefinementPolicy = RefinementPolicy(),
    post_merger: bool = False,
    previous: RefinementGuidance | None = None,
) -> RefinementGuidance:
    """Recommend nested refinement regions per body for the forecast interval.

    Args:
        forecast: positions and uncertainty of each body over the interval (see
            :func:`guidance_times` for its times); after merger, the remnant's forecast.
        sizes: body name -> :class:`HorizonSize` from the latest surfaces found.
        policy: the run's :class:`RefinementPolicy`.
        post_merger: the forecast is of the remnant after a common horizon formed.
        previous: the guidance issued before this one (None for the first): its merged regions
            are kept merged until clear by ``policy.separation_margin`` (module docstring). It
            is the only state the hysteresis uses.

    Returns:
        :class:`RefinementGuidance` valid over the forecast's times.
    """
    if not isinstance(forecast, Forecast):
        raise GuidanceError(f"forecast: expected a Forecast, got {type(forecast).__name__}")
    missing = [b for b in forecast.bodies if b not in sizes]
    if missing:
        raise GuidanceError(f"sizes: no HorizonSize for body/bodies {missing}")
    if previous is not None and not isinstance(previous, RefinementGuidance):
        raise GuidanceError(f"previous: expected a RefinementGuidance or None, got {type(previous).__name__}")
    if post_merger and len(forecast.bodies) != 1:
        raise GuidanceError(
            f"post_merger: expected a forecast of the single remnant, got bodies {list(forecast.bodies)}"
        )
    ratio = float(policy.level_ratio)
    n_levels = int(policy.nesting_depth)
    required = {b: sizes[b].min_diameter / policy.points_across_horizon for b in forecast.bodies}
    h_fine = min(required.values())
    span = float(forecast.times[-1] - forecast.times[0])
    reasons = {
        "valid": (f"valid from t = {forecast.times[0]:.6g} M to {forecast.times[-1]:.6g} M, the forecast "
                  f"interval ({forecast.model} model: {forecast.reason})"),
    }
    if span < policy.steering_interval * (1 - 1e-9):
        reasons["valid_short"] = (f"the forecast covers {span:.4g} M, less than the steering interval "
                                  f"{policy.steering_interval:.4g} M: steer again before it expires")
    if post_merger:
        reasons["post_merger"] = "common horizon formed: a single region around the remnant"

    body_guidance: list[BodyGuidance] = []
    for index, body in enumerate(forecast.bodies):
        size = sizes[body]
        path = forecast.positions[index]
        unc = forecast.uncertainty[index]
        lo_path, hi_path = path.min(axis=0), path.max(axis=0)
        centre = 0.5 * (lo_path + hi_path)
        motion = float(np.max(np.linalg.norm(path - centre, axis=1)))
        # Fewer levels for a horizon level_ratio^n times larger than the smallest one.
        skip = int(np.floor(np.log(required[body] / h_fine) / np.log(ratio) + 1e-9))
        finest_level = max(1, n_levels - skip)
        spacings = h_fine * ratio ** (n_levels - np.arange(1, finest_level + 1))
        h_body = float(spacings[-1])
        horizon_margin = policy.finest_radius_factor * size.max_radius
        if np.all(np.isfinite(unc)):
            unc_margin = float(np.max(unc))
            unc_reason = (f"{unc_margin:.4g} M: the largest forecast uncertainty over the interval "
                          f"({forecast.model} model)")
        else:
            unc_margin = policy.unknown_motion_factor * size.max_radius
            unc_reason = (f"{unc_margin:.4g} M: the forecast has no uncertainty estimate, so "
                          f"unknown_motion_factor {policy.unknown_motion_factor:g} x r_max is used")
        guard = policy.guard_points * h_body
        finest_radius = horizon_margin + motion + unc_margin + guard
        steps = finest_level - np.arange(1, finest_level + 1)
        radii = finest_radius * ratio**steps
        half_box = 0.5 * (hi_path - lo_path) + (horizon_margin + unc_margin + guard)
        half_boxes = half_box[None, :] * (ratio**steps)[:, None]
        body_reasons = {
            "centre": ("centre of the bounding box of the forecast path over the interval, so the "
                       "motion margin is as small as a sphere about one point allows"),
            "required_spacing": (f"{required[body]:.4g} M = smallest coordinate diameter {size.min_diameter:.4g} M "
                                 f"/ {policy.points_across_horizon:g} points across the horizon"),
            "finest_spacing": (f"{h_body:.4g} M on level {finest_level}: "
                               + ("the run's finest spacing, set by this body" if skip == 0 else
                                  f"{skip} level(s) coarser than the finest, which another smaller horizon "
                                  f"needs; still <= the required spacing")),
            "finest_level": (f"level {finest_level} of {n_levels}"
                             + ("" if skip == 0 else f": this horizon is >= {ratio:g}^{skip} times larger "
                                                     f"than the smallest, so it needs {skip} fewer level(s)")),
            "horizon": (f"{horizon_margin:.4g} M = finest_radius_factor {policy.finest_radius_factor:g} x "
                        f"largest coordinate radius {size.max_radius:.4g} M"),
            "motion": f"{motion:.4g} M: largest distance from the centre to the forecast path",
            "uncertainty": unc_reason,
            "guard": f"{guard:.4g} M = guard_points {policy.guard_points} x finest spacing {h_body:.4g} M",
            "finest_radius": (f"{finest_radius:.4g} M = horizon + motion + uncertainty + guard margins"),
            "coarser_radii": f"each coarser level's radius and box are level_ratio {ratio:g} times larger",
            "box": ("box form: the forecast path's bounding box grown by the horizon, uncertainty and "
                    "guard margins on the finest level"),
        }
        body_guidance.append(BodyGuidance(
            body=body, centre=centre, finest_level=finest_level, radii=radii,
            lower=centre - half_boxes, upper=centre + half_boxes, spacings=spacings,
            required_spacing=required[body], finest_spacing=h_body,
            margins={"horizon": horizon_margin, "motion": motion, "uncertainty": unc_margin, "guard": guard},
            reasons=body_reasons,
        ))

    levels: list[tuple[LevelRegion, ...]] = []
    merged_any = False
    for level in range(1, n_levels + 1):
        spacing = float(h_fine * ratio ** (n_levels - level))
        # Start from one region per body on this level, merge overlapping spheres until none overlap.
        groups = [
            dict(bodies=(b.body,), centre=b.centre.copy(), radius=float(b.radii[level - 1]),
                 lower=b.lower[level - 1].copy(), upper=b.upper[level - 1].copy())
            for b in body_guidance if b.finest_level >= level
        ]
        kept = _previously_merged_pairs(previous, level)
        groups = merge_until_disjoint(groups, _sticky_overlap(kept, policy.separation_margin), _merge_groups)
        regions = []
        for g in groups:
            if len(g["bodies"]) > 1:
                merged_any = True
                held = not any(_spheres_overlap(a, b) for a, b in _member_spheres(g, body_guidance, level))
                why = (f"merged: the level-{level} spheres of {', '.join(g['bodies'])} "
                       + ("no longer overlap but were merged before and are not yet clear by the separation "
                          f"margin {policy.separation_margin:g} (hysteresis)" if held else "overlap")
                       + "; the smallest sphere enclosing them and the union of their boxes")
            elif post_merger:
                why = f"the remnant's level-{level} region after merger"
            else:
                why = f"body {g['bodies'][0]}'s own level-{level} region"
            regions.append(LevelRegion(level=level, spacing=spacing, bodies=g["bodies"], centre=g["centre"],
                                       radius=g["radius"], lower=g["lower"], upper=g["upper"], reason=why))
        levels.append(tuple(regions))
    if merged_any:
        reasons["merging"] = "regions whose spheres overlap on a level are merged on that level (and coarser)"
    return RefinementGuidance(
        valid_from=float(forecast.times[0]), valid_until=float(forecast.times[-1]),
        bodies=tuple(body_guidance), levels=tuple(levels), post_merger=bool(post_merger),
        policy=policy, reasons=reasons,
    )
