"""Forecasts on synthetic quasi-circular inspirals from Peters' leading-order formula
(Peters, Phys. Rev. 136, B1224 (1964): da/dt = -(64/5) m1 m2 (m1 + m2) / a^3,
omega^2 = (m1 + m2) / a^3; docs/references.md item 14), compared with quadratic extrapolation of the same samples."""

import numpy as np
import pytest

from penumbra_server.tracking import (
    Forecast,
    ForecastError,
    Track,
    forecast_bodies,
    forecast_pair,
    forecast_polynomial,
)
from tracking_synthetic import PetersInspiral, mass_ratio_pair


def forecast_cases(inspiral, *, cadence, stride, noise=0.0, rng=None, lowest_separation=3.0):
    """Forecast a quarter orbit ahead from many points of the inspiral.

    The "now" points run from the start (a = 12 M) while the whole quarter orbit ahead stays
    at a >= lowest_separation. Returns per case and body: the orbit model's largest error over
    the quarter orbit, the quadratic extrapolation's, and the stated uncertainty's coverage.
    """
    t_end = inspiral.time_at_separation(lowest_separation)
    t = np.arange(0.0, t_end, cadence)
    x1, x2 = inspiral.positions(t)
    if noise:
        x1 = x1 + noise * rng.standard_normal(x1.shape)
        x2 = x2 + noise * rng.standard_normal(x2.shape)
    masses = (inspiral.m1, inspiral.m2)
    rows = []
    for i in range(9, t.size, stride):
        quarter = 0.5 * np.pi / float(inspiral.orbital_frequency(t[i]))
        times = t[i] + np.linspace(0.0, quarter, 9)
        if times[-1] >= t_end:
            break
        y1, y2 = inspiral.positions(times)
        a_track = Track(body="A", times=t[:i + 1], positions=x1[:i + 1])
        b_track = Track(body="B", times=t[:i + 1], positions=x2[:i + 1])
        fc = forecast_pair(a_track, b_track, masses=masses, times=times)
        for k, (truth, track) in enumerate(((y1, a_track), (y2, b_track))):
            err = np.linalg.norm(fc.positions[k] - truth, axis=1)
            quad = forecast_polynomial(track, times=times, degree=2, points=3)
            quad_err = np.linalg.norm(quad.positions[0] - truth, axis=1)
            # A second baseline: least-squares quadratic over the orbit fit's own window.
            points = int(fc.details.get("window_points", 3))
            wide = forecast_polynomial(track, times=times, degree=2, points=points)
            wide_err = np.linalg.norm(wide.positions[0] - truth, axis=1)
            rows.append(dict(model=fc.model, error=err.max(), quadratic_error=quad_err.max(),
                             window_quadratic_error=wide_err.max(), stated=fc.uncertainty[k].max(),
                             covered=bool(np.all(err <= fc.uncertainty[k])),
                             separation=float(inspiral.separation(t[i]))))
    return rows


@pytest.mark.parametrize("q", [1.0, 3.0])
def test_orbit_model_beats_quadratic_extrapolation_over_a_quarter_orbit(q):
    inspiral = PetersInspiral(*mass_ratio_pair(q), a0=12.0)
    rows = forecast_cases(inspiral, cadence=1.5, stride=13)
    assert len(rows) >= 100
    assert all(r["model"] == "orbit" for r in rows)
    err = np.array([r["error"] for r in rows])
    quad = np.array([r["quadratic_error"] for r in rows])
    wide = np.array([r["window_quadratic_error"] for r in rows])
    stated = np.array([r["stated"] for r in rows])
    coverage = np.mean([r["covered"] for r in rows])
    ratio = np.median(quad) / np.median(err)
    seps = [r["separation"] for r in rows]
    print(f"\nPeters inspiral q = {q:g}, a = {max(seps):.2f}..{min(seps):.2f} M at 'now', cadence 1.5 M, "
          f"{len(rows)} body-forecasts over a quarter orbit: median error orbit model {np.median(err):.3e} M, "
          f"quadratic through the last 3 samples {np.median(quad):.3e} M, ratio {ratio:.0f}x; "
          f"90th percentile orbit {np.quantile(err, 0.9):.3e} M; least-squares quadratic over the fit window "
          f"{np.median(wide):.3e} M; stated uncertainty covers {100 * coverage:.1f}%, median stated/actual "
          f"{np.median(stated / err):.1f}")
    assert ratio >= 3.0
    assert np.median(wide) >= 3.0 * np.median(err)
    # The uncertainty is an estimate, not a blanket: typically within a factor 10 of the error.
    assert np.median(stated / err) < 10.0
    # Case by case, not only at the median.
    assert np.mean(quad >= 3.0 * err) >= 0.9
    assert coverage >= 0.9


