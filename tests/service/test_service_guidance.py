"""Refinement guidance and data windows through the service, on the demo-like unequal
Brill-Lindquist pair (bare masses 0.6 + 0.4) on a shrinking circular track
(service/penumbra_server/cli/demo_scenario.py):

* the recommended finest region always contains the horizon found in the next slice;
* regions merge when their spheres overlap and separate only when clear by a margin (hysteresis
  through the steering), so an approaching pair switches at most once per level;
* the finest spacing puts the requested points across the smallest coordinate diameter;
* the latest guidance is the same from the shim's cache, the unary call and the event stream;
* a run that sends slices cropped to the server's data windows finds the same surfaces as one
  that sends them whole (the crop keeps every node the server's own crop takes), at a fraction
  of the bytes;
* a slice lacking data a surface needs gives a warning naming the surface, and grows its window.
"""

from __future__ import annotations

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.archive import open_archive
from penumbra_server.server.jobs import SERVICE_INTERPOLATION_ORDER

from service_support import LONE_CENTRE, lone_hole_slice, lone_spec
from tracking_support import demo_like_scenario, scenario_bodies, scenario_slice, surface_points, wait_for_windows

SLICES = 12
POINTS_ACROSS = 24


def _spec(name: str) -> ps.RunSpec:
    scenario = demo_like_scenario()
    return ps.RunSpec(variable_set="conformal_w", bodies=scenario_bodies(scenario), name=name,
                      finder=ps.FinderOptions(lmax=8, tolerance=1e-8), backlog=ps.BacklogOptions(queue_depth=SLICES),
                      refinement=ps.RefinementOptions(points_across_horizon=POINTS_ACROSS, steering_interval=0.5,
                                                      nesting_depth=5))


def _send_in_step(run: ps.RunHandle, scenario, count: int) -> None:
    """Each slice after the previous one's windows reached the shim (as an evolution regridding
    every slice would), so that every crop uses the windows made for it."""
    for index in range(count):
        assert run.submit(scenario_slice(scenario, index)).result(60).accepted
        wait_for_windows(run, scenario.iteration_of(index))


def _surfaces(events) -> dict:
    return {(e.iteration, e.surface.label): e.surface for e in events if e.kind == "surface_found"}


def _smallest_diameter(report: ps.SurfaceReport, samples: int = 64) -> float:
    """min over directions of h(n) + h(-n), from the reported coefficients (independent sampling)."""
    from penumbra_server.numerics.surfaces import Surface

    surface = Surface(report.centre, report.lmax, report.coefficients)
    theta = (np.arange(samples) + 0.5) * np.pi / samples
    phi = np.arange(2 * samples) * np.pi / samples
    tt, pp = (a.ravel() for a in np.meshgrid(theta, phi, indexing="ij"))
    return float(np.min(surface.radius(tt, pp) + surface.radius(np.pi - tt, pp + np.pi)))


@pytest.fixture(scope="module")
def full_and_cropped_runs(server, archive_root):
    scenario = demo_like_scenario()
    with ps.connect(server.address, deadline_s=20.0) as client:
        full = client.open_run(_spec("demo-like, whole slices"))
        _send_in_step(full, scenario, SLICES)
        cached = full.latest_guidance()
        unary = client.latest_guidance(full.run_id)
        full.close()
        cropped = client.open_run(_spec("demo-like, cropped slices"), crop_to_windows=True)
        _send_in_step(cropped, scenario, SLICES)
        cropped.close()
        yield {
            "scenario": scenario, "full": full, "cropped": cropped, "cached": cached, "unary": unary,
            "full_events": list(client.watch(full.run_id, timeout_s=600)),
            "cropped_events": list(client.watch(cropped.run_id, timeout_s=600)),
            "archive_root": archive_root,
        }


