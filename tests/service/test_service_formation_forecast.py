"""The formation forecast through the service: an equal-mass Brill-Lindquist pair whose separation
shrinks (faster and faster) through the critical value, sent through a real loopback server.

The slices are time-symmetric Brill-Lindquist data at decreasing separations: stand-ins for an
approach (real evolved slices are not time-symmetric; the constant-expansion search and the
forecast do not assume they are). Each slice is sent after the previous one's formation
forecast (or its slice_processed, when the search skipped it) arrived, so which slices are
searched does not depend on how fast the machine is.

Critical separation: 0.766 M for two bare masses 0.5 (1.53 m, Cadez, Ann. Phys. 83, 449
(1974); Bishop, GRG 14, 717 (1982); from memory; 1.5324 m from the project's independent
axisymmetric calculation, tests/numerics/axisymmetric_mots.py).
"""

from __future__ import annotations

import time

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.archive import open_archive
from penumbra_server.archive._layout import archive_path
from penumbra_server.cli.report import write_report
from penumbra_server.cli.watch import RunProgress, formation_line
from penumbra_server.server.formation import FormationWatch
from penumbra_shim._wire import horizons_pb2 as pb

from tracking_support import bl_patches, cube

MASS = 0.5
SPACING = 0.05
# M; slice 0 finds the bodies, the watch then searches after every slice from t = 1 M (the
# steering interval below is 2 M); the common horizon exists from t = 10 M on
TIMES = np.array([0.0, 1.0, 3.0, 5.0, 7.0, 9.0, 10.0, 11.0])
CRITICAL_SEPARATION = 0.766            # M (module docstring)


def separation(t):
    """An accelerating approach: crosses the critical separation near t = 9.7 M."""
    return 1.1 - 0.02 * t - 0.0015 * t * t


def _positions(d: float) -> np.ndarray:
    return np.array([[0.5 * d, 0.0, 0.0], [-0.5 * d, 0.0, 0.0]])


def _wait_for(events_iter, deadline_s: float, predicate):
    """Next event satisfying ``predicate``; fails loudly at the deadline."""
    end = time.monotonic() + deadline_s
    for event in events_iter:
        if predicate(event):
            return event
        assert time.monotonic() < end, "deadline passed waiting for an event"
    raise AssertionError("event stream ended before the awaited event")


