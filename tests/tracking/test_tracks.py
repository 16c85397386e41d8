"""Tracks and the puncture integration d x^i / dt = -beta^i (Campanelli, Lousto, Marronetti &
Zlochower, PRL 96, 111101 (2006); Baker, Centrella, Choi, Koppitz & van Meter, PRL 96, 111102
(2006); docs/references.md item 13)."""

import numpy as np
import pytest

from penumbra_server.tracking import (
    PUNCTURE_METHODS,
    ShiftSample,
    Track,
    TrackError,
    advance_puncture_track,
    integrate_puncture,
)

# Rigid rotation about z with a slowly growing rate: beta = -Omega(t) z_hat x x, so the puncture
# obeys dx/dt = Omega(t) z_hat x x and stays on its circle, turned by
# theta(t) = OMEGA0 (t + EPS t^2 / 2). The time dependence makes the interpolation of the shift
# between slices matter, as it does in a real run.
OMEGA0 = 0.07
EPS = 0.01
START = np.array([3.0, 0.0, 0.5])
DURATION = 32.0


def shift_at(t):
    omega = OMEGA0 * (1.0 + EPS * t)

    def shift(points):
        points = np.asarray(points, float)
        return -omega * np.cross(np.array([0.0, 0.0, 1.0]), points)

    return shift


def exact_position(t):
    theta = OMEGA0 * (t + 0.5 * EPS * t * t)
    c, s = np.cos(theta), np.sin(theta)
    return np.array([c * START[0] - s * START[1], s * START[0] + c * START[1], START[2]])


def integrate_track(dt, method):
    """Integrate from t = 0 to DURATION at slice cadence dt; returns the final track."""
    times = np.arange(0.0, DURATION + 0.5 * dt, dt)
    samples = [ShiftSample(t, shift_at(t)) for t in times]
    track = Track(body="A", times=[0.0], positions=[START], uncertainty=[0.0], source="puncture")
    for k in range(1, times.size):
        if method == "trapezoidal" or k == 1:
            window = samples[k - 1:k + 1]  # the first step has no earlier slice
        else:
            window = samples[k - 2:k + 1]
        track, step = advance_puncture_track(track, window, method="auto" if k == 1 else method)
    return track


@pytest.mark.parametrize("method", sorted(PUNCTURE_METHODS))
def test_puncture_on_a_circle_converges_at_the_stated_order(method):
    cadences = np.array([2.0, 1.0, 0.5])
    errors = []
    for dt in cadences:
        track = integrate_track(dt, method)
        assert track.latest_time == pytest.approx(DURATION)
        errors.append(np.linalg.norm(track.latest_position - exact_position(DURATION)))
    errors = np.array(errors)
    order = np.polyfit(np.log(cadences), np.log(errors), 1)[0]
    stated = PUNCTURE_METHODS[method][1]
    print(f"\npuncture integration ({method}), T = {DURATION} M, Omega = {OMEGA0}(1 + {EPS} t): "
          + ", ".join(f"dt = {dt:g} M: error {e:.3e} M" for dt, e in zip(cadences, errors))
          + f"; fitted order {order:.3f} (stated {stated})")
    assert abs(order - stated) < 0.25
    # The puncture stays on its circle of radius 3 at height 0.5 (up to the integration error).
    track = integrate_track(0.5, method)
    radii = np.hypot(track.positions[:, 0], track.positions[:, 1])
    assert np.max(np.abs(radii - 3.0)) < 10 * errors[-1] + 1e-12
    np.testing.assert_allclose(track.positions[:, 2], 0.5, atol=1e-14)


@pytest.mark.parametrize("method", sorted(PUNCTURE_METHODS))
def test_accumulated_uncertainty_covers_the_actual_error(method):
    for dt in (2.0, 1.0):
        track = integrate_track(dt, method)
        exact = np.array([exact_position(t) for t in track.times])
        actual = np.linalg.norm(track.positions - exact, axis=1)
        assert np.all(actual[1:] <= track.uncertainty[1:])
        # ...and is not absurdly loose: within a factor 100 of the error at the end.
        assert track.uncertainty[-1] < 100 * actual[-1]