def test_uncertainty_covers_a_case_it_was_not_tuned_on():
    """Mass ratio 2, cadence 2 M, tilted orbital plane, drifting centre of mass, noisy samples."""
    rng = np.random.default_rng(20240611)
    rotation, _ = np.linalg.qr(rng.standard_normal((3, 3)))
    inspiral = PetersInspiral(*mass_ratio_pair(2.0), a0=12.0, rotation=rotation,
                              cm_velocity=np.array([2e-3, -1e-3, 5e-4]))
    rows = forecast_cases(inspiral, cadence=2.0, stride=11, noise=1e-3, rng=rng)
    err = np.array([r["error"] for r in rows])
    quad = np.array([r["quadratic_error"] for r in rows])
    coverage = np.mean([r["covered"] for r in rows])
    print(f"\nq = 2, tilted, drifting, noise 1e-3 M: median error orbit {np.median(err):.3e} M, "
          f"quadratic {np.median(quad):.3e} M, ratio {np.median(quad) / np.median(err):.0f}x, coverage "
          f"{100 * coverage:.1f}%")
    assert all(r["model"] == "orbit" for r in rows)
    assert coverage >= 0.9
    assert np.median(quad) >= 3.0 * np.median(err)


def _pair_tracks(t, x1, x2, **kw):
    return Track(body="A", times=t, positions=x1, **kw), Track(body="B", times=t, positions=x2, **kw)


def test_unbound_fly_by_falls_back_to_polynomials():
    # Straight lines past each other at relative speed 1.6 and impact parameter 10: E > 0.
    t = np.arange(0.0, 20.0, 1.0)
    x1 = np.stack([-10 + 0.8 * t, np.full_like(t, 5.0), np.zeros_like(t)], axis=1)
    x2 = np.stack([10 - 0.8 * t, np.full_like(t, -5.0), np.zeros_like(t)], axis=1)
    a, b = _pair_tracks(t, x1, x2)
    times = np.linspace(19.0, 25.0, 5)
    fc = forecast_pair(a, b, masses=(0.5, 0.5), times=times)
    assert fc.model == "polynomial"
    assert "unbound" in fc.reason
    # Straight-line motion is reproduced by the polynomial fallback.
    np.testing.assert_allclose(fc.positions_of("A")[:, 0], -10 + 0.8 * times, atol=1e-9)


def test_noisy_tracks_fall_back_and_state_why():
    rng = np.random.default_rng(7)
    inspiral = PetersInspiral(0.5, 0.5, a0=10.0)
    t = np.arange(0.0, 150.0, 1.5)
    x1, x2 = inspiral.positions(t)
    a, b = _pair_tracks(t, x1 + 0.5 * rng.standard_normal(x1.shape), x2 + 0.5 * rng.standard_normal(x2.shape))
    fc = forecast_pair(a, b, masses=(0.5, 0.5), times=t[-1] + np.linspace(0, 10, 5))
    assert fc.model == "polynomial"
    assert "noisy" in fc.reason
    # The same orbit without the noise qualifies.
    clean = forecast_pair(*_pair_tracks(t, x1, x2), masses=(0.5, 0.5), times=t[-1] + np.linspace(0, 10, 5))
    assert clean.model == "orbit"


def test_short_shared_history_falls_back():
    inspiral = PetersInspiral(0.5, 0.5)
    t = np.arange(0.0, 6.0, 1.0)
    a, b = _pair_tracks(t, *inspiral.positions(t))
    fc = forecast_pair(a, b, masses=(0.5, 0.5), times=[5.0, 6.0])
    assert fc.model == "polynomial" and "shared sample times" in fc.reason


