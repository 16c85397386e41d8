"""Growth of expired data windows (shim, numpy only) and the motion bound the server states.

The shim's rule: a slice at time t outside [valid_from, valid_until] is cropped to every window
widened on each side by min(speed_bound * lag, growth_cap); the server's bound: forecast speed
plus uncertainty growth, times a safety factor, and for a bound pair a cap from the disc the
orbit sweeps. The checks use circular orbits whose speed is known in closed form.
"""

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim.cropping import (
    NEARLY_WHOLE_FRACTION,
    CropError,
    grow_expired_windows,
    worth_cropping,
)
from penumbra_server.tracking.forecast import Forecast
from penumbra_server.tracking.motion import (
    MIN_SPEED_BOUND,
    SPEED_SAFETY,
    UNKNOWN_SPEED,
    MotionError,
    forecast_speed_bound,
    orbit_growth_cap,
)

WINDOWS = np.array([[[-1.0, -2.0, -0.5], [1.0, 0.0, 0.5]],
                    [[3.0, 3.0, 3.0], [4.0, 5.0, 3.5]]])


def grow(time, *, speed=0.3, cap=0.0, valid=(1.0, 2.0)):
    return grow_expired_windows(WINDOWS, time=time, valid_from=valid[0], valid_until=valid[1],
                                speed_bound=speed, growth_cap=cap)


def test_windows_inside_their_validity_are_unchanged():
    for t in (1.0, 1.5, 2.0):
        g = grow(t)
        assert g.lag == 0.0 and g.growth == 0.0 and not g.grown and not g.capped
        np.testing.assert_array_equal(g.bounds, WINDOWS)


def test_expired_windows_grow_by_speed_times_lag_on_every_side():
    g = grow(3.0, speed=0.3)  # 1 M past valid_until
    assert g.lag == pytest.approx(1.0) and g.growth == pytest.approx(0.3) and g.grown
    np.testing.assert_allclose(g.bounds[:, 0], WINDOWS[:, 0] - 0.3)
    np.testing.assert_allclose(g.bounds[:, 1], WINDOWS[:, 1] + 0.3)
    # Linear in the lag; a slice before valid_from is treated alike.
    assert grow(5.0, speed=0.3).growth == pytest.approx(0.9)
    assert grow(0.25, speed=0.3).growth == pytest.approx(0.225)


def test_the_cap_limits_the_growth():
    g = grow(12.0, speed=0.3, cap=1.2)  # uncapped 3 M
    assert g.capped and g.growth == pytest.approx(1.2)
    np.testing.assert_allclose(g.bounds[:, 1] - g.bounds[:, 0], WINDOWS[:, 1] - WINDOWS[:, 0] + 2.4)
    assert not grow(3.0, speed=0.3, cap=1.2).capped


def test_no_speed_bound_means_expired_windows_are_not_used():
    assert grow(3.0, speed=0.0) is None
    assert grow(1.5, speed=0.0).growth == 0.0  # still valid: used as they are


def test_growth_input_errors_name_the_field():
    with pytest.raises(CropError, match="speed_bound"):
        grow(3.0, speed=-1.0)
    with pytest.raises(CropError, match="time"):
        grow(float("nan"))
    with pytest.raises(CropError, match="valid_from"):
        grow(3.0, valid=(2.0, 1.0))
    with pytest.raises(CropError, match="windows"):
        grow_expired_windows([[1, 2]], time=0.0, valid_from=0.0, valid_until=1.0, speed_bound=1.0)


def test_worth_cropping_threshold():
    assert worth_cropping(0, 100) and worth_cropping(89, 100)
    assert not worth_cropping(90, 100) and not worth_cropping(100, 100)
    assert NEARLY_WHOLE_FRACTION == 0.9
    with pytest.raises(CropError, match="fraction"):
        worth_cropping(1, 2, fraction=0.0)


def test_data_windows_from_the_wire_carry_the_bound_and_grow():
    from penumbra_shim._wire import horizons_pb2 as pb

    wire = pb.DataWindowsWanted(time_m=1.0, iteration=7, valid_from_m=1.0, valid_until_m=2.0, extra_nodes=6,
                                speed_bound=0.5, growth_cap_m=0.75)
    wire.windows.add(name="A", lower_m=pb.Vector3(x=-1, y=-1, z=-1), upper_m=pb.Vector3(x=1, y=1, z=1))
    windows = ps.DataWindows.from_wire(wire)
    assert windows.speed_bound == 0.5 and windows.growth_cap == 0.75
    g = windows.grown_bounds(3.0)
    assert g.growth == pytest.approx(0.5)
    np.testing.assert_allclose(g.bounds[0], [[-1.5] * 3, [1.5] * 3])
    assert windows.grown_bounds(10.0).growth == pytest.approx(0.75)
    # An older server sends no bound: expired windows are not grown.
    wire.ClearField("speed_bound")
    assert ps.DataWindows.from_wire(wire).grown_bounds(3.0) is None


