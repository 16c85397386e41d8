"""The inner common MOTS through the service: an equal-mass Brill-Lindquist pair whose separation
decreases through the critical one (d_c = 0.766 M for two bare masses 0.5; independent
axisymmetric calculation, tests/numerics/axisymmetric_mots.py). The inner common MOTS is found
in the slice where the common horizon first is, inside it and larger in area, followed in every
later slice, streamed and archived under its own label; RunSpec.inner_common False turns it off.
The archive keeps the surface itself in the displacement representation (not only its
star-shaped fit), and a restarted server follows it from there.
"""

from __future__ import annotations

import shutil
import time

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.archive import METHOD_CODES, ArchiveWriter, open_archive
from penumbra_server.numerics.displaced import DisplacedSurface, embedding, parametric_area, reference_from_star
from penumbra_server.numerics.spacetimes import BrillLindquist
from penumbra_server.numerics.surfaces import Surface
from penumbra_server.server import BackgroundServer
from penumbra_server.server._convert import (displacement_from_wire, displacement_to_wire, surface_event_from_row,
                                             surface_row)

from tracking_support import bl_patches, cube

MASS = 0.5
SEPARATIONS = (0.80, 0.78, 0.76, 0.74, 0.72, 0.70)  # M, through d_c = 0.766 M
SPACING = 0.05
LMAX = 8


def _spec(inner_common: bool) -> ps.RunSpec:
    return ps.RunSpec(variable_set="conformal_w", name="inner common MOTS",
                      bodies=(ps.Body("A", (0.4, 0.0, 0.0), MASS), ps.Body("B", (-0.4, 0.0, 0.0), MASS)),
                      finder=ps.FinderOptions(lmax=LMAX, tolerance=1e-8),
                      backlog=ps.BacklogOptions(queue_depth=len(SEPARATIONS)),
                      refinement=ps.RefinementOptions(steering_interval=1.0), inner_common=inner_common)


def _run_sequence(client, inner_common: bool, separations=SEPARATIONS):
    run = client.open_run(_spec(inner_common), cache_results=False)
    box = cube((0.0, 0.0, 0.0), 1.3, SPACING)
    for index, d in enumerate(separations):
        positions = np.array([[d / 2, 0.0, 0.0], [-d / 2, 0.0, 0.0]])
        run.submit(ps.build_slice(time=0.5 * index, iteration=index, variable_set="conformal_w",
                                  patches=bl_patches([box], (MASS, MASS), positions)))
    assert run.flush(120)
    # Wait for the processing here (generous, fails loudly) rather than inside CloseRun, whose
    # deadline a loaded machine can exceed.
    give_up = time.monotonic() + 900
    while client.get_run(run.run_id).slices_processed < len(separations):
        assert time.monotonic() < give_up, f"slices not processed in 900 s: {client.get_run(run.run_id)}"
        time.sleep(0.5)
    run.close()
    reports = {}
    for e in client.watch(run.run_id, timeout_s=120):
        if e.kind in ("surface_found", "surface_not_found"):
            assert (e.iteration, e.surface.label) not in reports, "one status per surface per slice"
            reports[(e.iteration, e.surface.label)] = e.surface
    return run, reports


