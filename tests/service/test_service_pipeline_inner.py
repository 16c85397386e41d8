"""Two slices in flight with an inner common MOTS: the next slice's own searches start while the
inner search of the slice before is still running, and the next inner search waits until that
slice is applied, so it is seeded from that slice's inner solution, as with one slice at a time.

The data: an equal-mass Brill-Lindquist pair whose separation decreases through the critical
one (d_c = 0.766 M for bare masses 0.5; as test_service_inner_common.py). Which job runs when
is decided by the test (gated_executor.py), never by the machine's speed.
"""

from __future__ import annotations

import asyncio
import dataclasses
import time

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.numerics.surfaces import Surface
from penumbra_server.server import BackgroundServer, ServerOptions
from penumbra_server.server.inner_planning import search_in_order
from penumbra_server.server.jobs import REASON_FOUND, SurfaceOutcome
from penumbra_server.server.scheduler import SurfacePlan

from gated_executor import GatedExecutor
from service_support import within_turns
from tracking_support import bl_patches, cube

MASS = 0.5
SEPARATIONS = (0.80, 0.78, 0.76, 0.74, 0.72, 0.70)  # M; the common horizon from slice 2 (d = 0.76 M)
HELD = 4  # the slice whose inner search the test holds back


class SeedLog:
    """Wraps a GatedExecutor's run: which (label, iteration) jobs carried a displaced seed."""

    def __init__(self, gated: GatedExecutor) -> None:
        self.displaced: dict[tuple[str, int], bool] = {}
        inner_run = gated.run

        async def run(job):
            self.displaced[(job.label, int(job.data.iteration))] = getattr(job, "displaced_seed", None) is not None
            return await inner_run(job)

        gated.run = run


def _sequence(tmp_path, depth: int, hold: bool):
    """Run the sequence with ``depth`` slices in flight; returns (gated log, seed log, reports)."""
    gated = GatedExecutor.start(2)
    seeds = SeedLog(gated)
    if hold:  # every job runs at once except the inner search of slice HELD (and what follows)
        for iteration in range(len(SEPARATIONS)):
            for label in ("A", "B", "common", "common_inner"):
                if iteration < HELD or (iteration == HELD and label != "common_inner") or (
                        iteration == HELD + 1 and label != "common_inner"):
                    gated.open(label, iteration)
    else:
        gated.open_all()
    spec = ps.RunSpec(variable_set="conformal_w", name=f"inner in flight {depth}",
                      bodies=(ps.Body("A", (0.4, 0.0, 0.0), MASS), ps.Body("B", (-0.4, 0.0, 0.0), MASS)),
                      finder=ps.FinderOptions(lmax=8, tolerance=1e-8),
                      backlog=ps.BacklogOptions(queue_depth=len(SEPARATIONS)),
                      refinement=ps.RefinementOptions(steering_interval=1.0), inner_common=True,
                      formation_forecast=False)  # only surface searches at the executor
    box = cube((0.0, 0.0, 0.0), 1.3, 0.05)
    try:
        with BackgroundServer(archive_root=tmp_path, options=ServerOptions(slices_in_flight=depth),
                              executor=gated) as bg, ps.connect(bg.address, deadline_s=30.0) as client:
            run = client.open_run(spec, cache_results=False)
            for index, d in enumerate(SEPARATIONS):
                positions = np.array([[d / 2, 0.0, 0.0], [-d / 2, 0.0, 0.0]])
                run.submit(ps.build_slice(time=0.5 * index, iteration=index, variable_set="conformal_w",
                                          patches=bl_patches([box], (MASS, MASS), positions)))
            assert run.flush(120)
            if hold:
                # Slice HELD + 1's own searches reach the executor while slice HELD's inner search
                # is held: the slices overlap although slice HELD holds an inner search.
                gated.wait_for("arrived", "common", HELD + 1, timeout_s=600)
                gated.wait_for("done", "common", HELD + 1, timeout_s=600)
                assert ("common_inner", HELD + 1) not in gated.entries("arrived")
                assert ("common_inner", HELD) not in gated.entries("done")
                gated.open_all()
            give_up = time.monotonic() + 900
            while client.get_run(run.run_id).slices_processed < len(SEPARATIONS):
                assert time.monotonic() < give_up, f"slices not processed in 900 s: {client.get_run(run.run_id)}"
                time.sleep(0.2)
            run.close()
            reports = {(e.iteration, e.surface.label): e.surface for e in client.watch(run.run_id, timeout_s=120)
                       if e.kind in ("surface_found", "surface_not_found")}
    finally:
        gated.close_pool()
    return [(kind, label, it) for kind, label, it, _ in gated.log], seeds.displaced, reports