def test_finest_region_contains_the_next_slices_horizon(full_and_cropped_runs):
    events = full_and_cropped_runs["full_events"]
    scenario = full_and_cropped_runs["scenario"]
    found = _surfaces(events)
    guidance = {e.iteration: e.guidance for e in events if e.kind == "refinement_guidance"}
    iterations = [scenario.iteration_of(i) for i in range(SLICES)]
    assert sorted(guidance) == iterations, "guidance after every slice"
    checked = 0
    worst = np.inf
    for now, following in zip(iterations[:-1], iterations[1:]):
        g = guidance[now]
        assert g.valid_from <= scenario.time_of(iterations.index(following)) <= g.valid_until
        for label in ("heavy", "light"):
            assert (following, label) in found, f"{label} lost at iteration {following}"
            points = surface_points(found[(following, label)])
            region = g.region_of(label)  # the region covering it on its finest level
            assert region.sphere_contains(points).all(), (now, label)
            assert region.box_contains(points).all(), (now, label)
            worst = min(worst, region.radius - float(np.max(np.linalg.norm(points - region.centre, axis=1))))
            checked += 1
    print(f"\nguidance containment: {checked} of {checked} next-slice horizons inside the finest region "
          f"(sphere and box forms); smallest clearance {worst:.3f} M")
    assert checked == 2 * (SLICES - 1)


def _merged_by_level(g) -> dict[int, bool]:
    a, b = g.body("heavy"), g.body("light")
    return {level: len(g.regions_at(level)) == 1 for level in range(1, min(a.finest_level, b.finest_level) + 1)}


def test_regions_merge_when_their_spheres_overlap_and_separate_only_when_clear(full_and_cropped_runs):
    # The steering passes each slice's guidance to the next as ``previous`` (tracking.guidance,
    # hysteresis): overlapping spheres always share a region; a merged pair whose spheres no
    # longer overlap stays merged, saying so, until clear by the policy's separation margin.
    events = full_and_cropped_runs["full_events"]
    merged_seen = separate_seen = 0
    for g in (e.guidance for e in events if e.kind == "refinement_guidance"):
        a, b = g.body("heavy"), g.body("light")
        for level in range(1, min(a.finest_level, b.finest_level) + 1):
            regions = g.regions_at(level)
            distance = np.linalg.norm(a.centre - b.centre)
            reach = a.radii[level - 1] + b.radii[level - 1]
            if distance < reach:
                assert [set(r.bodies) for r in regions] == [{"heavy", "light"}]
                region = regions[0]
                assert region.merged and "merged" in region.reason
                # The merged sphere holds both spheres; the box is the union of the boxes.
                for body in (a, b):
                    assert region.sphere_contains(body.centre[None, :], body.radii[level - 1]).all()
                    np.testing.assert_array_less(region.lower - 1e-12, body.lower[level - 1])
                    np.testing.assert_array_less(body.upper[level - 1], region.upper + 1e-12)
                merged_seen += 1
            elif len(regions) == 1:
                assert "hysteresis" in regions[0].reason and distance <= 1.25 * reach
                merged_seen += 1
            else:
                assert sorted(r.bodies for r in regions) == [("heavy",), ("light",)]
                separate_seen += 1
    print(f"\nregions per level: {merged_seen} merged, {separate_seen} separate")
    assert merged_seen and separate_seen


def test_the_approaching_pair_switches_between_merged_and_separate_at_most_once_per_level(full_and_cropped_runs):
    states: dict[int, list[bool]] = {}
    for g in (e.guidance for e in full_and_cropped_runs["full_events"] if e.kind == "refinement_guidance"):
        for level, merged in _merged_by_level(g).items():
            states.setdefault(level, []).append(merged)
    switches = {level: sum(x != y for x, y in zip(s, s[1:])) for level, s in states.items()}
    print(f"\nmerged/separate switches per level over {SLICES} slices: {switches}")
    assert states and all(count <= 1 for count in switches.values())


def test_finest_spacing_follows_the_points_across_the_horizon(full_and_cropped_runs):
    events = full_and_cropped_runs["full_events"]
    found = _surfaces(events)
    for e in (e for e in events if e.kind == "refinement_guidance"):
        g = e.guidance
        assert g.policy.points_across_horizon == POINTS_ACROSS and g.policy.nesting_depth == 5
        spacings = {b.label: b.finest_spacing for b in g.bodies}
        for b in g.bodies:
            diameter = _smallest_diameter(found[(e.iteration, b.label)])
            assert b.horizon_min_diameter == pytest.approx(diameter, rel=2e-3)
            assert b.required_spacing == pytest.approx(b.horizon_min_diameter / POINTS_ACROSS)
            # The finest level of each body meets the points across, at most one level ratio finer.
            assert b.horizon_min_diameter / b.finest_spacing >= POINTS_ACROSS * (1 - 1e-12)
            assert b.horizon_min_diameter / b.finest_spacing < 2 * POINTS_ACROSS
            np.testing.assert_allclose(b.spacings[:-1] / b.spacings[1:], 2.0)
            np.testing.assert_allclose(b.radii[:-1] / b.radii[1:], 2.0)
            assert set(b.reasons) >= {"required_spacing", "finest_spacing", "horizon", "motion", "uncertainty",
                                      "guard", "finest_radius"}
            assert b.finest_radius == pytest.approx(sum(b.margins.values()))
        # The run's finest spacing is set by the smaller horizon; levels are factor 2 apart.
        finest = min(spacings.values())
        for level in range(1, 6):
            for region in g.regions_at(level):
                assert region.spacing == pytest.approx(finest * 2.0 ** (5 - level))


