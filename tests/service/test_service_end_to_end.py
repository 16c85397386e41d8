"""End to end through the shim: real server, real worker processes, real zarr on disk.

Published checks:
* A lone Brill-Lindquist puncture is Schwarzschild in isotropic coordinates: horizon area
  16 pi m^2, irreducible mass m (docs/references.md item 1: Baumgarte & Shapiro, Numerical
  Relativity, Cambridge 2010, ch. 3 and 7).
* Two Brill-Lindquist punctures far apart: each individual horizon's irreducible mass is close
  to m_i (1 + m_j / (2 d)) (docs/references.md item 7, leading order from the conformal factor).
"""

from __future__ import annotations

import time

import numpy as np
import pytest
import zarr

import penumbra_shim as ps
from penumbra_server.archive import open_archive
from penumbra_server.numerics.finder import SUCCESS_STATUSES
from penumbra_server.numerics.spacetimes import BrillLindquist

from service_support import LONE_CENTRE, box, lone_hole_slice, lone_spec, patch_data


def _close_and_collect(client, run) -> list[ps.Event]:
    run.close()
    return list(client.watch(run.run_id, from_seq=1, timeout_s=600))


def _assert_gap_free(events):
    assert [e.seq for e in events] == list(range(1, len(events) + 1))


@pytest.mark.parametrize(
    "variable_set, memory_order",
    [("adm", "C"), ("conformal_w", "F")],
)
def test_lone_hole_area_is_16_pi_m2_and_every_result_is_archived(client, archive_root, variable_set, memory_order):
    mass = 1.0
    spec = ps.RunSpec(variable_set=variable_set, bodies=(ps.Body("A", LONE_CENTRE, mass),), name="lone",
                      finder=ps.FinderOptions(lmax=6))
    run = client.open_run(spec)
    tickets = [run.submit(lone_hole_slice(i, mass=mass, variable_set=variable_set, memory_order=memory_order))
               for i in range(3)]
    acks = [t.result(60) for t in tickets]
    assert all(a.accepted and not a.duplicate for a in acks)
    events = _close_and_collect(client, run)
    _assert_gap_free(events)
    assert events[0].kind == "run_state_changed" and events[0].state == "open"
    assert events[-1].kind == "run_state_changed" and events[-1].state == "closed"
    found = [e for e in events if e.kind == "surface_found"]
    assert [e.iteration for e in found] == [0, 1, 2]
    for e in found:
        s = e.surface
        # docs/references.md item 1: area 16 pi m^2, irreducible mass m (grid h = 0.075 m, lmax 6)
        assert s.area / (16 * np.pi * mass**2) == pytest.approx(1.0, abs=2e-3)
        assert s.irreducible_mass == pytest.approx(mass, abs=1e-3)
        assert np.allclose(s.centroid, LONE_CENTRE, atol=0.02)
        assert s.radius_mean == pytest.approx(0.5 * mass, rel=0.02)  # r = m/2 (item 1)
        assert s.coefficients.shape == (49,) and s.lmax == 6
        assert s.latency_s > 0 and s.wall_time_s > 0
    processed = [e for e in events if e.kind == "slice_processed"]
    assert [(e.iteration, e.surfaces_found) for e in processed] == [(0, 1), (1, 1), (2, 1)]
    info = client.get_run(run.run_id)
    assert (info.last_received_iteration, info.last_received_time) == (2, pytest.approx(0.2))
    assert (info.slices_received, info.slices_processed, info.slices_skipped) == (3, 3, 0)

    # The archive holds every announced result, row for row, and xarray opens it.
    view = open_archive(archive_root, run.run_id)
    assert view.state == "closed" and view.run_spec["variable_set"] == variable_set
    rows = view.surface("A")
    assert rows["event_seq"].tolist() == [e.seq for e in found]
    np.testing.assert_array_equal(rows["area"], [e.surface.area for e in found])
    np.testing.assert_array_equal(rows["coefficients"], np.stack([e.surface.coefficients for e in found]))
    assert rows["found"].all() and np.isin(rows["status"], SUCCESS_STATUSES).all()
    slices = view.slices()
    assert slices["iteration"].tolist() == [0, 1, 2] and (slices["outcome"] == 1).all()
    assert (slices["latency_s"] > 0).all() and (slices["bytes"] == acks[0].bytes_sent).all()
    raw = zarr.open_group(str(view.path), mode="r")
    assert raw["surfaces/A/area"].shape == (3,)
    xr = pytest.importorskip("xarray")
    ds = xr.open_zarr(str(view.path), group="surfaces/A", consolidated=False)
    np.testing.assert_array_equal(ds["area"].values, rows["area"])
    assert ds["coefficients"].dims == ("time", "harmonic")


