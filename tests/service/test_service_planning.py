"""The default planner and the run's steering state without a server: seeds at the forecast, a
lost body held at its last centroid with a scan widened by the gap, individual surfaces retired
after the merger; and the new spec fields and the GetLatestGuidance call on a real server."""

from __future__ import annotations

import grpc
import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.numerics.slices import Patch, Slice, VariableSet
from penumbra_server.numerics.surfaces import Surface
from penumbra_server.server._spec import BodySpec, RunSettings
from penumbra_server.server.jobs import REASON_NOT_CONVERGED, SurfaceOutcome
from penumbra_server.server.planning import SteeringPlanner
from penumbra_server.server.steering import RunSteering
from penumbra_server.server.surface_state import record_outcome


def _settings(*bodies) -> RunSettings:
    return RunSettings(display_name="t", variable_set=VariableSet.ADM, mass_scale_solar_masses=0.0,
                       bodies=tuple(BodySpec(label, pos, mass) for label, pos, mass in bodies), lmax=4,
                       tolerance=1e-8, max_iterations=20, queue_depth=2)


def _slice(time: float, *, with_shift: bool = False) -> Slice:
    fields = {n: np.ones((5, 5, 5)) for n in ps.required_fields("adm")}
    if with_shift:
        fields.update({n: np.zeros((5, 5, 5)) for n in ("shift_x", "shift_y", "shift_z")})
    return Slice(time=time, iteration=int(round(10 * time)), variable_set="adm",
                 patches=(Patch(origin=(-4, -4, -4), spacing=(2, 2, 2), shape=(5, 5, 5), level=0, fields=fields),))


def _found(label: str, centroid, radius: float = 0.5) -> SurfaceOutcome:
    surface = Surface.sphere(centroid, radius, 4)
    return SurfaceOutcome(label=label, found=True, reason=0, status=0, message="found", centre=np.array(centroid, float),
                          lmax=4, coefficients=np.array(surface.coefficients),
                          quantities={"centroid": list(centroid), "radius_max": radius, "irreducible_mass": 1.0})


def _missed(label: str) -> SurfaceOutcome:
    return SurfaceOutcome(label=label, found=False, reason=REASON_NOT_CONVERGED, status=2, message="missed")


def _observe_slice(steering, sl, plans, outcomes):
    """What the run does with a processed slice: record each outcome, then let the steering decide."""
    for outcome in outcomes:
        record_outcome(steering.states[outcome.label], outcome, time=sl.time, iteration=sl.iteration)
    return steering.observe(sl, plans, outcomes)


def _observe(steering, planner, settings, time, outcomes):
    sl = _slice(time)
    plans = planner.plan(settings, {}, sl)
    return plans, _observe_slice(steering, sl, plans, outcomes)


def test_seed_at_the_forecast_then_a_lost_body_is_held_and_its_scan_widens_with_the_gap():
    settings = _settings(("A", (0.0, 0.0, 0.0), 1.0))
    steering = RunSteering(settings)
    planner = SteeringPlanner(steering)
    first, _ = _observe(steering, planner, settings, 0.0, [_found("A", (0.0, 0.0, 0.0))])
    assert first[0].seed is None and first[0].scan_radii == pytest.approx((0.1, 2.0))  # never found: wide scan
    for t, x in ((1.0, 0.1), (2.0, 0.4)):  # accelerating along x
        _observe(steering, planner, settings, t, [_found("A", (x, 0.0, 0.0))])
    (plan,) = planner.plan(settings, {}, _slice(3.0))
    # The quadratic through (0, 0), (1, 0.1), (2, 0.4) gives 0.9 at t = 3 (not the linear 0.7).
    np.testing.assert_allclose(plan.seed.centre, (0.9, 0.0, 0.0), atol=1e-12)
    assert plan.seed_model == "polynomial" and np.isfinite(plan.seed_uncertainty)
    np.testing.assert_allclose(plan.seed_position, plan.seed.centre)
    # Missed twice: lost. The seed stays at the forecast, the scan is held at the last centroid
    # and its outer radius grows with the time since the body was last found.
    _observe(steering, planner, settings, 3.0, [_missed("A")])
    _observe(steering, planner, settings, 4.0, [_missed("A")])
    (soon,) = planner.plan(settings, {}, _slice(5.0))
    (later,) = planner.plan(settings, {}, _slice(9.0))
    for p in (soon, later):
        np.testing.assert_allclose(p.scan_centre, (0.4, 0.0, 0.0))
        assert p.seed is not None
    speed = 0.3  # the last two finds: 0.3 M per M
    assert soon.scan_radii[1] == pytest.approx(2.0 + speed * 3.0)
    assert later.scan_radii[1] == pytest.approx(2.0 + speed * 7.0)
    # The data region holds the widened scan.
    assert np.all(later.box_upper - later.box_lower >= 2 * 1.25 * later.scan_radii[1] - 1e-12)