def test_tracks_sampled_at_partly_different_times_use_the_shared_ones():
    inspiral = PetersInspiral(0.5, 0.5)
    t = np.arange(0.0, 60.0, 1.5)
    x1, x2 = inspiral.positions(t)
    a = Track(body="A", times=t, positions=x1)
    keep = np.ones(t.size, bool)
    keep[::3] = False  # body B was not found in every third slice
    b = Track(body="B", times=t[keep], positions=x2[keep])
    times = t[-1] + np.linspace(0, 20, 5)
    fc = forecast_pair(a, b, masses=(0.5, 0.5), times=times)
    assert fc.model == "orbit"
    y1, y2 = inspiral.positions(times)
    assert np.all(np.linalg.norm(fc.positions_of("A") - y1, axis=1) <= fc.uncertainty_of("A"))


def test_head_on_infall_keeps_the_orbit_model_without_a_plane():
    # Radial infall along x (no angular motion): the separation vectors span a line only.
    t = np.arange(0.0, 30.0, 1.0)
    sep = 10.0 - 0.002 * t**2
    x1 = np.stack([0.5 * sep, 0 * t, 0 * t], axis=1)
    a, b = _pair_tracks(t, x1, -x1)
    times = t[-1] + np.linspace(0, 5, 6)
    fc = forecast_pair(a, b, masses=(0.5, 0.5), times=times)
    assert fc.model == "orbit"
    expected = 0.5 * (10.0 - 0.002 * times**2)
    np.testing.assert_allclose(fc.positions_of("A")[:, 0], expected, atol=1e-8)
    np.testing.assert_allclose(fc.positions_of("A")[:, 1:], 0.0, atol=1e-8)


def test_single_body_polynomial_is_exact_for_quadratic_motion():
    t = np.arange(0.0, 10.0, 1.0)
    x = np.stack([1 + 0.3 * t + 0.02 * t**2, -0.5 * t, 0.01 * t**2], axis=1)
    track = Track(body="remnant", times=t, positions=x, uncertainty=np.full(t.size, 1e-3))
    times = np.linspace(9.0, 15.0, 4)
    fc = forecast_bodies([track], times=times)
    assert fc.model == "polynomial" and fc.bodies == ("remnant",)
    truth = np.stack([1 + 0.3 * times + 0.02 * times**2, -0.5 * times, 0.01 * times**2], axis=1)
    np.testing.assert_allclose(fc.positions[0], truth, atol=1e-9)
    # The stated uncertainty includes the track's own per-point uncertainty.
    assert np.all(fc.uncertainty[0] >= 1e-3)


def test_single_point_gives_a_static_forecast_with_unknown_uncertainty():
    track = Track(body="A", times=[3.0], positions=[[1.0, 2.0, 3.0]])
    fc = forecast_polynomial(track, times=[3.0, 5.0])
    assert fc.model == "static"
    np.testing.assert_array_equal(fc.positions[0], [[1, 2, 3], [1, 2, 3]])
    assert np.all(np.isinf(fc.uncertainty))


def test_forecast_is_frozen_and_validates_input():
    inspiral = PetersInspiral(0.5, 0.5)
    t = np.arange(0.0, 30.0, 1.5)
    a, b = _pair_tracks(t, *inspiral.positions(t))
    fc = forecast_pair(a, b, masses=(0.5, 0.5), times=[t[-1], t[-1] + 1])
    assert isinstance(fc, Forecast)
    with pytest.raises(ValueError):
        fc.positions[0, 0, 0] = 1.0
    with pytest.raises(ForecastError, match="masses"):
        forecast_pair(a, b, masses=(0.5, -1.0), times=[1.0])
    with pytest.raises(ForecastError, match="times"):
        forecast_pair(a, b, masses=(0.5, 0.5), times=[[1.0]])
    with pytest.raises(ForecastError, match="track_b"):
        forecast_pair(a, a, masses=(0.5, 0.5), times=[1.0])
    with pytest.raises(ForecastError, match="masses"):
        forecast_bodies([a, b], times=[1.0])
    with pytest.raises(ForecastError, match="body"):
        fc.positions_of("C")
