"""Plans for the inner common MOTS: one per planned common surface, searched inside what that
search finds in the same slice (the run resolves ``SurfacePlan.inside_of`` after it).

Kept out of the planners: any planner that plans the run's common surface gets the inner one
after it, unless the run spec turns it off (``RunSettings.inner_common``).
"""

from __future__ import annotations

import asyncio
import dataclasses
from typing import Awaitable, Callable, Mapping, MutableMapping, Sequence

from ..numerics.surfaces import Surface
from ._spec import RunSettings
from .jobs import SurfaceOutcome
from .scheduler import SurfacePlan
from .surface_state import SurfaceState

__all__ = ["inner_label", "inner_common_plans", "search_in_order"]


def inner_label(common_label: str) -> str:
    """Label of the inner common MOTS inside the surface ``common_label``."""
    return f"{common_label}_inner"


def inner_common_plans(settings: RunSettings, plans: Sequence[SurfacePlan], common_label: str | None,
                       states: Mapping[str, SurfaceState], displaced: Mapping[str, object]) -> list[SurfacePlan]:
    """The inner plan for the common surface among ``plans`` (none when it is not planned, not
    searched this slice, or the spec turned the inner search off). Seeded from the inner
    surface's own last solution when the previous slice found it; searched in the common plan's
    data region, Newton only (no flow, no wider retry: inside a found common horizon).
    ``displaced``: label -> last solution in the displacement representation (the run's)."""
    if not settings.inner_common or common_label is None:
        return []
    out = []
    for common in plans:
        if common.label != common_label or not common.search:
            continue
        state = states.get(inner_label(common.label))
        fresh = state is not None and state.ever_found and state.misses == 0
        label = inner_label(common.label)
        out.append(SurfacePlan(label, None, None, None, common.box_lower, common.box_upper,
                               lmax=common.lmax, fallback_to_flow=False, retry_wider=False, inside_of=common.label,
                               displaced_seed=displaced.get(label) if fresh else None))
    return out


async def search_in_order(plans: Sequence[SurfacePlan], attempt: Callable[[SurfacePlan], Awaitable[SurfaceOutcome]],
                          displaced: MutableMapping[str, object]) -> list[SurfaceOutcome]:
    """Outcomes of ``plans`` in plan order: the plans searched on their own concurrently, then
    those searched inside a surface of this slice (``SurfacePlan.inside_of``), handed that
    surface when it was found. ``displaced`` (the run's) takes their solutions in the
    displacement representation, the seeds of the next slice."""
    first = list(await asyncio.gather(*(attempt(plan) for plan in plans if plan.inside_of is None)))
    if all(plan.inside_of is None for plan in plans):
        return first
    found = {o.label: o for o in first}
    inside = []
    for plan in plans:
        if plan.inside_of is None:
            continue
        outer = found.get(plan.inside_of)
        if outer is not None and outer.found:
            plan = dataclasses.replace(plan, outer=Surface(outer.centre, outer.lmax, outer.coefficients))
        inside.append(attempt(plan))
    later, earlier = iter(await asyncio.gather(*inside)), iter(first)
    outcomes = [next(later) if plan.inside_of is not None else next(earlier) for plan in plans]
    displaced.update({o.label: o.displaced for o in outcomes if o.found and o.displaced is not None})
    return outcomes
