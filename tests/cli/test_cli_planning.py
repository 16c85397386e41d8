"""The planner `serve` uses: bodies as the server's default, plus a common surface for a close pair."""

import numpy as np
import pytest

from penumbra_server.cli.planning import COMMON_LABEL, BinaryPlanner, common_label_for
from penumbra_server.numerics.slices import VariableSet
from penumbra_server.numerics.surfaces import Surface
from penumbra_server.server._spec import BodySpec, RunSettings
from penumbra_server.server.scheduler import SurfaceTrack


def _settings(*bodies):
    return RunSettings(display_name="t", variable_set=VariableSet.CONFORMAL_W, mass_scale_solar_masses=0.0,
                       bodies=tuple(bodies), lmax=6, tolerance=1e-8, max_iterations=40, queue_depth=4)


class _Slice:
    """The planner reads only the slice's time and bounds."""

    def __init__(self, time, half_width=5.0):
        self.time = time
        self.half_width = half_width

    def bounds(self):
        return np.full(3, -self.half_width), np.full(3, self.half_width)


NEXT = _Slice(1.2)  # found at t = 0.8 (and 0.4 before that): the slice to plan is 0.4 M later


def _found(label, centre, radius, previous=None):
    track = SurfaceTrack(label)
    if previous is not None:
        track.record_found(Surface.sphere(previous, radius, 6), np.asarray(previous, float), radius, None,
                           iteration=0, time=0.4)
    track.record_found(Surface.sphere(centre, radius, 6), np.asarray(centre, float), radius, None,
                       iteration=16, time=0.8)
    return track


SETTINGS = _settings(BodySpec("heavy", (0.5, 0, 0), 0.6), BodySpec("light", (-0.75, 0, 0), 0.4))


def _labels(plans):
    return [p.label for p in plans]


def test_no_common_surface_while_the_bodies_are_far_apart():
    # separation 4 M, radii 0.3 + 0.2: ratio 8, above the tracking module's default factor 3.
    tracks = {"heavy": _found("heavy", (1.6, 0, 0), 0.3), "light": _found("light", (-2.4, 0, 0), 0.2)}
    planner = BinaryPlanner()
    assert _labels(planner.plan(SETTINGS, tracks, NEXT)) == ["heavy", "light"]
    assert planner.last_advice is not None and not planner.last_advice.search


def test_no_common_surface_before_both_bodies_were_found():
    planner = BinaryPlanner()
    assert _labels(planner.plan(SETTINGS, {"heavy": SurfaceTrack("heavy"), "light": SurfaceTrack("light")}, NEXT)) == [
        "heavy", "light"]


def test_common_surface_planned_when_close_seeded_to_enclose_both():
    heavy, light = np.array([0.3, 0.0, 0.0]), np.array([-0.45, 0.0, 0.0])
    # Each found once only: no velocity yet, so expected where last seen.
    tracks = {"heavy": _found("heavy", heavy, 0.25), "light": _found("light", light, 0.15)}
    planner = BinaryPlanner()
    plans = planner.plan(SETTINGS, tracks, NEXT)
    assert _labels(plans) == ["heavy", "light", COMMON_LABEL]
    common = plans[-1]
    centre = (0.6 * heavy + 0.4 * light) / 1.0
    np.testing.assert_allclose(common.seed.centre, centre, atol=1e-12)
    # The seed sphere encloses both horizons' spheres.
    r = common.seed.mean_radius
    assert r >= np.linalg.norm(centre - heavy) + 0.25 and r >= np.linalg.norm(centre - light) + 0.15
    assert np.all(common.box_lower <= centre - r) and np.all(common.box_upper >= centre + r)
    assert common.scan_centre is None  # Newton from the enclosing sphere only (see planning.py)
    # On a small grid the seed shrinks to stay inside the data, and so does the region.
    small = BinaryPlanner().plan(SETTINGS, tracks, _Slice(1.2, half_width=0.6))[-1]
    assert small.seed.mean_radius == pytest.approx(0.9 * (0.6 - abs(centre[0])))
    assert np.all(small.box_lower >= -0.6) and np.all(small.box_upper <= 0.6)
    # Once started, the search continues even if the pair moves apart again.
    far = {"heavy": _found("heavy", (1.6, 0, 0), 0.3), "light": _found("light", (-2.4, 0, 0), 0.2)}
    assert _labels(planner.plan(SETTINGS, far, NEXT))[-1] == COMMON_LABEL


