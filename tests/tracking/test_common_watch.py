"""The common-horizon watch criterion and the common-surface guess."""

import numpy as np
import pytest

from penumbra_server.tracking import (
    DEFAULT_COMMON_FACTOR,
    CommonWatchError,
    common_horizon_watch,
    common_surface_guess,
)

# Two equal Brill-Lindquist bare masses m: a common horizon exists below a coordinate
# separation of about 1.53 m (Cadez, Ann. Phys. 83, 449 (1974); Bishop, GRG 14, 717 (1982);
# docs/references.md item 7, from memory there); each individual horizon's coordinate radius is
# close to m/2 (isotropic Schwarzschild, docs/references.md item 7).
M_BARE = 0.5
D_CRITICAL = 1.53 * M_BARE
R_INDIVIDUAL = 0.5 * M_BARE


def on_x_axis(separation, *, masses=(0.5, 0.5)):
    m1, m2 = masses
    total = m1 + m2
    return np.array([m2 / total * separation, 0, 0]), np.array([-m1 / total * separation, 0, 0])


def test_search_starts_before_the_brill_lindquist_common_horizon_forms():
    xa, xb = on_x_axis(D_CRITICAL)
    advice = common_horizon_watch(xa, xb, radius_a=R_INDIVIDUAL, radius_b=R_INDIVIDUAL, masses=(M_BARE, M_BARE))
    assert advice.search
    assert advice.separation_ratio == pytest.approx(1.53)
    # The threshold sits well above the formation ratio: searching starts at about twice the
    # separation at which the common horizon can first exist.
    start_separation = DEFAULT_COMMON_FACTOR * 2 * R_INDIVIDUAL
    assert start_separation / D_CRITICAL > 1.9


def test_no_search_while_the_bodies_are_far_apart():
    xa, xb = on_x_axis(10.0)
    advice = common_horizon_watch(xa, xb, radius_a=0.25, radius_b=0.25, masses=(0.5, 0.5))
    assert not advice.search
    assert "no common-surface search" in advice.reason


def test_threshold_is_the_stated_factor():
    r = 0.3
    threshold = DEFAULT_COMMON_FACTOR * 2 * r
    near = common_horizon_watch(*on_x_axis(threshold * 0.999), radius_a=r, radius_b=r, masses=(0.5, 0.5))
    far = common_horizon_watch(*on_x_axis(threshold * 1.001), radius_a=r, radius_b=r, masses=(0.5, 0.5))
    assert near.search and not far.search
    custom = common_horizon_watch(*on_x_axis(threshold * 1.001), radius_a=r, radius_b=r, masses=(0.5, 0.5),
                                  factor=4.0)
    assert custom.search


def test_forecast_bringing_the_bodies_close_triggers_the_search():
    # Separation shrinks from 4 to 1.5 over the forecast; radii 0.25 each: ratio 3 is crossed
    # inside the interval, not at its start.
    separations = np.linspace(4.0, 1.2, 8)
    pa = np.array([on_x_axis(d)[0] for d in separations])
    pb = np.array([on_x_axis(d)[1] for d in separations])
    advice = common_horizon_watch(pa, pb, radius_a=0.25, radius_b=0.25, masses=(0.5, 0.5))
    assert advice.search
    assert advice.closest_index == 7
    assert advice.closest_separation == pytest.approx(1.2)
    first_only = common_horizon_watch(pa[0], pb[0], radius_a=0.25, radius_b=0.25, masses=(0.5, 0.5))
    assert not first_only.search


def test_a_search_under_way_continues_until_found():
    xa, xb = on_x_axis(5.0)
    advice = common_horizon_watch(xa, xb, radius_a=0.25, radius_b=0.25, masses=(0.5, 0.5),
                                  already_searching=True)
    assert advice.search and "under way" in advice.reason


@pytest.mark.parametrize("masses", [(0.5, 0.5), (0.75, 0.25)])
def test_guess_encloses_both_horizons_and_is_centred_on_the_neck(masses):
    rng = np.random.default_rng(3)
    xa = np.array([0.6, -0.2, 0.1])
    xb = np.array([-0.4, 0.3, -0.1])
    ra, rb = 0.35, 0.15
    centre, radius = common_surface_guess(xa, xb, radius_a=ra, radius_b=rb, masses=masses)
    # The neck: the least two-centre potential m_A / r_A + m_B / r_B on the segment between the
    # bodies, found here by scipy's bounded minimiser (independent of the closed form used).
    from scipy.optimize import minimize_scalar

    def potential(s):
        x = xa + s * (xb - xa)
        return masses[0] / np.linalg.norm(x - xa) + masses[1] / np.linalg.norm(x - xb)

    s_min = minimize_scalar(potential, bounds=(1e-6, 1 - 1e-6), method="bounded", options={"xatol": 1e-12}).x
    np.testing.assert_allclose(centre, xa + s_min * (xb - xa), atol=1e-8)
    directions = rng.standard_normal((500, 3))
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    for x, r in ((xa, ra), (xb, rb)):
        horizon_points = x + r * directions
        assert np.all(np.linalg.norm(horizon_points - centre, axis=1) < radius)
    # Not needlessly large: the enclosure factor 1.1 over the tightest enclosing sphere.
    tight = max(np.linalg.norm(centre - xa) + ra, np.linalg.norm(centre - xb) + rb)
    assert radius == pytest.approx(1.1 * tight)


def test_equal_mass_guess_radius_is_half_separation_plus_radius():
    xa, xb = on_x_axis(2.0)
    centre, radius = common_surface_guess(xa, xb, radius_a=0.4, radius_b=0.4, masses=(1.0, 1.0),
                                          enclosure_factor=1.0)
    np.testing.assert_allclose(centre, 0.0, atol=1e-15)
    assert radius == pytest.approx(1.0 + 0.4)


def test_bad_input_names_the_field():
    xa, xb = on_x_axis(2.0)
    with pytest.raises(CommonWatchError, match="radius_a"):
        common_horizon_watch(xa, xb, radius_a=-1.0, radius_b=0.2, masses=(1, 1))
    with pytest.raises(CommonWatchError, match="masses"):
        common_horizon_watch(xa, xb, radius_a=0.2, radius_b=0.2, masses=(1, 0))
    with pytest.raises(CommonWatchError, match="positions_b"):
        common_horizon_watch(np.zeros((3, 3)), np.zeros((2, 3)), radius_a=0.2, radius_b=0.2, masses=(1, 1))
    with pytest.raises(CommonWatchError, match="enclosure_factor"):
        common_surface_guess(xa, xb, radius_a=0.2, radius_b=0.2, masses=(1, 1), enclosure_factor=0.9)