@pytest.mark.slow  # two runs of six slices with common and inner searches
def test_inner_search_waits_for_the_slice_before_while_the_next_slices_searches_overlap(tmp_path):
    log, displaced, reports = _sequence(tmp_path / "two", depth=2, hold=True)
    # The next inner search started only after the held one finished, with its solution as seed.
    assert log.index(("arrived", "common_inner", HELD + 1)) > log.index(("done", "common_inner", HELD))
    assert reports[HELD, "common_inner"].found and displaced["common_inner", HELD + 1]
    # Every inner search after the first inner find carries the previous slice's solution.
    inner = sorted(it for (it, label), s in reports.items() if label == "common_inner" and s.found)
    assert inner == [2, 3, 4, 5]
    assert not displaced["common_inner", 2] and all(displaced["common_inner", it] for it in inner[1:])

    # The same surfaces as one slice at a time (seeds of the outer searches differ: the found
    # surfaces agree to the finder's tolerance, not bit for bit).
    _, displaced_one, one = _sequence(tmp_path / "one", depth=1, hold=False)
    assert displaced_one == {key: value for key, value in displaced.items() if key in displaced_one}
    assert sorted(one) == sorted(reports)
    for key, report in reports.items():
        assert report.found == one[key].found, key
        if report.found:
            assert report.area == pytest.approx(one[key].area, rel=1e-6), key


def test_an_inside_search_starts_when_its_own_outer_search_ends_with_the_replanned_plan():
    """search_in_order alone (plain coroutines as the searches, each ending when the test says):
    deferred searches start only with the plans ``replan`` gives, the inner search does not wait
    for a sibling body's search and takes the outer surface found, and the outcomes come back in
    plan order."""
    box = (np.full(3, -1.0), np.full(3, 1.0))
    plans = [SurfacePlan("A", None, None, None, *box), SurfacePlan("common", None, None, None, *box),
             SurfacePlan("common_inner", None, None, None, *box, inside_of="common")]
    sphere = Surface.sphere([0.0, 0.0, 0.0], 0.9, 4)

    async def scenario():
        ends = {label: asyncio.Event() for label in ("A", "common", "common_inner", "replanned")}
        started, seen = [], {}

        async def attempt(plan):
            started.append(plan.label)
            seen[plan.label] = plan
            await ends[plan.label].wait()
            return SurfaceOutcome(label=plan.label, found=True, reason=REASON_FOUND, status=0, message="found",
                                  centre=sphere.centre, lmax=sphere.lmax, coefficients=sphere.coefficients)

        async def replan():
            await ends["replanned"].wait()
            return [plans[0], dataclasses.replace(plans[1], lmax=5),
                    SurfacePlan("common_inner", None, None, None, *box, inside_of="common", lmax=6)]

        async def until(condition):
            await within_turns(condition, lambda: f"started {started}")

        search = asyncio.ensure_future(search_in_order(plans, attempt, {}, deferred=frozenset({1, 2}), replan=replan))
        await until(lambda: started == ["A"])
        for _ in range(50):  # the deferred searches wait for the plans again, however many turns pass
            await asyncio.sleep(0)
        assert started == ["A"]
        ends["replanned"].set()
        await until(lambda: started == ["A", "common"])
        assert seen["common"].lmax == 5
        ends["common"].set()
        await until(lambda: "common_inner" in started)  # while A's search still runs
        assert not ends["A"].is_set() and not search.done()
        assert seen["common_inner"].lmax == 6 and seen["common_inner"].outer is not None
        ends["common_inner"].set()
        ends["A"].set()
        return await search

    outcomes = asyncio.run(scenario())
    assert [o.label for o in outcomes] == ["A", "common", "common_inner"]