def test_latest_guidance_is_cached_served_and_streamed_alike(full_and_cropped_runs):
    runs = full_and_cropped_runs
    events = runs["full_events"]
    last_guidance = [e for e in events if e.kind == "refinement_guidance"][-1].guidance
    last_windows = [e for e in events if e.kind == "data_windows_wanted"][-1].windows
    for g in (runs["cached"], runs["unary"]):
        assert g is not None and g.iteration == last_guidance.iteration
        assert g.windows is not None and g.windows.iteration == last_windows.iteration
        assert [b.label for b in g.bodies] == [b.label for b in last_guidance.bodies]
        for mine, theirs in zip(g.bodies, last_guidance.bodies):
            np.testing.assert_array_equal(mine.radii, theirs.radii)
            np.testing.assert_array_equal(mine.lower, theirs.lower)
        assert [w.name for w in g.windows.windows] == [w.name for w in last_windows.windows]
    # The order of a slice's events: surfaces, tracks, guidance, windows, slice processed.
    kinds = [e.kind for e in events if e.iteration == last_guidance.iteration and e.kind != "run_state_changed"]
    assert kinds[-3:] == ["refinement_guidance", "data_windows_wanted", "slice_processed"]
    assert kinds.index("track_updated") > max(i for i, k in enumerate(kinds) if k.startswith("surface"))


def test_cropped_sends_find_the_same_surfaces_at_a_fraction_of_the_bytes(full_and_cropped_runs):
    runs = full_and_cropped_runs
    full, cropped = _surfaces(runs["full_events"]), _surfaces(runs["cropped_events"])
    assert full.keys() == cropped.keys() and len(full) >= 2 * SLICES
    worst = 0.0
    for key, report in full.items():
        other = cropped[key]
        worst = max(worst, abs(other.area - report.area) / report.area)
        np.testing.assert_allclose(other.coefficients, report.coefficients, rtol=0, atol=1e-10)
        np.testing.assert_allclose(other.centroid, report.centroid, rtol=0, atol=1e-10)
    assert worst < 1e-10
    stats = runs["cropped"].stats
    assert stats.cropped == SLICES - 1 and stats.sent_whole == 1  # the first slice goes whole: no windows yet
    whole_first = runs["full"].stats.bytes_sent / SLICES
    ratio_all = stats.bytes_sent / stats.bytes_uncropped
    ratio_cropped = (stats.bytes_sent - whole_first) / (stats.bytes_uncropped - whole_first)
    print(f"\ndata windows: bytes sent cropped / whole = {ratio_cropped:.3f} per cropped slice "
          f"({ratio_all:.3f} over all {SLICES} slices incl. the first, sent whole); largest relative area "
          f"difference {worst:.1e}")
    assert ratio_cropped < 0.9
    assert not [e for e in runs["cropped_events"] if e.kind == "warning"]
    # Every cropped slice held its windows: the archive shows what was asked and what arrived.
    view = open_archive(runs["archive_root"], runs["cropped"].run_id)
    windows = view.windows()
    assert set(windows["iteration"].tolist()) == {runs["scenario"].iteration_of(i) for i in range(SLICES)}
    assert np.all(windows["extra_nodes"] == SERVICE_INTERPOLATION_ORDER + 2)  # the server's own crop ghost nodes (order + 2)
    received = view.slices()["bytes"]
    assert received[0] > received[1:].max()


