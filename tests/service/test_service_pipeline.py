"""Several slices of one run in flight, and fair sharing of the workers among runs.

Which finder job runs when is decided by the test (gated_executor.py: real worker processes, each
job behind a gate the test opens), never by the machine's speed.
"""

from __future__ import annotations

import asyncio
import dataclasses

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.archive import open_archive
from penumbra_server.numerics.slices import Slice
from penumbra_server.numerics.spacetimes import sample_patch
from penumbra_server.server import BackgroundServer, ServerOptions
from penumbra_server.server.dispatch import FairDispatcher
from penumbra_server.server.inner_planning import search_in_order
from penumbra_server.server.jobs import REASON_NOT_SEARCHED, SurfaceJob, SurfaceOutcome
from penumbra_server.server.scheduler import SurfacePlan

from gated_executor import GatedExecutor
from service_support import LONE_CENTRE, box, lone_hole, lone_hole_slice, lone_spec, wait_until


def _events(client, run_id):
    return list(client.watch(run_id, timeout_s=120))


def test_next_slice_starts_from_the_forecast_and_results_apply_in_iteration_order(tmp_path):
    gated = GatedExecutor.start(2)  # two slots: two slices' finds can be at the executor at once
    try:
        with BackgroundServer(archive_root=tmp_path, options=ServerOptions(slices_in_flight=2),
                              executor=gated) as bg, ps.connect(bg.address, deadline_s=30.0) as client:
            run = client.open_run(lone_spec("in flight", queue_depth=4))
            tickets = [run.submit(lone_hole_slice(i)) for i in range(5)]
            assert all(t.result(60).accepted for t in tickets)
            # Slice 0 has no prior (a scan) and slice 1 only a static seed (one position known):
            # each waits for the outcome before it.
            gated.wait_for("arrived", "A", 0)
            gated.open("A", 0)
            gated.open("A", 1)
            gated.wait_for("arrived", "A", 2)
            # Slice 3's find reaches the executor while slice 2's is still held: n + 1 starts
            # before n finishes, seeded from the forecast (slice 2's result is not known yet).
            gated.wait_for("arrived", "A", 3)
            assert gated.entries("done") == [("A", 0), ("A", 1)]
            # Slice 3's find finishes first; slice 2's after it.
            gated.open("A", 3)
            gated.wait_for("done", "A", 3)
            gated.open("A", 2)
            gated.open("A", 4)
            gated.wait_for("done", "A", 4)
            run.close()
            events = _events(client, run.run_id)
    finally:
        gated.close_pool()
    log = [(kind, label, it) for kind, label, it, _ in gated.log]
    assert not gated.seeded("A", 0) and all(gated.seeded("A", i) for i in (1, 2, 3, 4))
    assert log.index(("arrived", "A", 1)) > log.index(("done", "A", 0))
    assert log.index(("arrived", "A", 2)) > log.index(("done", "A", 1))
    assert log.index(("arrived", "A", 3)) < log.index(("done", "A", 2))
    # Two in flight at most: slice 4 waited until slice 2's outcome was applied.
    assert log.index(("arrived", "A", 4)) > log.index(("done", "A", 2))
    assert log.index(("done", "A", 3)) < log.index(("done", "A", 2))
    # Applied, archived and announced in iteration order, whatever order the finds finished in.
    assert [e.seq for e in events] == list(range(1, len(events) + 1))
    assert [e.iteration for e in events if e.kind == "slice_processed"] == [0, 1, 2, 3, 4]
    found = [e for e in events if e.kind == "surface_found"]
    assert [e.iteration for e in found] == [0, 1, 2, 3, 4]
    view = open_archive(tmp_path, run.run_id)
    assert view.slices()["iteration"].tolist() == [0, 1, 2, 3, 4]
    assert view.surface("A")["iteration"].tolist() == [0, 1, 2, 3, 4]
    assert view.surface("A")["event_seq"].tolist() == [e.seq for e in found]
    # The puncture's horizon (area 16 pi m^2, docs/references.md item 1) in every slice.
    assert all(e.surface.area / (16 * np.pi) == pytest.approx(1.0, abs=2e-3) for e in found)