@pytest.mark.slow  # about a minute on a loaded machine: six slices, four with common searches
def test_inner_common_mots_appears_with_the_common_horizon_and_is_followed(client, stub, archive_root):
    run, reports = _run_sequence(client, inner_common=True)
    common = [i for i in range(len(SEPARATIONS)) if (i, "common") in reports and reports[i, "common"].found]
    assert common and common[0] == 2, f"common horizon first at slices {common}"  # d = 0.76 < d_c
    inner = {i: reports[i, "common_inner"] for i in range(len(SEPARATIONS)) if (i, "common_inner") in reports}
    print("\n" + "\n".join(f"d = {SEPARATIONS[i]:.2f} M: common area {reports[i, 'common'].area:.5f}, inner "
                           f"{'area %.5f' % s.area if s.found else 'not found: ' + s.message[:160]}"
                           for i, s in sorted(inner.items())))
    # planned with the common surface; searched only where the common one was found
    for i, report in inner.items():
        if i not in common:
            assert not report.found and "not searched" in report.message
    # found in the slice the common horizon first is, and in every later one
    assert [i for i, s in inner.items() if s.found] == common
    # the surfaces themselves, in the displacement representation, from the raw stream
    wire = {}
    for response in stub.WatchRun(pb.WatchRunRequest(run_id=run.run_id, start_seq=1), timeout=60):
        event = response.event
        if event.WhichOneof("kind") == "surface_found" and event.surface_found.surface.label == "common_inner":
            wire[event.iteration] = event.surface_found.surface
    assert sorted(wire) == common
    for i in common:
        outer, found = reports[i, "common"], inner[i]
        assert found.method == "displacement" and wire[i].HasField("displacement")
        surface = displacement_from_wire(wire[i].displacement)
        # inside the common horizon, distinct from it, and (the unstable saddle) larger in area
        outer_surface = Surface(outer.centre, outer.lmax, outer.coefficients)
        points = embedding(surface, surface.grid_lmax() + 2).x
        rel = points - outer_surface.centre
        dist = np.linalg.norm(rel, axis=1)
        radius = outer_surface.radius(np.arccos(rel[:, 2] / dist), np.arctan2(rel[:, 1], rel[:, 0]))
        assert np.all(dist < radius + 1e-3) and np.max(radius - dist) > 5e-3
        assert found.area > outer.area
        # the reported area is that of the streamed surface (exact data here: the slices' own)
        d = SEPARATIONS[i]
        exact = BrillLindquist(masses=[MASS, MASS], positions=[[d / 2, 0, 0], [-d / 2, 0, 0]])
        assert parametric_area(surface, exact.geometry) == pytest.approx(found.area, rel=1e-3)
    # the two separate as d moves below d_c
    gaps = [inner[i].area - reports[i, "common"].area for i in common]
    assert gaps[-1] > gaps[0]
    # near formation the outer common MOTS is stable and the inner one unstable (Andersson, Mars
    # & Simon, PRL 95, 111102 (2005), from memory), both eigenvalues moving away from zero as
    # the two separate (tests/numerics/test_inner_mots.py checks the values against the fold)
    for i in common:
        print(f"d = {SEPARATIONS[i]:.2f} M: stability outer {reports[i, 'common'].stability_eigenvalue:+.5f}, "
              f"inner {inner[i].stability_eigenvalue:+.5f} +- {inner[i].stability_eigenvalue_error:.1e} / M^2")
        assert reports[i, "common"].stability_eigenvalue > 0 > inner[i].stability_eigenvalue
        assert abs(inner[i].stability_eigenvalue) > 10 * inner[i].stability_eigenvalue_error
    assert inner[common[-1]].stability_eigenvalue < inner[common[0]].stability_eigenvalue

    view = open_archive(archive_root, run.run_id)
    assert "common_inner" in view.surface_labels
    rows = view.surface("common_inner")
    assert rows["found"].tolist() == [inner[i].found for i in sorted(inner)]
    assert set(rows["method"][rows["found"]].tolist()) == {METHOD_CODES["displacement"]}
    assert rows["stability_eigenvalue"][rows["found"]].tolist() == [inner[i].stability_eigenvalue for i in common]
    # the archived displacement form is the streamed surface, exactly
    archived = [d for d, found in zip(view.displacements("common_inner"), rows["found"]) if found]
    assert len(archived) == len(common) and all(d is not None for d in archived)
    for i, d in zip(common, archived):
        streamed = displacement_from_wire(wire[i].displacement)
        assert d.lmax == streamed.lmax and d.reference_lmax == streamed.reference.lmax
        assert np.array_equal(d.coefficients, streamed.coefficients)
        assert np.array_equal(d.surface().reference.position, streamed.reference.position)
        assert np.array_equal(d.surface().reference.direction, streamed.reference.direction)
    # the star-shaped surfaces have none
    assert all(d is None for d in view.displacements("common"))