@pytest.mark.slow
def test_forecasts_made_slices_ahead_bracket_the_formation(client, archive_root, tmp_path):
    spec = ps.RunSpec(variable_set="conformal_w", name="formation forecast",
                      bodies=(ps.Body("A", (0.55, 0.0, 0.0), MASS), ps.Body("B", (-0.55, 0.0, 0.0), MASS)),
                      # the common horizon keeps the server's default l_max (16): just below the critical
                      # separation it is a peanut that l_max 10 does not resolve
                      finder=ps.FinderOptions(lmax=8, tolerance=1e-8),
                      backlog=ps.BacklogOptions(queue_depth=4),
                      # at most one search per 2 M: after each slice from t = 1 M on
                      refinement=ps.RefinementOptions(steering_interval=2.0))
    run = client.open_run(spec, cache_results=False)
    box = cube((0.0, 0.0, 0.0), 1.3, SPACING)
    stream = iter(client.watch(run.run_id, timeout_s=600, idle_timeout_s=None))
    seen = []
    common_first = None
    for index, t in enumerate(TIMES):
        iteration = int(t)
        run.submit(ps.build_slice(time=float(t), iteration=iteration, variable_set="conformal_w",
                                  patches=bl_patches([box], (MASS, MASS), _positions(separation(t)))))
        assert run.flush(120)
        processed = _wait_for(stream, 300, lambda e: (seen.append(e) or True) and e.kind == "slice_processed"
                              and e.iteration == iteration)
        assert processed.error == ""
        if any(e.kind == "surface_found" and e.surface.label == "common" for e in seen):
            common_first = common_first if common_first is not None else index
            break
        # A search started after this slice announces itself before the next slice goes out.
        if index >= 1:
            _wait_for(stream, 300, lambda e: (seen.append(e) or True) and e.kind == "formation_forecast"
                      and e.iteration == iteration)
    run.close()
    assert common_first is not None, "the common horizon was never found"
    t_first, t_before = TIMES[common_first], TIMES[common_first - 1]
    assert separation(t_first) <= CRITICAL_SEPARATION < separation(t_before)

    forecasts = [e for e in seen if e.kind == "formation_forecast"]
    for f in forecasts:
        print(f"t = {f.time:4.1f} M: c_min = {f.c_min:.5f} +- {f.c_min_error:.1e} / M; "
              f"forecast {f.formation_time:.3f} +- {f.formation_time_uncertainty:.3f} M ({f.based_on} slices); "
              f"search {f.wall_time_s:.1f} s")
    print(f"common horizon first found at t = {t_first} M (none at t = {t_before} M)")
    assert [f.iteration for f in forecasts] == [1, 3, 5, 7, 9]
    assert all(f.c_min_found for f in forecasts), [f.message for f in forecasts]
    c = [f.c_min for f in forecasts]
    assert all(a > b > 0 for a, b in zip(c, c[1:])), "c_min falls towards zero before formation"
    # Forecasts made several slices ahead (from t = 5 M on, 3 or more c_min values) bracket the
    # formation: it happened between the last slice without the common horizon and the first with it.
    ahead = [f for f in forecasts if f.based_on >= 3]
    assert len(ahead) >= 2 and ahead[0].time <= t_first - 4
    for f in ahead:
        lo, hi = f.formation_time - f.formation_time_uncertainty, f.formation_time + f.formation_time_uncertainty
        assert lo <= t_first and hi >= t_before, (f.time, f.formation_time, f.formation_time_uncertainty)
        assert f.formation_time_uncertainty < t_first - f.time, "a forecast narrower than its lead time"

    # Archived: one row per search, the same numbers as the events.
    view = open_archive(archive_root, run.run_id)
    rows = view.formation()
    assert rows["iteration"].tolist() == [1, 3, 5, 7, 9]
    assert np.allclose(rows["c_min"], c)
    assert np.allclose(rows["formation_time"][2:], [f.formation_time for f in forecasts][2:])
    assert "formation_forecast" in set(view.tracking_events()["kind"].tolist())

    # `penumbra watch` shows the newest forecast; the report plots c_min and the forecasts.
    progress = RunProgress()
    for event in seen:
        progress.absorb(event)
    line = formation_line(progress)
    assert line.startswith("formation forecast (from t = 9.000 M): c_min = ") and "common horizon expected at t = " in line
    report = write_report(archive_path(archive_root, run.run_id), tmp_path / "report")
    c_axes, forecast_axes = report.figures["formation.png"].axes[:2]
    plotted = c_axes.lines[0].get_ydata()
    assert np.allclose(plotted, c)
    assert np.allclose(forecast_axes.lines[0].get_ydata(), [f.formation_time for f in forecasts if f.forecast_available])
    summary = report.summary_path.read_text()
    assert "formation forecast: 5 constant-expansion searches" in summary and "last forecast (made at t = 9.000 M)" in summary


def test_formation_forecast_can_be_turned_off(client, archive_root):
    spec = ps.RunSpec(variable_set="conformal_w", name="no formation forecast",
                      bodies=(ps.Body("A", (0.4, 0.0, 0.0), MASS), ps.Body("B", (-0.4, 0.0, 0.0), MASS)),
                      finder=ps.FinderOptions(lmax=6, tolerance=1e-8), formation_forecast=False)
    assert spec.to_wire().formation_forecast_off
    run = client.open_run(spec, cache_results=False)
    box = cube((0.0, 0.0, 0.0), 1.3, 0.1)
    for index, t in enumerate((0.0, 4.0, 8.0)):
        run.submit(ps.build_slice(time=t, iteration=index, variable_set="conformal_w",
                                  patches=bl_patches([box], (MASS, MASS), _positions(0.9))))
    assert run.flush(120)
    run.close()
    events = list(client.watch(run.run_id, timeout_s=120))
    assert sum(e.kind == "slice_processed" for e in events) == 3
    assert not [e for e in events if e.kind == "formation_forecast"]
    assert open_archive(archive_root, run.run_id).run_spec["formation_forecast"] is False


def test_a_restarted_watch_takes_back_its_archived_history():
    # The server's formation watch rebuilds its c_min history from archived events (restore.py).
    watch = FormationWatch()
    for t, c, found in ((1.0, 0.15, True), (3.0, float("nan"), False), (5.0, 0.10, True), (5.0, 0.10, True)):
        event = pb.RunEvent(seq=1, time_m=t, iteration=int(t))
        event.formation_forecast.CopyFrom(pb.FormationForecast(label="common", c_min_found=found, c_min_per_m=c,
                                                               c_min_error_per_m=1e-4))
        watch.restore_event(event)
    assert watch.history == [(1.0, 0.15, 1e-4), (5.0, 0.10, 1e-4)]
    assert watch._last_search_time == 5.0 and watch.searches == 4
