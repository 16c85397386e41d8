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
                          displaced: MutableMapping[str, object], *, deferred: frozenset[int] = frozenset(),
                          replan: Callable[[], Awaitable[Sequence[SurfacePlan]]] | None = None,
                          measure: Callable[[SurfaceOutcome], Awaitable[SurfaceOutcome]] | None = None,
                          ) -> list[SurfaceOutcome]:
    """Outcomes of ``plans`` in plan order. The plans searched on their own start at once; each plan
    searched inside a surface of this slice (``SurfacePlan.inside_of``) starts when that surface's
    search ends, handed the surface when it was found (not waiting for the other searches).
    ``deferred``: indices of plans that start only once ``replan`` (awaited once) has given the
    plans again (same labels, same positions); they are searched as planned then.
    ``measure``: completes an outcome that came back with its measurements pending
    (``SurfaceOutcome.measurement``: the plans another waits for are attempted with ``leads``, and
    the attempt may leave their measurements apart); it runs while the search inside goes on.
    ``displaced`` (the run's) takes their solutions in the displacement representation, the
    seeds of the next slice."""
    if deferred and replan is None:
        raise ValueError("replan: required when plans are deferred")
    finds: dict[int, asyncio.Future] = {}
    tasks: dict[int, asyncio.Future] = {}
    replanned = None
    try:
        if deferred:
            replanned = asyncio.ensure_future(replan())

        async def plan_at(index: int) -> SurfacePlan:
            return (await asyncio.shield(replanned))[index] if index in deferred else plans[index]

        async def search_outer(index: int) -> SurfaceOutcome:
            return await attempt(_leading(await plan_at(index), plans))

        async def measured(index: int) -> SurfaceOutcome:
            outcome = await asyncio.shield(finds[index])
            if outcome.measurement is None:
                return outcome
            if measure is None:
                raise ValueError(f"measure: required, the outcome of {outcome.label!r} came back unmeasured")
            return await measure(outcome)

        async def search_inside(index: int) -> SurfaceOutcome:
            plan = await plan_at(index)
            outer_search = by_label.get(plan.inside_of)
            if outer_search is not None:
                outer = await asyncio.shield(outer_search)
                if outer.found:
                    plan = dataclasses.replace(plan, outer=Surface(outer.centre, outer.lmax, outer.coefficients))
            return await attempt(plan)

        for index, plan in enumerate(plans):
            if plan.inside_of is None:
                finds[index] = asyncio.ensure_future(search_outer(index))
                tasks[index] = asyncio.ensure_future(measured(index))
        by_label = {plans[index].label: task for index, task in finds.items()}
        for index, plan in enumerate(plans):
            if plan.inside_of is not None:
                tasks[index] = asyncio.ensure_future(search_inside(index))
        outcomes = list(await asyncio.gather(*(tasks[index] for index in range(len(plans)))))
    finally:
        for task in [*finds.values(), *tasks.values()]:  # cancelled with the slice, or one search raised: end the others
            task.cancel()
        if replanned is not None:
            replanned.cancel()
    displaced.update({o.label: o.displaced for o in outcomes if o.found and o.displaced is not None})
    return outcomes


def _leading(plan: SurfacePlan, plans: Sequence[SurfacePlan]) -> SurfacePlan:
    """``plan`` marked ``leads`` when a plan of the slice is searched inside it."""
    if any(other.inside_of == plan.label for other in plans):
        return dataclasses.replace(plan, leads=True)
    return plan