def test_one_slice_at_a_time_when_asked(tmp_path):
    gated = GatedExecutor.start(2)
    try:
        with BackgroundServer(archive_root=tmp_path, options=ServerOptions(slices_in_flight=1),
                              executor=gated) as bg, ps.connect(bg.address, deadline_s=30.0) as client:
            run = client.open_run(lone_spec("one at a time", queue_depth=4))
            assert all(t.result(60).accepted for t in [run.submit(lone_hole_slice(i)) for i in range(2)])
            gated.wait_for("arrived", "A", 0)
            gated.open_all()
            gated.wait_for("done", "A", 1)
            run.close()
            events = _events(client, run.run_id)
    finally:
        gated.close_pool()
    log = [(kind, label, it) for kind, label, it, _ in gated.log]
    assert log.index(("arrived", "A", 1)) > log.index(("done", "A", 0))
    assert gated.seeded("A", 1)  # planned after slice 0's result
    assert [e.iteration for e in events if e.kind == "slice_processed"] == [0, 1]


def _small_job(label: str, iteration: int) -> SurfaceJob:
    """A cheap real job: the lone puncture on a coarse box, two Newton steps at lmax 2."""
    spec = box(LONE_CENTRE, 1.2, 13)
    patch = sample_patch(lone_hole(), origin=spec["origin"], spacing=spec["spacing"], shape=spec["shape"],
                         variable_set="adm")
    data = Slice(time=0.0, iteration=iteration, variable_set="adm", patches=(patch,))
    return SurfaceJob(label=label, data=data, lmax=2, tolerance=1e-6, max_iterations=2, fallback_to_flow=False,
                      scan_centre=np.asarray(LONE_CENTRE), scan_radii=(0.1, 1.0))


def test_a_backlog_of_one_run_does_not_hold_back_another_runs_job():
    gated = GatedExecutor.start(1)

    async def scenario():
        dispatcher = FairDispatcher(gated)  # one slot: one job at the executor at a time
        backlog = [asyncio.ensure_future(dispatcher.run("run-a", _small_job("A", i))) for i in range(20)]
        await asyncio.sleep(0)  # let the first job reach the executor (held at its gate)
        single = asyncio.ensure_future(dispatcher.run("run-b", _small_job("B", 500)))
        await asyncio.sleep(0)
        assert dispatcher.running == 1 and dispatcher.waiting("run-a") == 19 and dispatcher.waiting("run-b") == 1
        gated.open_all()
        outcomes = await asyncio.gather(*backlog, single)
        return dispatcher.dispatched, outcomes

    try:
        dispatched, outcomes = asyncio.run(scenario())
    finally:
        gated.close_pool()
    assert len(outcomes) == 21 and all(o.label in ("A", "B") for o in outcomes)
    arrived = gated.entries("arrived")
    assert [(run, label, it) for run, label, it in dispatched] == \
        [("run-b" if label == "B" else "run-a", label, it) for label, it in arrived]
    # Within one round: after the job already at the executor, one job of the backlog, then B's
    # (first come, first served would have made it wait for all 20).
    assert arrived.index(("B", 500)) == 2
    assert [it for label, it in arrived if label == "A"] == list(range(20))


def test_within_a_run_the_oldest_slice_and_then_a_leading_search_go_first():
    """A run's waiting jobs reach the executor oldest slice first (a later slice's deferred
    searches wait for every search of the earlier ones), and within a slice a search another
    waits for (``leads``: the surface the inner common MOTS lies inside) before the rest."""
    gated = GatedExecutor.start(1)

    async def scenario():
        dispatcher = FairDispatcher(gated)  # one slot
        blocker = asyncio.ensure_future(dispatcher.run("run-a", _small_job("A", 0)))
        await asyncio.sleep(0)  # at the executor, held at its gate
        later = [asyncio.ensure_future(dispatcher.run("run-a", _small_job(label, 2))) for label in ("A", "B")]
        same = [asyncio.ensure_future(dispatcher.run("run-a", _small_job("B", 1))),
                asyncio.ensure_future(dispatcher.run("run-a", dataclasses.replace(_small_job("C", 1), leads=True)))]
        await asyncio.sleep(0)
        assert dispatcher.running == 1 and dispatcher.waiting("run-a") == 4
        gated.open_all()
        await asyncio.gather(blocker, *later, *same)

    try:
        asyncio.run(scenario())
    finally:
        gated.close_pool()
    assert gated.entries("arrived") == [("A", 0), ("C", 1), ("B", 1), ("A", 2), ("B", 2)]