def test_common_search_starts_when_close_and_individuals_retire_after_merger():
    settings = _settings(("A", (0.5, 0.0, 0.0), 0.5), ("B", (-0.5, 0.0, 0.0), 0.5))
    steering = RunSteering(settings)
    planner = SteeringPlanner(steering)
    far = [_found("A", (1.0, 0, 0), 0.25), _found("B", (-1.0, 0, 0), 0.25)]
    plans, _ = _observe(steering, planner, settings, 0.0, far)
    plans, _ = _observe(steering, planner, settings, 1.0, far)
    assert [p.label for p in plans] == ["A", "B"]  # 2 M apart = 4 x (r_A + r_B): no common search yet
    close = [_found("A", (0.7, 0, 0), 0.25), _found("B", (-0.7, 0, 0), 0.25)]
    plans, _ = _observe(steering, planner, settings, 2.0, close)
    assert [p.label for p in plans] == ["A", "B"]  # planned from the forecast at t = 2: still 2 M apart
    plans = planner.plan(settings, {}, _slice(3.0))
    common = plans[-1]
    assert common.label == "common" and common.scan_centre is None and common.search
    # The guess encloses both horizons where the forecast puts them at the slice's time.
    for body in plans[:2]:
        assert np.linalg.norm(body.seed_position - common.seed.centre) + 0.25 < common.seed.mean_radius
    notices = _observe_slice(steering, _slice(3.0), plans, [_found("A", (0.4, 0, 0), 0.25), _missed("B"),
                                                     _found("common", (0.0, 0, 0), 0.7)])
    kinds = [n.kind for n in notices]
    assert kinds.count("common_horizon_formed") == 1 and steering.common_formed == (3.0, 30)
    notices = _observe_slice(steering, _slice(4.0), planner.plan(settings, {}, _slice(4.0)),
                             [_found("A", (0.4, 0, 0), 0.25), _missed("B"), _found("common", (0.0, 0, 0), 0.7)])
    assert "common_horizon_formed" not in [n.kind for n in notices]  # once only
    plans = {p.label: p for p in planner.plan(settings, {}, _slice(5.0))}
    assert plans["A"].search and plans["common"].search
    assert not plans["B"].search and "inside the common horizon" in plans["B"].note
    guidance = [n for n in notices if n.kind == "refinement_guidance"][0].payload
    assert guidance.post_merger and [b.label for b in guidance.bodies] == ["common"]


