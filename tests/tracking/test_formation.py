"""The formation-time forecast from a history of c_min (synthetic histories with known zeros)."""

import numpy as np
import pytest

from penumbra_server.tracking.formation import FormationForecastError, forecast_formation


def test_a_straight_history_is_forecast_exactly():
    t = np.arange(5.0)
    c = 0.2 - 0.03 * t  # zero at t = 20/3
    f = forecast_formation(t, c, np.full(5, 1e-6))
    assert f.available and f.based_on == 5
    assert f.time == pytest.approx(20 / 3, abs=1e-6)
    assert f.uncertainty < 1e-3
    assert f.slope == pytest.approx(-0.03, rel=1e-6)


def test_an_accelerating_history_is_bracketed_with_noise():
    # c_min(t) = 0.15 - 0.01 t - 0.001 t^2 (zero at t = 7.25...), noise of the stated size
    t_zero = (-0.01 + np.sqrt(1e-4 + 4 * 0.001 * 0.15)) / (2 * 0.001)
    rng = np.random.default_rng(7)
    hits, trials = 0, 200
    for _ in range(trials):
        t = np.arange(0.0, 5.0)
        err = np.full(t.size, 2e-3)
        c = 0.15 - 0.01 * t - 0.001 * t**2 + rng.normal(0.0, 1e-3, t.size)
        f = forecast_formation(t, c, err)
        hits += f.available and abs(f.time - t_zero) <= f.uncertainty
    assert hits >= 0.9 * trials


def test_no_forecast_when_c_min_does_not_fall():
    f = forecast_formation([0.0, 1.0, 2.0], [0.1, 0.1, 0.12], [1e-4] * 3)
    assert not f.available and np.isnan(f.time) and "not falling" in f.reason
    one = forecast_formation([0.0], [0.1], [1e-4])
    assert not one.available and one.based_on == 1


@pytest.mark.parametrize("kwargs, field", [
    (dict(times=[0.0, 1.0], c_min=[0.1], c_min_error=[0.0, 0.0]), "c_min"),
    (dict(times=[1.0, 0.0], c_min=[0.1, 0.0], c_min_error=[0.0, 0.0]), "increasing"),
    (dict(times=[0.0, 1.0], c_min=[0.1, np.nan], c_min_error=[0.0, 0.0]), "finite"),
    (dict(times=[0.0, 1.0], c_min=[0.1, 0.0], c_min_error=[0.0, -1.0]), "c_min_error"),
    (dict(times=[], c_min=[], c_min_error=[]), "times"),
])
def test_bad_input_names_the_field(kwargs, field):
    with pytest.raises(FormationForecastError, match=field):
        forecast_formation(**kwargs)