def test_common_seed_follows_the_previous_common_surface():
    tracks = {"heavy": _found("heavy", (0.3, 0, 0), 0.25), "light": _found("light", (-0.45, 0, 0), 0.15),
              COMMON_LABEL: _found(COMMON_LABEL, (0.02, 0.01, 0.0), 0.55, previous=(0.0, 0.0, 0.0))}
    plans = BinaryPlanner().plan(SETTINGS, tracks, NEXT)
    seed = plans[-1].seed
    # Centroid moved (0.02, 0.01, 0) in 0.4 M; 0.4 M later it is expected at (0.04, 0.02, 0).
    np.testing.assert_allclose(seed.centre, (0.04, 0.02, 0.0), atol=1e-12)
    assert seed.mean_radius == pytest.approx(0.55)


def test_single_body_runs_get_no_common_surface_and_labels_never_collide():
    single = _settings(BodySpec("A", (0, 0, 0), 1.0))
    plans = BinaryPlanner().plan(single, {"A": _found("A", (0, 0, 0), 0.5)}, NEXT)
    assert _labels(plans) == ["A"]
    assert common_label_for(["a", "b"]) == "common"
    assert common_label_for(["common", "b"]) == "common_2"
    assert common_label_for(["common", "common_2"]) == "common_3"


def test_first_common_seed_sits_where_the_bodies_are_expected_at_the_slice_time():
    # heavy moves +y at 0.25 / M, light -y at 0.375 / M (found at t = 0.4 and 0.8; slice at 1.2).
    tracks = {"heavy": _found("heavy", (0.3, 0.1, 0.0), 0.25, previous=(0.3, 0.0, 0.0)),
              "light": _found("light", (-0.45, -0.15, 0.0), 0.15, previous=(-0.45, 0.0, 0.0))}
    plans = BinaryPlanner().plan(SETTINGS, tracks, NEXT)
    heavy_next, light_next = np.array([0.3, 0.2, 0.0]), np.array([-0.45, -0.3, 0.0])
    np.testing.assert_allclose(plans[-1].seed.centre, 0.6 * heavy_next + 0.4 * light_next, atol=1e-12)
    np.testing.assert_allclose(plans[0].seed.centre, heavy_next, atol=1e-12)  # the body planner agrees


def test_a_lost_body_is_expected_where_it_was_last_seen():
    heavy = _found("heavy", (0.3, 0.1, 0.0), 0.25, previous=(0.3, 0.0, 0.0))
    light = _found("light", (-0.45, -0.15, 0.0), 0.15, previous=(-0.45, 0.0, 0.0))
    light.record_miss("not converged", iteration=32)
    plans = BinaryPlanner().plan(SETTINGS, {"heavy": heavy, "light": light}, NEXT)
    np.testing.assert_allclose(plans[-1].seed.centre, 0.6 * np.array([0.3, 0.2, 0.0]) + 0.4 * np.array([-0.45, -0.15, 0.0]),
                               atol=1e-12)


def test_a_missed_body_is_looked_for_opposite_its_partner():
    planner = BinaryPlanner()
    # Both found in the same slice: centre of mass (spec masses 0.6, 0.4) at the origin.
    tracks = {"heavy": _found("heavy", (0.4, 0.0, 0.0), 0.25), "light": _found("light", (-0.6, 0.0, 0.0), 0.15)}
    planner.plan(SETTINGS, tracks, NEXT)
    # Next slice: heavy found again (moved), light missed.
    heavy = _found("heavy", (0.38, 0.12, 0.0), 0.25, previous=(0.4, 0.0, 0.0))
    light = tracks["light"]
    light.record_miss("too few points", iteration=32)
    plans = planner.plan(SETTINGS, {"heavy": heavy, "light": light}, NEXT)
    heavy_next = heavy.predicted_centroid(NEXT.time)
    expected = -(0.6 / 0.4) * heavy_next
    light_plan = next(p for p in plans if p.label == "light")
    np.testing.assert_allclose(light_plan.scan_centre, expected, atol=1e-12)
    np.testing.assert_allclose(light_plan.seed.centre, expected, atol=1e-12)
    middle = 0.5 * (light_plan.box_lower + light_plan.box_upper)
    np.testing.assert_allclose(middle, expected, atol=1e-12)
    # The found partner's own plan is the default planner's.
    np.testing.assert_allclose(next(p for p in plans if p.label == "heavy").seed.centre, heavy_next, atol=1e-12)
