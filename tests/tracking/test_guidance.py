"""Refinement guidance: spacing from points across the horizon, containment of the moving
horizon until the next regrid, merging of overlapping regions, the remnant after merger."""

import numpy as np
import pytest

from penumbra_server.tracking import (
    Forecast,
    GuidanceError,
    HorizonSize,
    RefinementPolicy,
    Track,
    forecast_pair,
    forecast_polynomial,
    guidance_times,
    refinement_guidance,
)
from tracking_synthetic import PetersInspiral, mass_ratio_pair


def static_forecast(positions, *, times=(0.0, 4.0), uncertainty=0.0, bodies=None):
    positions = np.asarray(positions, float)
    bodies = bodies or tuple("ABCDEFG"[: len(positions)])
    k = len(times)
    return Forecast(bodies=bodies, times=np.asarray(times, float),
                    positions=np.repeat(positions[:, None, :], k, axis=1),
                    uncertainty=np.full((len(positions), k), uncertainty), model="static", reason="test",
                    fit_window=(0.0, 0.0))


@pytest.mark.parametrize("points", [20, 30, 40])
def test_finest_spacing_puts_the_requested_points_across_the_horizon(points):
    policy = RefinementPolicy(points_across_horizon=points)
    size = HorizonSize(max_radius=0.5, min_diameter=0.9)
    g = refinement_guidance(static_forecast([[5, 0, 0], [-5, 0, 0]]), {"A": size, "B": size}, policy=policy)
    for body in g.bodies:
        assert body.finest_level == policy.nesting_depth
        assert body.finest_spacing == pytest.approx(0.9 / points)
        assert size.min_diameter / body.finest_spacing == pytest.approx(points)
        np.testing.assert_allclose(body.spacings[:-1] / body.spacings[1:], 2.0)
        np.testing.assert_allclose(body.radii[:-1] / body.radii[1:], 2.0)
    for level in range(1, policy.nesting_depth + 1):
        for region in g.regions_at(level):
            assert region.spacing == pytest.approx(0.9 / points * 2.0 ** (policy.nesting_depth - level))


def test_larger_horizon_needs_fewer_levels_but_still_gets_the_requested_points():
    # Mass ratio 3: the larger horizon is about 3 times wider -> one level fewer (2 <= 3 < 4).
    small = HorizonSize(max_radius=0.25, min_diameter=0.45)
    large = HorizonSize(max_radius=0.75, min_diameter=1.35)
    policy = RefinementPolicy()
    g = refinement_guidance(static_forecast([[-6, 0, 0], [2, 0, 0]]), {"A": large, "B": small}, policy=policy)
    a, b = g.body("A"), g.body("B")
    assert b.finest_level == policy.nesting_depth and a.finest_level == policy.nesting_depth - 1
    assert large.min_diameter / a.finest_spacing >= policy.points_across_horizon
    assert large.min_diameter / a.finest_spacing < 2 * policy.points_across_horizon
    assert a.finest_spacing == pytest.approx(2 * b.finest_spacing)
    assert "fewer level" in a.reasons["finest_level"]
    assert [r.bodies for r in g.finest_regions] == [("B",)]


def test_finest_radius_is_the_sum_of_its_stated_margins():
    size = HorizonSize(max_radius=0.5, min_diameter=0.9)
    fc = static_forecast([[3, 0, 0]], uncertainty=0.05, bodies=("A",))
    policy = RefinementPolicy(guard_points=6)
    g = refinement_guidance(fc, {"A": size}, policy=policy)
    body = g.body("A")
    h = 0.9 / 30
    assert body.margins["horizon"] == pytest.approx(1.5 * 0.5)
    assert body.margins["motion"] == pytest.approx(0.0)
    assert body.margins["uncertainty"] == pytest.approx(0.05)
    assert body.margins["guard"] == pytest.approx(6 * h)
    assert body.finest_radius == pytest.approx(0.75 + 0.05 + 6 * h)
    for key in ("centre", "required_spacing", "finest_spacing", "horizon", "motion", "uncertainty",
                "guard", "finest_radius", "coarser_radii", "box", "finest_level"):
        assert body.reasons[key]
    assert "valid" in g.reasons and "valid_short" not in g.reasons


def test_finest_regions_merge_when_they_overlap_and_not_otherwise():
    size = HorizonSize(max_radius=0.5, min_diameter=0.9)
    sizes = {"A": size, "B": size}
    far = refinement_guidance(static_forecast([[4, 0, 0], [-4, 0, 0]]), sizes)
    r_fine = far.body("A").finest_radius
    assert 2 * r_fine < 8.0
    assert len(far.finest_regions) == 2
    assert all(not r.merged for r in far.finest_regions)
    # The coarser levels, 2^k times larger, do overlap and are merged level by level.
    assert len(far.regions_at(1)) == 1 and far.regions_at(1)[0].bodies == ("A", "B")
    assert "merging" in far.reasons

    close = refinement_guidance(static_forecast([[0.8, 0, 0], [-0.8, 0.1, 0]]), sizes)
    assert len(close.finest_regions) == 1
    merged = close.finest_regions[0]
    assert merged.merged and set(merged.bodies) == {"A", "B"}
    for name in ("A", "B"):
        body = close.body(name)
        # The merged sphere holds each body's own finest sphere; the box holds each body's box.
        assert np.linalg.norm(body.centre - merged.centre) + body.finest_radius <= merged.radius * (1 + 1e-12)
        assert np.all(body.lower[-1] >= merged.lower) and np.all(body.upper[-1] <= merged.upper)
        assert close.region_of(name, close.policy.nesting_depth) is merged
    # Smallest enclosing sphere of two equal spheres: centred between them.
    np.testing.assert_allclose(merged.centre, [0.0, 0.05, 0.0], atol=1e-12)
    assert merged.radius == pytest.approx(0.5 * np.hypot(1.6, 0.1) + close.body("A").finest_radius)