def test_the_common_search_advice_is_kept_per_slice_time():
    """With slices in flight the next slice is planned before a slice is observed: the advice of
    each slice time stays available (advice_by_time, the formation watch's), not only the last."""
    settings = _settings(("A", (0.5, 0.0, 0.0), 0.5), ("B", (-0.5, 0.0, 0.0), 0.5))
    steering = RunSteering(settings)
    planner = SteeringPlanner(steering)
    for t, x in ((0.0, 1.0), (1.0, 0.9), (2.0, 0.8)):
        _observe(steering, planner, settings, t, [_found("A", (x, 0, 0), 0.25), _found("B", (-x, 0, 0), 0.25)])
    planner.plan(settings, {}, _slice(3.0))
    planner.plan(settings, {}, _slice(4.0))  # planned before slice 3 is observed
    assert max(steering.advice_by_time) == 4.0 and steering.advice_by_time[3.0] is not steering.advice_by_time[4.0]
    assert steering.advice_by_time[3.0].centre == pytest.approx(steering.common_advice(3.0).centre)
    for t in range(5, 20):  # only the latest few are kept
        planner.plan(settings, {}, _slice(float(t)))
    assert len(steering.advice_by_time) <= 8 and 19.0 in steering.advice_by_time and 3.0 not in steering.advice_by_time


def test_refinement_policy_is_validated_and_echoed(stub):
    spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),),
                      refinement=ps.RefinementOptions(points_across_horizon=20, nesting_depth=4, guard_points=0),
                      symmetry="bitant").to_wire()
    run = stub.OpenRun(pb.OpenRunRequest(spec=spec)).run
    assert run.spec.refinement.points_across_horizon == 20 and run.spec.refinement.nesting_depth == 4
    assert run.spec.refinement.HasField("guard_points") and run.spec.refinement.guard_points == 0
    assert run.spec.refinement.level_ratio == 2.0 and run.spec.refinement.steering_interval_m == 4.0  # defaults
    assert run.spec.symmetry == pb.RunSpec.SYMMETRY_BITANT
    bad = pb.RunSpec()
    bad.CopyFrom(spec)
    bad.refinement.nesting_depth = 99
    with pytest.raises(grpc.RpcError) as info:
        stub.OpenRun(pb.OpenRunRequest(spec=bad))
    assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "spec.refinement.nesting_depth" in info.value.details()
    bad.refinement.nesting_depth = 0
    bad.refinement.level_ratio = 0.5
    with pytest.raises(grpc.RpcError) as info:
        stub.OpenRun(pb.OpenRunRequest(spec=bad))
    assert "spec.refinement.level_ratio" in info.value.details()
    with pytest.raises(ValueError, match="refinement.nesting_depth"):
        ps.RefinementOptions(nesting_depth=0)


def test_latest_guidance_before_any_slice_and_for_an_unknown_run(client):
    run = client.open_run(ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),)), cache_results=False)
    assert client.latest_guidance(run.run_id) is None and client.latest_windows(run.run_id) is None
    assert run.latest_guidance() is None
    run.close()
    with pytest.raises(ps.RunNotFoundError):
        client.latest_guidance("run-000000000000")


def test_not_searched_reason_mirrors_the_proto():
    from penumbra_server.server import jobs

    assert jobs.REASON_NOT_SEARCHED == pb.SurfaceNotFound.REASON_NOT_SEARCHED


def test_a_common_plan_refuses_a_surface_that_misses_a_body():
    # A "common" surface must hold both bodies inside; a body's own horizon does not.
    import numpy as np

    from penumbra_server.numerics.surfaces import Surface
    from penumbra_server.server.scheduler import SurfacePlan

    plan = SurfacePlan("common", None, None, None, -np.ones(3), np.ones(3),
                       must_enclose=(np.array([0.3, 0.0, 0.0]), np.array([-0.3, 0.1, 0.0])))
    assert plan.points_outside(Surface.sphere([0.0, 0.0, 0.0], 0.6, 4)) == []
    outside = plan.points_outside(Surface.sphere([0.3, 0.0, 0.0], 0.2, 4))  # the first body's own
    assert len(outside) == 1 and np.allclose(outside[0], [-0.3, 0.1, 0.0])