# -- the server's motion bound ----------------------------------------------------------------


def circular_forecast(radius, omega, times, uncertainty=None):
    """Two bodies on a circle of ``radius`` about the origin, opposite each other (speed omega r)."""
    t = np.asarray(times, float)
    a = np.stack([radius * np.cos(omega * t), radius * np.sin(omega * t), 0 * t], axis=1)
    unc = np.zeros((2, t.size)) if uncertainty is None else np.asarray(uncertainty, float)
    return Forecast(bodies=("A", "B"), times=t, positions=np.stack([a, -a]), uncertainty=unc, model="orbit",
                    reason="test", fit_window=(0.0, 0.0))


def test_speed_bound_of_a_circular_orbit_is_the_safety_times_omega_r():
    times = np.linspace(0.0, 2.0, 201)
    fc = circular_forecast(2.0, 0.25, times)
    # Chords underestimate the arc by (omega dt)^2 / 24 relative; 201 samples make that ~1e-7.
    assert forecast_speed_bound(fc) == pytest.approx(SPEED_SAFETY * 0.5, rel=1e-6)
    assert forecast_speed_bound(fc, safety=1.0) == pytest.approx(0.5, rel=1e-6)


def test_speed_bound_adds_the_uncertainty_growth_rate():
    times = np.linspace(0.0, 2.0, 201)
    unc = np.stack([0.1 + 0.2 * times, 0.1 + 0.05 * times])
    fc = circular_forecast(2.0, 0.25, times, unc)
    assert forecast_speed_bound(fc, safety=1.0) == pytest.approx(0.5 + 0.2, rel=1e-6)


def test_uncertainty_growth_never_lifts_the_bound_above_light_or_the_forecast_speed():
    times = np.linspace(0.0, 2.0, 201)
    wild = np.stack([5.0 * times, 5.0 * times])  # a few-sample fit: uncertainty growing at 5 M/M
    assert forecast_speed_bound(circular_forecast(2.0, 0.25, times, wild)) == pytest.approx(1.0)
    # A body faster than light in coordinates keeps its own (safety x speed) bound.
    fast = circular_forecast(2.0, 1.0, times, wild)
    assert forecast_speed_bound(fast) == pytest.approx(SPEED_SAFETY * 2.0, rel=1e-4)


def test_unknown_motion_counts_at_the_speed_of_light_and_the_bound_is_never_zero():
    times = np.linspace(0.0, 1.0, 5)
    assert forecast_speed_bound(None) == UNKNOWN_SPEED
    fc = circular_forecast(2.0, 0.25, times, np.full((2, 5), np.inf))
    assert forecast_speed_bound(fc) == UNKNOWN_SPEED
    resting = circular_forecast(2.0, 0.0, times)
    assert forecast_speed_bound(resting) == MIN_SPEED_BOUND
    with pytest.raises(MotionError, match="safety"):
        forecast_speed_bound(resting, safety=0.5)


def test_orbit_cap_is_the_swept_disc_diameter_and_bounds_every_later_displacement():
    # Unequal masses 3:1 on circles about their centre of mass (radii 0.5 and 1.5), the
    # separation shrinking from 2 to 1: every later position of a body lies within the cap of
    # every earlier one.
    m = (3.0, 1.0)
    t = np.linspace(0.0, 10.0, 400)
    d = 2.0 - 0.1 * t
    phase = 0.7 * t
    sep = np.stack([d * np.cos(phase), d * np.sin(phase), 0 * t], axis=1)
    a, b = 0.25 * sep, -0.75 * sep
    cap = orbit_growth_cap([a[:40], b[:40]], m, uncertainty=0.05)
    reach = 0.75 * 2.0  # the lighter body starts 1.5 M from the centre
    assert cap == pytest.approx(2 * 1.25 * reach + 0.05, rel=1e-3)
    for path in (a, b):
        jumps = np.linalg.norm(path[:, None, :] - path[None, 40:, :], axis=2)
        assert jumps.max() <= cap
    with pytest.raises(MotionError, match="masses"):
        orbit_growth_cap([a, b], (1.0, -1.0))
    with pytest.raises(MotionError, match=r"paths\[1\]"):
        orbit_growth_cap([a, np.zeros((0, 3))], m)
