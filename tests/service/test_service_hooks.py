"""The hooks for custom tracking: a planner that adds a surface the spec did
not name, and a slice observer that publishes its own events in sequence."""

from __future__ import annotations

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.archive import open_archive
from penumbra_server.server import BackgroundServer, ExpectedBodiesPlanner, ServerOptions, SurfacePlan

from service_support import LONE_CENTRE, lone_hole_slice, lone_spec


class _WithExtraSurface(ExpectedBodiesPlanner):
    """The expected bodies plus a second look at body A under the label "outer"."""

    def plan(self, settings, tracks, slice_):
        plans = super().plan(settings, tracks, slice_)
        first = plans[0]
        return plans + [SurfacePlan("outer", first.seed, first.scan_centre, first.scan_radii,
                                    first.box_lower, first.box_upper)]


def test_planner_and_observer_hooks(tmp_path):
    observed = []

    def observer(run, item, outcomes):
        observed.append((item.iteration, sorted(o.label for o in outcomes)))
        run.publish(lambda event: None, iteration=item.iteration)  # an event of a kind to come

    options = ServerOptions(workers=2, planner_factory=lambda settings: _WithExtraSurface(),
                            slice_observer_factory=lambda settings: [observer])
    with BackgroundServer(archive_root=tmp_path, workers=2, options=options) as bg:
        with ps.connect(bg.address) as client:
            run = client.open_run(lone_spec("hooks"), cache_results=False)
            for i in range(2):
                run.submit(lone_hole_slice(i))
            assert run.flush(60)
            run.close()
            events = list(client.watch(run.run_id, timeout_s=600))
    assert observed == [(0, ["A", "outer"]), (1, ["A", "outer"])]
    assert [e.seq for e in events] == list(range(1, len(events) + 1))
    kinds = [e.kind for e in events]
    # each slice: two surfaces, then slice_processed, then the observer's event
    assert kinds.count("other") == 2
    for index, kind in enumerate(kinds):
        if kind == "other":
            assert kinds[index - 1] == "slice_processed"
    found = [e.surface for e in events if e.kind == "surface_found"]
    assert sorted(s.label for s in found) == ["A", "A", "outer", "outer"]
    for s in found:  # docs/references.md item 1: area 16 pi m^2
        assert s.area == pytest.approx(16 * np.pi, rel=2e-3)
    view = open_archive(tmp_path, run.run_id)
    assert view.surface_labels == ("A", "outer")
    assert view.surface("outer")["iteration"].tolist() == [0, 1]
    assert np.allclose(view.surface("outer")["centroid"], LONE_CENTRE, atol=0.02)


class _FailsOnce(ExpectedBodiesPlanner):
    """A planner with a bug that shows on the first slice only."""

    def __init__(self):
        self.calls = 0

    def plan(self, settings, tracks, slice_):
        self.calls += 1
        if self.calls == 1:
            raise ZeroDivisionError("planner bug")
        return super().plan(settings, tracks, slice_)


def test_a_failing_planner_marks_the_slice_failed_and_the_run_goes_on(tmp_path):
    options = ServerOptions(workers=1, planner_factory=lambda settings: _FailsOnce())
    with BackgroundServer(archive_root=tmp_path, workers=1, options=options) as bg:
        with ps.connect(bg.address) as client:
            run = client.open_run(lone_spec("failing planner"), cache_results=False)
            for i in range(2):
                run.submit(lone_hole_slice(i))
            assert run.flush(60)
            run.close()
            events = list(client.watch(run.run_id, timeout_s=600))
    processed = {e.iteration: e for e in events if e.kind == "slice_processed"}
    assert "ZeroDivisionError: planner bug" in processed[0].error and processed[0].surfaces_attempted == 0
    assert processed[1].error == "" and processed[1].surfaces_found == 1
    outcome = open_archive(tmp_path, run.run_id).slices()["outcome"].tolist()
    assert outcome == [3, 1]  # failed, processed