def _finest_merged_states(separations, policy) -> list[bool]:
    """Finest-level merged state of each guidance the steering issues for a pair at ``separations``
    (one slice per M), as the run's events carry it."""
    settings = RunSettings(display_name="t", variable_set=VariableSet.ADM, mass_scale_solar_masses=0.0,
                           bodies=(BodySpec("A", (2.0, 0.0, 0.0), 0.5), BodySpec("B", (-2.0, 0.0, 0.0), 0.5)),
                           lmax=4, tolerance=1e-8, max_iterations=20, queue_depth=2, refinement=policy)
    steering = RunSteering(settings, common_horizon=False)
    states = []
    for index, d in enumerate(separations):
        sl = _slice(float(index))
        outcomes = [_found("A", (0.5 * d, 0.0, 0.0), 0.25), _found("B", (-0.5 * d, 0.0, 0.0), 0.25)]
        guidance = [n.payload for n in _observe_slice(steering, sl, [], outcomes) if n.kind == "refinement_guidance"]
        assert len(guidance) == 1
        finest = guidance[0].levels[-1]
        states.append(len(finest.regions) == 1)
    return states


def test_the_steering_keeps_merged_regions_merged_so_a_slowly_approaching_pair_switches_once():
    # The steering hands each guidance to the next as ``previous`` (tracking.guidance,
    # hysteresis). A pair closing at 0.02 M per M through the finest regions' touching distance
    # (about 1 M here), with a slow wobble of +-0.1 M on top (an eccentric approach), one slice
    # per M; it starts far enough apart that the first, uncertain forecasts do not merge it.
    from penumbra_server.tracking.guidance import RefinementPolicy

    t = np.arange(120, dtype=float)
    separations = 3.0 - 0.02 * t + 0.1 * np.sin(0.25 * t)
    with_margin = _finest_merged_states(separations, RefinementPolicy())
    switches = sum(a != b for a, b in zip(with_margin, with_margin[1:]))
    without = _finest_merged_states(separations, RefinementPolicy(separation_margin=0.0))
    plain_switches = sum(a != b for a, b in zip(without, without[1:]))
    print(f"\nfinest-level switches: {switches} with the separation margin, {plain_switches} without")
    assert with_margin[0] is False and with_margin[-1] is True and switches == 1
    assert plain_switches > 1  # the same pair without hysteresis thrashes: the check can fail


def test_the_guidance_rebuilt_from_its_archived_event_keeps_the_hysteresis():
    # A restarted server reads its last guidance back from the archived event
    # (steering.restore): merged regions must stay merged exactly as with the guidance in memory.
    from penumbra_server.server._tracking_convert import decode_wire, encode_wire, guidance_notice, \
        guidance_regions_from_wire
    from penumbra_server.tracking.forecast import Forecast
    from penumbra_server.tracking.guidance import HorizonSize, RefinementPolicy, refinement_guidance

    def forecast(d):
        times = np.linspace(0.0, 4.0, 9)
        positions = np.array([[[0.5 * d, 0.0, 0.0]] * 9, [[-0.5 * d, 0.0, 0.0]] * 9])
        return Forecast(bodies=("A", "B"), times=times, positions=positions, uncertainty=np.zeros((2, 9)),
                        model="static", reason="test", fit_window=(0.0, 0.0), details={})

    sizes = {"A": HorizonSize(0.5, 0.9), "B": HorizonSize(0.5, 0.9)}
    policy = RefinementPolicy()
    touching = 2 * float(refinement_guidance(forecast(100.0), sizes, policy=policy).body("A").radii[-1])
    merged = refinement_guidance(forecast(0.9 * touching), sizes, policy=policy)
    assert len(merged.finest_regions) == 1
    event = pb.RunEvent(refinement_guidance=guidance_notice(merged, sizes, 1.0, 10).payload)
    restored = guidance_regions_from_wire(decode_wire(encode_wire(event)).refinement_guidance)
    assert [[r.bodies for r in level] for level in restored.levels] == [[r.bodies for r in level]
                                                                        for level in merged.levels]
    apart = forecast(1.15 * touching)  # no overlap, but within the 25 % separation margin
    assert len(refinement_guidance(apart, sizes, policy=policy, previous=restored).finest_regions) == 1
    assert len(refinement_guidance(apart, sizes, policy=policy).finest_regions) == 2
