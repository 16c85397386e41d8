"""Data windows for the next slice: around forecast surfaces and a pending common search."""

import numpy as np
import pytest

from penumbra_server.tracking import (
    DataWindow,
    Forecast,
    WindowError,
    common_horizon_watch,
    data_windows,
    grow_windows,
    window_coverage,
)


def moving_forecast(starts, velocity, *, uncertainty=0.02, times=np.linspace(0.0, 4.0, 5)):
    starts = np.asarray(starts, float)
    velocity = np.asarray(velocity, float)
    positions = starts[:, None, :] + times[None, :, None] * velocity[:, None, :]
    return Forecast(bodies=tuple("AB"[: len(starts)]), times=times, positions=positions,
                    uncertainty=np.full((len(starts), times.size), uncertainty), model="orbit",
                    reason="test", fit_window=(-10.0, 0.0))


def test_window_holds_the_horizon_along_the_forecast_path_with_the_stencil_margin():
    fc = moving_forecast([[5, 0, 0], [-5, 0, 0]], [[0, 0.2, 0], [0, -0.2, 0]])
    ws = data_windows(fc, radii={"A": 0.5, "B": 0.5}, spacing=0.03, margin_points=8)
    assert ws.names() == ("A", "B")
    a = ws.windows[0]
    grow = 0.5 + 0.02 + 8 * 0.03
    np.testing.assert_allclose(a.lower, [5 - grow, 0 - grow, -grow])
    np.testing.assert_allclose(a.upper, [5 + grow, 0.8 + grow, grow])
    # Every point within r_max + margin of the path is inside.
    for p in fc.positions_of("A"):
        assert a.contains(p + np.array([0.5 + 8 * 0.03, 0, 0]))
    assert not a.contains(fc.positions_of("A")[-1] + np.array([0, grow + 0.01, 0]))
    assert ws.bounds().shape == (2, 2, 3)
    assert (ws.valid_from, ws.valid_until) == (0.0, 4.0)


def test_common_search_adds_a_window_and_overlapping_windows_merge():
    fc = moving_forecast([[1.2, 0, 0], [-1.2, 0, 0]], [[0, 0.1, 0], [0, -0.1, 0]])
    advice = common_horizon_watch(fc.positions[0], fc.positions[1], radius_a=0.5, radius_b=0.5, masses=(1, 1))
    assert advice.search
    ws = data_windows(fc, radii={"A": 0.5, "B": 0.5}, spacing=0.03, common=advice)
    # The body windows overlap each other and the common one: one merged box covers all three.
    assert len(ws.windows) == 1
    merged = ws.windows[0]
    assert set(merged.name.split("+")) == {"A", "B", "common"}
    for p in np.concatenate(fc.positions):
        assert merged.contains(p)
    far = moving_forecast([[6, 0, 0], [-6, 0, 0]], [[0, 0, 0], [0, 0, 0]])
    separate = data_windows(far, radii={"A": 0.5, "B": 0.5}, spacing=0.03)
    assert separate.names() == ("A", "B")


def test_grow_windows_widens_only_the_windows_that_lacked_data():
    fc = moving_forecast([[5, 0, 0], [-5, 0, 0]], [[0, 0, 0], [0, 0, 0]])
    ws = data_windows(fc, radii={"A": 0.5, "B": 0.5}, spacing=0.03)
    grown = grow_windows(ws, lacking=["B"], factor=2.0)
    a0, b0 = ws.windows
    a1, b1 = grown.windows
    np.testing.assert_array_equal(a1.lower, a0.lower)
    np.testing.assert_allclose(b1.half_width, 2 * b0.half_width)
    np.testing.assert_allclose(b1.centre, b0.centre)
    assert b1.growth == 1 and a1.growth == 0
    assert grow_windows(grown, lacking=["B"]).windows[1].growth == 2
    with pytest.raises(WindowError, match="lacking"):
        grow_windows(ws, lacking=["C"])
    with pytest.raises(WindowError, match="factor"):
        grow_windows(ws, lacking=["A"], factor=1.0)


def test_window_coverage_measures_what_the_patches_hold():
    window = DataWindow(name="A", lower=[0, 0, 0], upper=[1, 1, 1], reason="test")
    full = dict(origin=[-0.5, -0.5, -0.5], spacing=[0.1] * 3, shape=(21, 21, 21))
    half = dict(origin=[-0.5, -0.5, -0.5], spacing=[0.1] * 3, shape=(11, 21, 21))  # x up to 0.5
    assert window_coverage(window, [full]) == 1.0
    assert window_coverage(window, [half], samples_per_axis=11) == pytest.approx(6 / 11)
    assert window_coverage(window, []) == 0.0


def test_bad_input_names_the_field():
    fc = moving_forecast([[5, 0, 0]], [[0, 0, 0]])
    with pytest.raises(WindowError, match="radii"):
        data_windows(fc, radii={}, spacing=0.03)
    with pytest.raises(WindowError, match="spacing"):
        data_windows(fc, radii={"A": 0.5}, spacing=-1.0)
    with pytest.raises(WindowError, match="lower < upper"):
        DataWindow(name="x", lower=[0, 0, 0], upper=[0, 1, 1], reason="")