def test_a_slice_lacking_data_is_reported_and_the_next_window_grows(client):
    """The second slice is cut to a box smaller than the horizon: the finder runs out of data."""
    run = client.open_run(lone_spec("lacking data"), cache_results=True)
    assert run.submit(lone_hole_slice(0)).result(60).accepted
    before = wait_for_windows(run, 0)
    (window,) = before.windows
    centre = np.asarray(LONE_CENTRE)
    too_small = ps.crop_outgoing_slice(lone_hole_slice(1), np.array([[centre - 0.2, centre + 0.2]]))
    assert run.submit(too_small).result(60).accepted
    after = wait_for_windows(run, 1)
    assert run.submit(lone_hole_slice(2), crop_to_windows=True).result(60).accepted
    wait_for_windows(run, 2)
    run.close()
    events = list(client.watch(run.run_id, timeout_s=600))
    warnings = [e for e in events if e.kind == "warning"]
    assert len(warnings) == 1 and warnings[0].iteration == 1
    assert warnings[0].label == "A" and warnings[0].warning_kind == "missing_data"
    assert "lacked data surface 'A'" in warnings[0].message and "covered" in warnings[0].message
    missed = [e for e in events if e.kind == "surface_not_found" and e.iteration == 1]
    assert missed and missed[0].surface.reason == "outside_data"
    (grown,) = after.windows
    assert grown.growth == 1
    assert np.all(grown.upper - grown.lower > window.upper - window.lower)
    # With the grown window the next (cropped) slice finds the hole again.
    assert [e.iteration for e in events if e.kind == "surface_found"] == [0, 2]


def test_pair_forecasts_seed_each_body_within_their_stated_uncertainty(full_and_cropped_runs):
    """The planner seeds each body at the forecast position; from the eighth shared sample on the
    pair's forecast is the orbit model (tracking/forecast.py), and the horizon found lies within
    the uncertainty the forecast stated for it."""
    runs = full_and_cropped_runs
    view = open_archive(runs["archive_root"], runs["full"].run_id)
    models = {}
    for label in ("heavy", "light"):
        rows = view.surface(label)
        models[label] = rows["seed_model"].tolist()
        seeded = rows["seed_model"] > 0
        miss = np.linalg.norm(rows["centroid"][seeded] - rows["seed_centre"][seeded], axis=1)
        stated = rows["seed_uncertainty"][seeded]
        assert np.all(miss <= stated), (label, miss, stated)
        orbit = rows["seed_model"][seeded] == 3
        print(f"\n{label}: forecast seed errors {np.round(miss, 4).tolist()} M within stated "
              f"{np.round(stated, 4).tolist()} M; orbit model for {int(orbit.sum())} slices, mean error there "
              f"{miss[orbit].mean():.2e} M")
        forecasts = view.forecasts(label)
        assert forecasts["position"].shape == (SLICES, 9, 3)
        np.testing.assert_allclose(forecasts["lead_time"][:, -1] - forecasts["time"], 0.5)  # the steering interval
    for label in models:
        # no seed in the first slice (scan), static from one point, then polynomial, then the orbit fit
        assert models[label][:2] == [0, 1] and models[label][-1] == 3
        assert models[label][8:] == [3] * (SLICES - 8)


def test_windows_state_a_speed_bound_above_the_bodies_true_speed_and_a_cap_on_their_travel(full_and_cropped_runs):
    """Every data-window event states a speed bound (M per M) at least the invented punctures'
    true coordinate speed over the windows' validity, and, once the pair has a forecast, a growth
    cap no smaller than how far either puncture travels from then to the end of the track."""
    runs = full_and_cropped_runs
    track = runs["scenario"].track
    events = [e.windows for e in runs["full_events"] if e.kind == "data_windows_wanted"]
    assert len(events) == SLICES
    capped = 0
    for w in events:
        assert w.speed_bound > 0
        t = np.linspace(w.valid_from, w.valid_until, 101)
        path = np.stack([track.positions(v) for v in t])  # (k, 2, 3)
        speed = np.linalg.norm(np.diff(path, axis=0), axis=2) / np.diff(t)[:, None]
        assert speed.max() <= w.speed_bound, (w.iteration, speed.max(), w.speed_bound)
        if w.growth_cap > 0:
            capped += 1
            later = np.stack([track.positions(v) for v in np.linspace(w.time, track.duration, 201)])
            travel = np.linalg.norm(later - later[0], axis=2).max()
            assert travel <= w.growth_cap, (w.iteration, travel, w.growth_cap)
    # The cap needs both bodies' forecasts with a finite uncertainty (from the third slice on).
    assert capped >= SLICES - 3