def test_levels_nest():
    size = HorizonSize(max_radius=0.5, min_diameter=0.9)
    g = refinement_guidance(static_forecast([[1.5, 0, 0], [-1.5, 0, 0]]), {"A": size, "B": size})
    for level in range(2, g.policy.nesting_depth + 1):
        for fine in g.regions_at(level):
            coarse = [r for r in g.regions_at(level - 1) if set(fine.bodies) <= set(r.bodies)]
            assert len(coarse) == 1
            c = coarse[0]
            assert np.linalg.norm(fine.centre - c.centre) + fine.radius <= c.radius * (1 + 1e-12)
            assert np.all(fine.lower >= c.lower - 1e-12) and np.all(fine.upper <= c.upper + 1e-12)


@pytest.mark.parametrize("q, steering_interval", [(1.0, 4.0), (3.0, 4.0), (1.0, 16.0)])
def test_finest_region_contains_the_moving_horizon_until_the_next_regrid(q, steering_interval):
    """Peters inspiral (Phys. Rev. 136, B1224 (1964); docs/references.md item 14) from a = 10 M to 4 M; horizons of
    coordinate radius about m_i / 2 (isotropic-Schwarzschild-like, an assumption of the test)."""
    m1, m2 = mass_ratio_pair(q)
    inspiral = PetersInspiral(m1, m2, a0=10.0)
    policy = RefinementPolicy(steering_interval=steering_interval)
    t_stop = inspiral.time_at_separation(4.0) - steering_interval
    t = np.arange(0.0, t_stop, 1.0)
    x1, x2 = inspiral.positions(t)
    sizes = {"A": HorizonSize(max_radius=0.55 * m1, min_diameter=0.95 * m1),
             "B": HorizonSize(max_radius=0.55 * m2, min_diameter=0.95 * m2)}
    checked = 0
    for i in range(20, t.size, 37):
        a = Track(body="A", times=t[:i + 1], positions=x1[:i + 1])
        b = Track(body="B", times=t[:i + 1], positions=x2[:i + 1])
        times = guidance_times(t[i], policy=policy)
        fc = forecast_pair(a, b, masses=(m1, m2), times=times)
        g = refinement_guidance(fc, sizes, policy=policy)
        assert g.valid_from == t[i] and g.valid_until == pytest.approx(t[i] + steering_interval)
        dense = np.linspace(times[0], times[-1], 33)
        y = dict(zip(("A", "B"), inspiral.positions(dense)))
        for name in ("A", "B"):
            body = g.body(name)
            region = g.region_of(name, body.finest_level)
            r_max = sizes[name].max_radius
            # The whole horizon (a ball of r_max about the true centre) stays inside, at the
            # end of the interval and at every time before it, in both forms.
            assert np.all(region.sphere_contains(y[name], r_max))
            assert np.all(region.box_contains(y[name], r_max))
            checked += 1
        # Also when only one body's track is known (polynomial fallback).
        single = forecast_polynomial(a, times=times)
        gs = refinement_guidance(single, {"A": sizes["A"]}, policy=policy)
        region = gs.finest_regions[0]
        assert np.all(region.sphere_contains(y["A"][-1:], sizes["A"].max_radius))
    assert checked >= 10


def test_after_merger_a_single_region_around_the_remnant():
    t = np.arange(0.0, 10.0, 1.0)
    remnant = Track(body="remnant", times=t, positions=np.stack([0.01 * t, 0 * t, 0 * t], axis=1))
    fc = forecast_polynomial(remnant, times=guidance_times(9.0, policy=RefinementPolicy()))
    g = refinement_guidance(fc, {"remnant": HorizonSize(max_radius=1.1, min_diameter=1.9)}, post_merger=True)
    assert g.post_merger
    assert all(len(regions) == 1 for regions in g.levels)
    assert g.finest_regions[0].bodies == ("remnant",)
    assert "remnant" in g.finest_regions[0].reason and "post_merger" in g.reasons
    pair = static_forecast([[1, 0, 0], [-1, 0, 0]])
    with pytest.raises(GuidanceError, match="post_merger"):
        refinement_guidance(pair, {"A": HorizonSize(0.5, 0.9), "B": HorizonSize(0.5, 0.9)}, post_merger=True)