def test_third_order_step_is_exact_for_a_shift_quadratic_in_time_and_constant_in_space():
    # beta(t) = -(1 + t + t^2) e_x everywhere: x(t) = x0 + (t + t^2/2 + t^3/3) e_x, which the
    # quadratic time interpolation and Kutta's third-order rule reproduce exactly.
    def sample(t):
        return ShiftSample(t, lambda p, t=t: np.tile([-(1 + t + t * t), 0.0, 0.0], (len(p), 1)))

    step = integrate_puncture([0.0, 1.0, 2.0], [sample(-0.5), sample(0.0), sample(1.0)])
    assert step.method == "quadratic_rk3" and step.order == 3
    np.testing.assert_allclose(step.position, [1 + 0.5 + 1 / 3, 1.0, 2.0], rtol=0, atol=1e-14)
    # The trapezoidal step with the same end slices is off by the curvature of the shift.
    low = integrate_puncture([0.0, 1.0, 2.0], [sample(0.0), sample(1.0)])
    assert low.method == "trapezoidal"
    assert abs(low.position[0] - (1 + 0.5 + 1 / 3)) > 0.1


def test_track_is_immutable_and_append_returns_a_new_track():
    track = Track(body="A", times=[0.0, 1.0], positions=[[0, 0, 0], [1, 0, 0]])
    longer = track.append(2.0, [2.0, 0.0, 0.0], uncertainty=0.1)
    assert track.count == 2 and longer.count == 3
    np.testing.assert_array_equal(longer.positions[-1], [2, 0, 0])
    np.testing.assert_array_equal(longer.uncertainty, [0, 0, 0.1])
    with pytest.raises(ValueError):
        track.positions[0, 0] = 5.0
    with pytest.raises(ValueError):
        longer.times[0] = 5.0
    assert track.since(1.0).count == 1


def test_track_rejects_bad_input_with_named_fields():
    with pytest.raises(TrackError, match="times"):
        Track(body="A", times=[0.0, 0.0], positions=[[0, 0, 0], [1, 0, 0]])
    with pytest.raises(TrackError, match="positions"):
        Track(body="A", times=[0.0, 1.0], positions=[[0, 0, 0]])
    with pytest.raises(TrackError, match="uncertainty"):
        Track(body="A", times=[0.0], positions=[[0, 0, 0]], uncertainty=[-1.0])
    track = Track(body="A", times=[1.0], positions=[[0, 0, 0]])
    with pytest.raises(TrackError, match="not later"):
        track.append(1.0, [0, 0, 0])
    with pytest.raises(TrackError, match="no points"):
        Track.empty("B").latest_position


def test_integration_rejects_bad_samples():
    good = [ShiftSample(0.0, shift_at(0.0)), ShiftSample(1.0, shift_at(1.0))]
    with pytest.raises(TrackError, match="samples"):
        integrate_puncture(START, good[:1])
    with pytest.raises(TrackError, match="needs 3"):
        integrate_puncture(START, good, method="quadratic_rk3")
    with pytest.raises(TrackError, match="strictly increasing"):
        integrate_puncture(START, good[::-1])
    with pytest.raises(TrackError, match=r"shape \(1, 3\)"):
        integrate_puncture(START, [ShiftSample(0.0, lambda p: np.zeros(3)), good[1]])
    with pytest.raises(TrackError, match="not finite"):
        integrate_puncture(START, [ShiftSample(0.0, lambda p: np.full((1, 3), np.nan)), good[1]])
    track = Track(body="A", times=[0.5], positions=[START])
    with pytest.raises(TrackError, match="ends at"):
        advance_puncture_track(track, good)


def test_substeps_reduce_the_step_error_when_the_shift_is_stationary():
    # With a time-independent shift the linear time interpolation is exact, so only the
    # trapezoidal step error is left: 4 sub-steps cut it by about 4^2.
    omega = 0.07

    def shift(points):
        return -omega * np.cross(np.array([0.0, 0.0, 1.0]), np.asarray(points, float))

    dt = 4.0
    exact = np.array([3.0 * np.cos(omega * dt), 3.0 * np.sin(omega * dt), 0.5])
    samples = [ShiftSample(0.0, shift), ShiftSample(dt, shift)]
    one = integrate_puncture(START, samples, method="trapezoidal")
    four = integrate_puncture(START, samples, method="trapezoidal", substeps=4)
    e1 = np.linalg.norm(one.position - exact)
    e4 = np.linalg.norm(four.position - exact)
    assert four.substeps == 4
    assert 10.0 < e1 / e4 < 20.0
    assert four.error_estimate < one.error_estimate
