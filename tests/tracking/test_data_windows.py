"""The data-window rule the server uses (tracking/data_windows.py): each window holds the data
region of the next search about its surface plus the slack, grows per growth step, and windows
that overlap merge; plus the coverage measure and the window's own validation (tracking/windows.py)."""

import numpy as np
import pytest

from penumbra_server.tracking import DataWindow, WindowError, common_horizon_watch, merge_overlapping_windows, window_coverage
from penumbra_server.tracking import data_windows as rule


def test_path_window_holds_the_seeded_region_along_the_forecast_path_plus_the_slack():
    path = np.array([[5.0, 0.0, 0.0], [5.0, 0.4, 0.0], [5.0, 0.8, 0.0]])
    w = rule.forecast_path_window("A", "A (orbit)", path, [0.0, 0.01, 0.02], radius_max=0.5, growth=0, spacing=0.03,
                                  unknown_motion_factor=1.0)
    grow = 1.6 * 0.5 + 0.02 + 2 * 0.03  # BOX_FACTOR r_max + largest uncertainty + 2 grid points
    np.testing.assert_allclose(w.lower, [5 - grow, -grow, -grow])
    np.testing.assert_allclose(w.upper, [5 + grow, 0.8 + grow, grow])
    assert w.name == "A" and w.growth == 0 and "A (orbit)" in w.reason
    # The server's own crop about each point of the path (seeded_reach) lies inside, by the slack.
    for p in path:
        reach = rule.seeded_reach(0.5, 0.02, growth=0, unknown_motion_factor=1.0)
        assert w.contains(p + reach) and w.contains(p - reach)
        assert np.all(w.upper - (p + reach) >= 2 * 0.03 - 1e-12)


def test_uncertainty_is_capped_and_an_unknown_one_uses_the_policy_factor():
    r = 0.5
    assert rule.uncertainty_margin(0.1, r, 1.0) == 0.1
    assert rule.uncertainty_margin(10.0, r, 1.0) == rule.UNCERTAINTY_CAP_RADII * r
    assert rule.uncertainty_margin(float("inf"), r, 2.0) == 2.0 * r  # the seeded region: not capped
    one = np.zeros((1, 3))
    unknown = rule.forecast_path_window("A", "A", one, [float("nan")], radius_max=r, growth=0, spacing=0.0,
                                        unknown_motion_factor=5.0)  # the window: capped at 3 r_max
    np.testing.assert_allclose(unknown.upper, [1.6 * r + 3.0 * r] * 3)
    noisy = rule.forecast_path_window("A", "A", one, [40.0], radius_max=r, growth=0, spacing=0.0,
                                      unknown_motion_factor=1.0)
    np.testing.assert_allclose(noisy.upper, [1.6 * r + 3.0 * r] * 3)


def test_each_growth_step_widens_the_region_by_the_growth_factor():
    one = np.zeros((1, 3))
    widths = [rule.forecast_path_window("A", "A", one, [0.0], radius_max=1.0, growth=g, spacing=0.0,
                                        unknown_motion_factor=1.0).upper[0] for g in range(3)]
    np.testing.assert_allclose(widths, [1.6, 1.6 * 1.5, 1.6 * 1.5 ** 2])
    assert rule.growth_factor(rule.MAX_GROWTH) == pytest.approx(1.5 ** 4)
    assert rule.seeded_reach(1.0, 0.0, growth=2, unknown_motion_factor=1.0) == pytest.approx(1.6 * 2.25)


def test_scan_and_search_windows():
    scan = rule.scan_window("A", (1.0, 2.0, 3.0), 2.0, reason="wide scan")
    np.testing.assert_allclose(scan.upper - scan.lower, [2 * 1.25 * 2.0] * 3)  # SCAN_BOX_FACTOR x outer radius
    np.testing.assert_allclose(scan.centre, (1, 2, 3))
    lost = rule.scan_window("A", (0, 0, 0), 2.0, reason="lost", spacing=0.1, growth=1)
    np.testing.assert_allclose(lost.upper, [1.25 * 2.0 + 2 * 0.1] * 3)
    assert lost.growth == 1
    search = rule.search_window("common", (0, 0, 0), 1.0, growth=1, spacing=0.05)
    np.testing.assert_allclose(search.upper, [1.5 * 1.25 * 1.0 + 2 * 0.05] * 3)
    assert rule.search_reach(1.0, growth=1) == pytest.approx(1.5 * 1.25)
    assert "common-surface search" in search.reason


def test_a_close_pair_and_its_common_search_merge_into_one_window():
    a_path = np.array([[1.2, 0.0, 0.0], [1.2, 0.4, 0.0]])
    b_path = -a_path
    advice = common_horizon_watch(a_path, b_path, radius_a=0.5, radius_b=0.5, masses=(1, 1))
    assert advice.search
    windows = [rule.forecast_path_window(n, n, p, [0.02, 0.02], radius_max=0.5, growth=0, spacing=0.03,
                                         unknown_motion_factor=1.0) for n, p in (("A", a_path), ("B", b_path))]
    windows.append(rule.search_window("common", advice.centre, advice.radius, growth=0, spacing=0.03))
    merged = merge_overlapping_windows(windows)
    assert len(merged) == 1 and set(merged[0].name.split("+")) == {"A", "B", "common"}
    for p in np.concatenate([a_path, b_path]):
        assert merged[0].contains(p)
    far = [rule.forecast_path_window(n, n, p, [0.0], radius_max=0.5, growth=0, spacing=0.03,
                                     unknown_motion_factor=1.0) for n, p in (("A", [[6, 0, 0]]), ("B", [[-6, 0, 0]]))]
    assert [w.name for w in merge_overlapping_windows(far)] == ["A", "B"]


def test_window_coverage_measures_what_the_patches_hold():
    window = DataWindow(name="A", lower=[0, 0, 0], upper=[1, 1, 1], reason="test")
    full = dict(origin=[-0.5, -0.5, -0.5], spacing=[0.1] * 3, shape=(21, 21, 21))
    half = dict(origin=[-0.5, -0.5, -0.5], spacing=[0.1] * 3, shape=(11, 21, 21))  # x up to 0.5
    assert window_coverage(window, [full]) == 1.0
    assert window_coverage(window, [half], samples_per_axis=11) == pytest.approx(6 / 11)
    assert window_coverage(window, []) == 0.0


def test_bad_input_names_the_field():
    with pytest.raises(WindowError, match="lower < upper"):
        DataWindow(name="x", lower=[0, 0, 0], upper=[0, 1, 1], reason="")
    with pytest.raises(WindowError, match="samples_per_axis"):
        window_coverage(DataWindow(name="x", lower=[0, 0, 0], upper=[1, 1, 1], reason=""), [], samples_per_axis=1)