@pytest.mark.slow
def test_inner_common_search_can_be_turned_off(client, archive_root):
    run, reports = _run_sequence(client, inner_common=False, separations=SEPARATIONS[:4])
    assert any(label == "common" and s.found for (_, label), s in reports.items())
    assert not any(label == "common_inner" for (_, label) in reports)
    assert "common_inner" not in open_archive(archive_root, run.run_id).surface_labels


# -- the displacement form in the archive, without a server -------------------------------------

def _found_event(seq: int, label: str, lmax: int, displaced: DisplacedSurface | None) -> pb.RunEvent:
    """A surface_found event as the service announces it; NaN star-shaped coefficients when the
    surface comes in the displacement form (as once the inner MOTS folds)."""
    coefficients = np.full((lmax + 1) ** 2, np.nan) if displaced is not None else np.r_[1.0, np.zeros(lmax * (lmax + 2))]
    event = pb.RunEvent(seq=seq, run_id="r", time_m=0.5 * seq, iteration=seq)
    event.surface_found.surface.CopyFrom(pb.SurfaceResult(
        label=label, time_m=0.5 * seq, iteration=seq, centre_m=pb.Vector3(x=0.1, y=0.0, z=0.0), lmax=lmax,
        coefficients_m=coefficients.tolist(), quantities=pb.SurfaceQuantities(area_m2=1.0), method="displacement",
        displacement=displacement_to_wire(displaced)))
    return event


def _displaced(lmax: int, seed: int) -> DisplacedSurface:
    """A folded-looking test surface: a sphere's reference (degree lmax + 2) plus a random h."""
    reference = reference_from_star(Surface.sphere([0.1, -0.05, 0.02], 0.9, lmax))
    rng = np.random.default_rng(seed)
    return DisplacedSurface(reference, lmax, 0.05 * rng.standard_normal((lmax + 1) ** 2))


def test_archive_keeps_the_displacement_form_and_reads_without_it(tmp_path):
    lmax = 6
    writer = ArchiveWriter.create(tmp_path, "r", name="displacement", run_spec={}, surface_labels=["A"], lmax=4,
                                  software_version="test")
    writer.add_surface("common_inner", lmax=lmax)
    surfaces = [_displaced(lmax, 1), _displaced(lmax, 2)]
    events = [_found_event(1, "common_inner", lmax, surfaces[0]), _found_event(2, "common_inner", lmax, None),
              _found_event(3, "common_inner", lmax, surfaces[1])]
    missed = pb.RunEvent(seq=4, run_id="r", time_m=2.0, iteration=4)
    missed.surface_not_found.CopyFrom(pb.SurfaceNotFound(label="common_inner", reason=1, message="no"))
    # A displacement of higher degree than the group holds: the row is archived without it.
    too_fine = _found_event(5, "common_inner", lmax, _displaced(lmax + 1, 3))
    rows = [surface_row(e, 0.0)[1] for e in (*events, missed, too_fine)]
    writer.commit(surface_rows={"common_inner": rows}, fold=True)  # in the zarr arrays (edited below)

    view = open_archive(tmp_path, "r")
    got = view.displacements("common_inner")
    assert [d is None for d in got] == [False, True, False, True, True]
    for archived, surface in zip((got[0], got[2]), surfaces):
        rebuilt = archived.surface()
        assert rebuilt.lmax == lmax and rebuilt.reference.lmax == lmax + 2
        assert np.array_equal(rebuilt.coefficients, surface.coefficients)
        assert np.array_equal(rebuilt.reference.position, surface.reference.position)
        assert np.array_equal(embedding(rebuilt, 10).x, embedding(surface, 10).x)
    # the event rebuilt from the row (a restart's replay) carries the streamed displacement
    cols = view.surface("common_inner")
    replayed = [surface_event_from_row("r", "common_inner", {k: v[i] for k, v in cols.items()}, lmax)
                for i in range(len(rows))]
    assert replayed[0].surface_found.surface.displacement == events[0].surface_found.surface.displacement
    assert replayed[2].surface_found.surface.displacement == events[2].surface_found.surface.displacement
    assert not replayed[1].surface_found.surface.HasField("displacement")
    assert not replayed[4].surface_found.surface.HasField("displacement")

    # An archive written before the displacement columns existed: read as none, and a writer
    # re-opening it adds them (old rows: none) and archives new rows with them.
    for path in (tmp_path / "r.zarr" / "surfaces" / "common_inner").glob("displacement*"):
        shutil.rmtree(path)
    old = open_archive(tmp_path, "r")
    assert "displacement" not in old.surface("common_inner")
    assert old.displacements("common_inner") == [None] * len(rows)
    old_cols = old.surface("common_inner")
    event = surface_event_from_row("r", "common_inner", {k: v[0] for k, v in old_cols.items()}, lmax)
    assert event.surface_found.surface.label == "common_inner"
    assert not event.surface_found.surface.HasField("displacement")
    reopened = ArchiveWriter.open_existing(tmp_path / "r.zarr")
    reopened.commit(surface_rows={"common_inner": [surface_row(events[0], 0.0)[1]]})
    got = open_archive(tmp_path, "r").displacements("common_inner")
    assert [d is None for d in got] == [True] * len(rows) + [False]
    assert np.array_equal(got[-1].coefficients, surfaces[0].coefficients)