def test_unknown_uncertainty_uses_the_policy_margin():
    track = Track(body="A", times=[0.0], positions=[[1.0, 0.0, 0.0]])
    fc = forecast_polynomial(track, times=[0.0, 4.0])
    g = refinement_guidance(fc, {"A": HorizonSize(0.5, 0.9)}, policy=RefinementPolicy(unknown_motion_factor=2.0))
    assert g.body("A").margins["uncertainty"] == pytest.approx(1.0)
    assert "unknown_motion_factor" in g.body("A").reasons["uncertainty"]


def test_short_forecast_is_flagged():
    g = refinement_guidance(static_forecast([[0, 0, 0]], times=(0.0, 1.0), bodies=("A",)),
                            {"A": HorizonSize(0.5, 0.9)})
    assert "valid_short" in g.reasons


def test_bad_policy_and_input_name_the_field():
    with pytest.raises(GuidanceError, match="points_across_horizon"):
        RefinementPolicy(points_across_horizon=0)
    with pytest.raises(GuidanceError, match="nesting_depth"):
        RefinementPolicy(nesting_depth=0)
    with pytest.raises(GuidanceError, match="level_ratio"):
        RefinementPolicy(level_ratio=1.0)
    with pytest.raises(GuidanceError, match="finest_radius_factor"):
        RefinementPolicy(finest_radius_factor=0.5)
    with pytest.raises(GuidanceError, match="min_diameter"):
        HorizonSize(max_radius=0.5, min_diameter=2.0)
    with pytest.raises(GuidanceError, match="sizes"):
        refinement_guidance(static_forecast([[0, 0, 0]], bodies=("A",)), {})
    with pytest.raises(GuidanceError, match="level"):
        refinement_guidance(static_forecast([[0, 0, 0]], bodies=("A",)), {"A": HorizonSize(0.5, 0.9)}).regions_at(0)


# --- Hysteresis of merging ------------------------------------------------------------------------


def _finest_merged(g) -> bool:
    """Whether A and B share a region on the finest level."""
    return len(g.finest_regions) == 1


def _merged_states(separations, *, with_previous: bool, policy=RefinementPolicy()):
    size = HorizonSize(max_radius=0.5, min_diameter=0.9)
    states, previous = [], None
    for d in separations:
        g = refinement_guidance(static_forecast([[0.5 * d, 0, 0], [-0.5 * d, 0, 0]]), {"A": size, "B": size},
                                policy=policy, previous=previous if with_previous else None)
        states.append(_finest_merged(g))
        previous = g
    return states


def _switches(states) -> int:
    return sum(a != b for a, b in zip(states, states[1:]))


def _finest_threshold(policy=RefinementPolicy()) -> float:
    """Separation at which the two finest spheres just touch (sum of the finest radii)."""
    size = HorizonSize(max_radius=0.5, min_diameter=0.9)
    g = refinement_guidance(static_forecast([[50, 0, 0], [-50, 0, 0]]), {"A": size, "B": size}, policy=policy)
    return 2 * float(g.body("A").radii[-1])


def test_a_slowly_approaching_pair_merges_once():
    d_c = _finest_threshold()
    # Approach through the threshold with a small wobble on top (noisy forecasts), 400 guidances.
    t = np.arange(400)
    separations = d_c * (1.6 - 0.8 * t / t[-1]) + 0.03 * d_c * np.sin(0.7 * t)
    states = _merged_states(separations, with_previous=True)
    assert states[0] is False and states[-1] is True
    assert _switches(states) == 1
    assert _switches(_merged_states(separations, with_previous=False)) > 1  # the test can fail


def test_a_separation_oscillating_about_the_threshold_switches_at_most_once():
    policy = RefinementPolicy()
    d_c = _finest_threshold(policy)
    t = np.arange(300)
    # +-10 % about the touching separation: inside the 25 % separation margin.
    separations = d_c * (1 + 0.1 * np.sin(0.37 * t))
    with_previous = _merged_states(separations, with_previous=True, policy=policy)
    assert _switches(with_previous) <= 1
    assert _switches(_merged_states(separations, with_previous=False, policy=policy)) > 10


def test_merged_regions_separate_when_clear_by_the_margin_and_say_why():
    policy = RefinementPolicy(separation_margin=0.25)
    d_c = _finest_threshold(policy)
    size = HorizonSize(max_radius=0.5, min_diameter=0.9)

    def guidance(d, previous):
        return refinement_guidance(static_forecast([[0.5 * d, 0, 0], [-0.5 * d, 0, 0]]), {"A": size, "B": size},
                                   policy=policy, previous=previous)

    merged = guidance(0.9 * d_c, None)
    assert _finest_merged(merged)
    held = guidance(1.2 * d_c, merged)
    assert _finest_merged(held) and "hysteresis" in held.finest_regions[0].reason
    assert not _finest_merged(guidance(1.2 * d_c, None))  # without the previous state: separate
    assert not _finest_merged(guidance(1.3 * d_c, held))  # clear by more than 25 %: separate
    with pytest.raises(GuidanceError, match="separation_margin"):
        RefinementPolicy(separation_margin=-0.1)
    with pytest.raises(GuidanceError, match="previous"):
        guidance(d_c, previous="merged")