def test_a_leading_search_hands_its_slot_to_the_measurement_of_its_surface():
    """When a ``leads`` job ends, the job its outcome queues next (the surface's measurement, via
    search_in_order, a few event-loop turns later) takes the slot before a later slice's job that
    was waiting already; without the hand-over the later job would."""
    gated = GatedExecutor.start(1)
    box_ = (np.full(3, -1.0), np.full(3, 1.0))
    plans = [SurfacePlan("C", None, None, None, *box_),
             SurfacePlan("C_inner", None, None, None, *box_, inside_of="C", search=False)]

    async def scenario():
        dispatcher = FairDispatcher(gated)  # one slot

        async def attempt(plan):
            if not plan.search:
                return SurfaceOutcome(label=plan.label, found=False, reason=REASON_NOT_SEARCHED, status=-1,
                                      message="not searched")
            job = dataclasses.replace(_small_job(plan.label, 1), leads=plan.leads)
            outcome = await dispatcher.run("run-a", job)
            # As search.py does: the measurement of the surface comes with the outcome.
            return dataclasses.replace(outcome, measurement=_small_job(f"{plan.label} measured", 1))

        async def measure(outcome):
            measured = await dispatcher.run("run-a", outcome.measurement)
            return dataclasses.replace(outcome, measurement=None, message=measured.label)

        search = asyncio.ensure_future(search_in_order(plans, attempt, {}, measure=measure))
        await asyncio.sleep(0)  # the leading job is at the executor, held at its gate
        later = asyncio.ensure_future(dispatcher.run("run-a", _small_job("A", 2)))
        await asyncio.sleep(0)
        assert dispatcher.running == 1 and dispatcher.waiting("run-a") == 1
        gated.open_all()
        return await asyncio.gather(search, later)

    try:
        outcomes, _ = asyncio.run(scenario())
    finally:
        gated.close_pool()
    assert gated.entries("arrived") == [("C", 1), ("C measured", 1), ("A", 2)]
    assert outcomes[0].message == "C measured" and outcomes[0].measurement is None


def test_a_second_run_is_served_within_one_round_of_a_backlog(tmp_path):
    gated = GatedExecutor.start(1)
    try:
        with BackgroundServer(archive_root=tmp_path, options=ServerOptions(slices_in_flight=4),
                              executor=gated) as bg, ps.connect(bg.address, deadline_s=30.0) as client:
            busy = client.open_run(lone_spec("backlog", queue_depth=20), queue_depth=20)
            assert all(t.result(60).accepted for t in [busy.submit(lone_hole_slice(i, nodes=21)) for i in range(20)])
            # A scan, then a static seed: the next slices wait for those outcomes, then go four at a time.
            gated.open("A", 0)
            gated.open("A", 1)
            gated.wait_for("arrived", "A", 2)
            dispatcher = bg.server.manager.dispatcher

            def waiting(run_id):
                async def read():  # on the server's loop, where the dispatcher lives
                    return dispatcher.waiting(run_id)
                return bg.call(read)

            async def read_dispatched():
                return list(dispatcher.dispatched)

            wait_until(lambda: waiting(busy.run_id) == 3, "the backlog's next slices queued at the dispatcher", 120.0)
            other = client.open_run(ps.RunSpec(variable_set="adm", bodies=(ps.Body("B", LONE_CENTRE, 1.0),),
                                               name="single", finder=ps.FinderOptions(lmax=6, tolerance=1e-8)))
            assert other.submit(lone_hole_slice(500, nodes=21)).result(60).accepted
            wait_until(lambda: waiting(other.run_id) == 1, "the second run's job queued at the dispatcher", 120.0)
            before = len(gated.entries("arrived"))
            gated.open_all()
            gated.wait_for("done", "B", 500, timeout_s=300)
            dispatched = bg.call(read_dispatched)  # the backlog is left to the server's stop
    finally:
        gated.close_pool()
    arrived = gated.entries("arrived")
    assert [(label, it) for _, label, it in dispatched] == arrived
    # One job of the backlog at most between the second run's job queueing and its dispatch.
    assert arrived.index(("B", 500)) - before <= 1
    assert {run for run, label, _ in dispatched if label == "B"} == {other.run_id}