def _wait_processed(client, run_id: str, count: int) -> None:
    give_up = time.monotonic() + 900  # generous: a loaded machine; fails loudly
    while client.get_run(run_id).slices_processed < count:
        assert time.monotonic() < give_up, f"{count} slices not processed in 900 s: {client.get_run(run_id)}"
        time.sleep(0.5)


@pytest.mark.slow  # three slices with common searches and a server restart
def test_a_restarted_server_follows_the_archived_inner_mots(tmp_path):
    separations = (0.76, 0.74, 0.72)  # M, all below d_c
    box = cube((0.0, 0.0, 0.0), 1.3, SPACING)

    def submit(run, index):
        d = separations[index]
        positions = np.array([[d / 2, 0.0, 0.0], [-d / 2, 0.0, 0.0]])
        return run.submit(ps.build_slice(time=0.5 * index, iteration=index, variable_set="conformal_w",
                                         patches=bl_patches([box], (MASS, MASS), positions)))

    first = BackgroundServer("127.0.0.1:0", archive_root=tmp_path, workers=1).start()
    address = first.address
    client = ps.connect(address, deadline_s=1.0, retry_budget_s=120.0)
    try:
        run = client.open_run(_spec(True), max_retry_s=120.0, cache_results=False)
        for index in range(2):
            assert submit(run, index).result(120).accepted
        _wait_processed(client, run.run_id, 2)
        live = first.server.manager.runs[run.run_id].displaced.get("common_inner")
        first.stop()
        second = BackgroundServer(address, archive_root=tmp_path, workers=1).start()
        try:
            assert second.server.restored_run_ids == [run.run_id]
            # the restored run holds the follow seed the live one held: the archived surface
            restored = second.server.manager.runs[run.run_id]
            seed = restored.displaced.get("common_inner")
            assert live is not None and seed is not None
            assert seed.lmax == live.lmax and np.array_equal(seed.coefficients, live.coefficients)
            assert np.array_equal(seed.reference.position, live.reference.position)
            assert np.array_equal(seed.reference.direction, live.reference.direction)
            state = restored.states["common_inner"]
            assert state.ever_found and state.misses == 0  # so the next slice's plan follows it
            assert submit(run, 2).result(120).accepted
            _wait_processed(client, run.run_id, 3)
            run.close()
            inner = {e.iteration: e.surface for e in client.watch(run.run_id, timeout_s=120)
                     if e.kind in ("surface_found", "surface_not_found") and e.surface.label == "common_inner"}
        finally:
            second.stop()
    finally:
        client.close()
    # found before the restart and after it
    found = sorted(i for i, s in inner.items() if s.found)
    assert 1 in found and 2 in found, inner