def test_two_punctures_far_apart_have_the_leading_order_irreducible_masses(client, archive_root):
    # Unequal bare masses at coordinate separation d = 3 (units of the total bare mass 1).
    m1, m2 = 0.6, 0.4
    p1 = np.array([1.213, 0.011, -0.007])
    p2 = np.array([-1.787, -0.013, 0.009])
    d = float(np.linalg.norm(p1 - p2))
    spacetime = BrillLindquist(masses=(m1, m2), positions=(p1, p2))
    boxes = [box((-0.3, 0, 0), 3.4, 33, level=0), box(p1, 0.9, 25, level=1), box(p2, 0.6, 25, level=1)]
    spec = ps.RunSpec(variable_set="conformal_chi",
                      bodies=(ps.Body("A", tuple(p1 + 0.05), m1), ps.Body("B", tuple(p2 - 0.04), m2)),
                      name="two punctures", finder=ps.FinderOptions(lmax=6))
    run = client.open_run(spec)
    for iteration in range(2):
        run.submit(ps.build_slice(time=0.5 * iteration, iteration=iteration, variable_set="conformal_chi",
                                  patches=[patch_data(spacetime, b, variable_set="conformal_chi") for b in boxes]))
    assert run.flush(60)
    events = _close_and_collect(client, run)
    _assert_gap_free(events)
    found = {(e.surface.label, e.iteration): e.surface for e in events if e.kind == "surface_found"}
    assert set(found) == {("A", 0), ("B", 0), ("A", 1), ("B", 1)}
    for (label, _), s in found.items():
        m, other, centre = (m1, m2, p1) if label == "A" else (m2, m1, p2)
        # docs/references.md item 7 (leading order in m/d): M_irr ~ m_i (1 + m_j / (2 d))
        assert s.irreducible_mass == pytest.approx(m * (1 + other / (2 * d)), rel=5e-3)
        assert np.linalg.norm(s.centroid - centre) < 0.05
    # The second slice was seeded from the first (same data): its Newton solve starts at the
    # converged surface (l = 1 part dropped) and needs fewer iterations than the first, which
    # started from a sphere scan (3 against 4 here; the scan's own radial search is not counted).
    for label in ("A", "B"):
        seeded, scanned = found[(label, 1)], found[(label, 0)]
        assert seeded.iterations < scanned.iterations, (label, seeded.iterations, scanned.iterations)
    assert run.latest_surfaces()["A"].latest_found.iteration == 1
    view = open_archive(archive_root, run.run_id)
    for label in ("A", "B"):  # the archive records the seed of the second slice only
        assert view.surface(label)["seed_model"].tolist()[0] == 0 and view.surface(label)["seed_model"].tolist()[1] > 0
    assert view.committed_rows["surfaces/A"] == 2 and view.committed_rows["surfaces/B"] == 2


def test_latest_surfaces_cache_and_unary_call_agree(client):
    run = client.open_run(lone_spec("latest"))
    run.submit(lone_hole_slice(7))
    for event in run.events(from_seq=1, timeout_s=60):
        if event.kind == "slice_processed" and event.iteration == 7:
            break
    else:
        pytest.fail("no slice_processed event for iteration 7 within 60 s")
    cached = None
    deadline = time.monotonic() + 60
    while cached is None or cached.latest_found is None:  # the follower thread sees it after this stream
        if time.monotonic() > deadline:
            pytest.fail("the run handle's cache did not see the found surface within 60 s")
        time.sleep(0.05)
        cached = run.latest_surfaces().get("A")
    fresh = client.latest_surfaces(run.run_id)["A"]  # the unary call, not the cache
    assert fresh.latest_attempt_found and fresh.latest_found.iteration == 7 and fresh.consecutive_misses == 0
    assert fresh.latest_found.area == pytest.approx(16 * np.pi, rel=2e-3)  # docs/references.md item 1
    assert cached.latest_found.iteration == 7 and cached.latest_found.area == fresh.latest_found.area
    np.testing.assert_array_equal(cached.latest_found.coefficients, fresh.latest_found.coefficients)
    run.close()
    assert client.get_run(run.run_id).state == "closed"
