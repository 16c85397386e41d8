"""A found surface's measurements as a job of their own (server/measure_jobs.py): the same numbers
and notes as one job measuring everything, a failed measurement never losing the surface, and
search_in_order starting the search inside the surface before its measurements end."""

from __future__ import annotations

import asyncio
import dataclasses
import math
import pickle

import numpy as np
import pytest

from penumbra_server.numerics.spacetimes import BrillLindquist, sample_slice
from penumbra_server.numerics.surfaces import Surface
from penumbra_server.server.inner_planning import search_in_order
from penumbra_server.server.jobs import REASON_FOUND, SurfaceJob, SurfaceOutcome, run_surface_job
from penumbra_server.server.measure_jobs import MeasuredQuantities, MeasureJob, measurement_job, with_measurement
from penumbra_server.server.scheduler import SurfacePlan

from service_support import within_turns


def _hole_job(**changes) -> SurfaceJob:
    """A lone Brill-Lindquist hole of mass 1 (horizon: the sphere of radius 1/2), conformal-W data,
    sought from an off-centre sphere at l_max 6 with the error bars' l_max - 2 comparison."""
    hole = BrillLindquist(masses=np.array([1.0]), positions=np.zeros((1, 3)))
    box = dict(origin=(-0.83, -0.81, -0.82), spacing=(0.05,) * 3, shape=(34, 34, 34))
    data = sample_slice(hole, [box], variable_set="conformal_w", iteration=7)
    job = SurfaceJob(label="common", data=data, lmax=6, tolerance=1e-9, max_iterations=30,
                     seed=Surface.sphere((0.02, 0.0, 0.0), 0.45, 6))
    return dataclasses.replace(job, **changes)


def test_measured_apart_the_outcome_is_the_one_of_a_whole_job():
    whole = run_surface_job(_hole_job())
    apart_job = _hole_job(measure_apart=True, leads=True)
    first = measurement_job(apart_job, run_surface_job(apart_job))
    assert whole.found and first.found
    # Back before the measurements: the basic measures only, the surface and the job still to run.
    assert "dimensionless_spin" not in first.quantities and "area" in first.quantities
    assert isinstance(first.measurement, MeasureJob)
    assert first.measurement.surface.lmax == whole.lmax and first.measurement.data is apart_job.data
    np.testing.assert_array_equal(first.coefficients, whole.coefficients)
    # The measurement job runs as any job does (pickled to a worker), and completes the outcome.
    measured = run_surface_job(pickle.loads(pickle.dumps(first.measurement)))
    assert isinstance(measured, MeasuredQuantities) and measured.notes == [] and measured.wall_time_s > 0
    done = with_measurement(first, measured)
    assert done.measurement is None and done.unmeasured is None
    assert done.message == whole.message
    assert set(done.quantities) == set(whole.quantities)
    for name, value in whole.quantities.items():  # the same functions on the same data: the same numbers
        np.testing.assert_array_equal(np.asarray(done.quantities[name], float), np.asarray(value, float), err_msg=name)
    assert math.isfinite(done.quantities["dimensionless_spin"]) and math.isfinite(done.quantities["area_error"])


def test_a_failed_measurement_leaves_the_surface_found_with_a_note():
    found = SurfaceOutcome(label="common", found=True, reason=REASON_FOUND, status=0, message="converged",
                           quantities={"area": 3.0}, wall_time_s=0.5)
    lost = SurfaceOutcome.failed("common", "worker process died while finding the surface", wall_time_s=0.25)
    done = with_measurement(found, lost)
    assert done.found and done.quantities == {"area": 3.0} and done.wall_time_s == 0.75
    assert done.message == "converged; not measured: worker process died while finding the surface"
    # A measurement that raised inside the worker says so too (here: data that is no slice).
    broken = MeasureJob("common", "not data", Surface.sphere((0.0, 0.0, 0.0), 0.5, 4), 4).run_in_worker()
    assert broken.quantities == {} and len(broken.notes) == 1 and broken.notes[0].startswith("not measured:")
    assert with_measurement(found, broken).message.startswith("converged; not measured:")


def test_an_outcome_not_found_carries_no_measurement():
    job = _hole_job(measure_apart=True, seed=None, scan_centre=np.zeros(3), scan_radii=(0.7, 0.75))
    outcome = measurement_job(job, run_surface_job(job))
    assert not outcome.found and outcome.measurement is None


def test_the_inside_search_starts_before_the_outer_surface_is_measured():
    """search_in_order alone (plain coroutines, each ending when the test says): the leading
    search comes back unmeasured, the inside search starts at once, and the outcomes returned are
    the measured ones, in plan order."""
    box = (np.full(3, -1.0), np.full(3, 1.0))
    plans = [SurfacePlan("common", None, None, None, *box),
             SurfacePlan("common_inner", None, None, None, *box, inside_of="common")]
    sphere = Surface.sphere([0.0, 0.0, 0.0], 0.9, 4)

    async def scenario():
        measured_may_end, inner_may_end = asyncio.Event(), asyncio.Event()
        started = []

        async def attempt(plan):
            started.append(plan.label)
            if plan.label == "common_inner":
                await inner_may_end.wait()
            pending = MeasureJob(plan.label, None, sphere, 4) if plan.leads else None
            return SurfaceOutcome(label=plan.label, found=True, reason=REASON_FOUND, status=0, message="found",
                                  centre=sphere.centre, lmax=sphere.lmax, coefficients=sphere.coefficients,
                                  measurement=pending)

        async def measure(outcome):
            started.append(f"measure {outcome.label}")
            await measured_may_end.wait()
            return with_measurement(outcome, MeasuredQuantities(outcome.label, {"dimensionless_spin": 0.25}))

        async def until(condition):
            await within_turns(condition, lambda: f"started {started}")

        search = asyncio.ensure_future(search_in_order(plans, attempt, {}, measure=measure))
        await until(lambda: "common_inner" in started and "measure common" in started)
        assert not measured_may_end.is_set()  # the inside search runs while the measurement does
        inner_may_end.set()
        for _ in range(50):
            await asyncio.sleep(0)
        assert not search.done()  # the slice's outcomes wait for the measurement
        measured_may_end.set()
        return await search

    outcomes = asyncio.run(scenario())
    assert [o.label for o in outcomes] == ["common", "common_inner"]
    assert outcomes[0].quantities == {"dimensionless_spin": 0.25} and outcomes[0].measurement is None


def test_an_unmeasured_outcome_without_a_way_to_measure_it_is_an_error():
    box = (np.full(3, -1.0), np.full(3, 1.0))
    plans = [SurfacePlan("common", None, None, None, *box)]

    async def attempt(plan):
        return SurfaceOutcome(label=plan.label, found=True, reason=REASON_FOUND, status=0, message="found",
                              measurement=MeasureJob(plan.label, None, Surface.sphere((0.0, 0.0, 0.0), 1.0, 2), 4))

    with pytest.raises(ValueError, match="measure: required, the outcome of 'common' came back unmeasured"):
        asyncio.run(search_in_order(plans, attempt, {}))
