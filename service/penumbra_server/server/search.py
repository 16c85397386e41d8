"""One planned search in one slice: crop the slice to the plan's region, run the finder job on
the executor, retry once on a wider region when the crop cut what the surface needs, and refuse a
surface that does not hold the points it must enclose. Units of M.
"""

from __future__ import annotations

import asyncio

import numpy as np

from ..numerics.slices import Slice
from ..numerics.guesses import NO_TRAPPED_SURFACE_YET
from ..numerics.surfaces import Surface
from ._spec import RunSettings
from .executors import FinderExecutor
from .jobs import REASON_NO_CANDIDATE, REASON_NOT_CONVERGED, REASON_NOT_SEARCHED, REASON_OUTSIDE_DATA, SurfaceJob, SurfaceOutcome, crop_slice
from .measure_jobs import measurement_job, with_measurement
from .scheduler import SurfacePlan

__all__ = ["complete_measurement", "search_plan", "crop_ghost_nodes"]


def crop_ghost_nodes(interpolation_order: int) -> int:
    """Nodes the server's crop keeps beyond a search region (the finder's stencils)."""
    return int(interpolation_order) + 2


async def search_plan(plan: SurfacePlan, slice_: Slice, *, executor: FinderExecutor, settings: RunSettings,
                      interpolation_order: int, measure_apart: bool = False) -> SurfaceOutcome:
    """The outcome of ``plan`` in ``slice_`` (a plan with ``search`` False: "not searched").

    ``measure_apart``: a found surface comes back before its spin, stability and error bars are
    measured, carrying the job that measures them (``outcome.measurement``; run it with
    :func:`complete_measurement`)."""
    if not plan.search:
        return SurfaceOutcome(label=plan.label, found=False, reason=REASON_NOT_SEARCHED, status=-1,
                              message=plan.note or "not searched in this slice")
    if plan.inside_of is not None and plan.outer is None:
        return SurfaceOutcome(label=plan.label, found=False, reason=REASON_NOT_SEARCHED, status=-1,
                              message=f"not searched: {plan.inside_of!r}, which it lies inside, was not found in this slice")
    outcome = await _find(plan, slice_, executor, settings, interpolation_order, measure_apart)
    if outcome.reason == REASON_OUTSIDE_DATA and plan.retry_wider:
        # The crop may have cut what the surface needs: once more on twice the region.
        outcome = await _find(plan.widened(2.0), slice_, executor, settings, interpolation_order, measure_apart)
    if outcome.found and plan.must_enclose:
        outside = plan.points_outside(Surface(outcome.centre, outcome.lmax, outcome.coefficients))
        if outside:
            where = ", ".join(str(np.round(p, 4).tolist()) for p in outside)
            # Before a common horizon formed, a surface missing a body is no common candidate.
            reason, lead = ((REASON_NO_CANDIDATE, f"{NO_TRAPPED_SURFACE_YET}: ") if plan.may_not_exist
                            else (REASON_NOT_CONVERGED, ""))
            outcome = SurfaceOutcome(
                label=plan.label, found=False, reason=reason, status=outcome.status,
                message=f"{lead}the surface found does not enclose {where}, which it must hold inside: not accepted",
                method=outcome.method, residual_max=outcome.residual_max, iterations=outcome.iterations,
                wall_time_s=outcome.wall_time_s)
    return outcome


async def complete_measurement(outcome: SurfaceOutcome, executor: FinderExecutor) -> SurfaceOutcome:
    """``outcome`` with its pending measurement (``outcome.measurement``) run on ``executor`` and
    merged in; an outcome without one as it is."""
    if outcome.measurement is None:
        return outcome
    return with_measurement(outcome, await executor.run(outcome.measurement))


async def _find(plan: SurfacePlan, slice_: Slice, executor: FinderExecutor, settings: RunSettings,
                order: int, measure_apart: bool = False) -> SurfaceOutcome:
    # The crop copies sub-boxes of the slice (milliseconds to seconds for large slices): off the event loop.
    data = await asyncio.to_thread(crop_slice, slice_, plan.box_lower, plan.box_upper,
                                   ghost_nodes=crop_ghost_nodes(order))
    if data is None:
        lo, hi = plan.box_lower, plan.box_upper
        return SurfaceOutcome(
            label=plan.label, found=False, reason=REASON_OUTSIDE_DATA, status=-1,
            message=(f"no patch of the slice overlaps the region around {plan.label!r} "
                     f"({np.round(lo, 3).tolist()} .. {np.round(hi, 3).tolist()})"),
        )
    job = SurfaceJob(
        label=plan.label,
        data=data,
        lmax=plan.lmax or settings.lmax,
        lmax_cap=settings.lmax_cap_for(plan.lmax or settings.lmax),
        tolerance=settings.tolerance,
        max_iterations=settings.max_iterations,
        interpolation_order=order,
        fallback_to_flow=plan.fallback_to_flow,
        seed=plan.seed,
        extra_seeds=tuple(plan.extra_seeds),
        scan_centre=plan.scan_centre,
        scan_radii=plan.scan_radii,
        inside_of=plan.outer,
        displaced_seed=plan.displaced_seed,
        may_not_exist=plan.may_not_exist,
        relocate=plan.relocate,
        leads=plan.leads,
        measure_apart=measure_apart,
    )
    return measurement_job(job, await executor.run(job))
