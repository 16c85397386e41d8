"""`penumbra report` on a small real archive (zarr on disk, written by the archive writer) and on
the archive of a real demo run (tracks, puncture tracks, forecasts, guidance, merger)."""

import math
import re

import numpy as np
import pytest

from penumbra_server.archive import open_archive
from penumbra_server.cli.main import main
from penumbra_server.cli.report import (chosen_forecasts, cone_path, default_guidance_choice, forecast_check,
                                        guidance_updates, load_run, plot_cross_sections, summarise, summary_text,
                                        write_report)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _png_size(path):
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE, f"{path} is not a PNG"
    width = int.from_bytes(data[16:20], "big")
    height = int.from_bytes(data[20:24], "big")
    return width, height


def test_archive_fixture_has_what_the_physics_says(small_archive):
    _, expected = small_archive
    # Both individual horizons exist on every slice of the track.
    assert all(found for _, _, found, _ in expected["heavy"] + expected["light"])
    # A widely separated hole's irreducible mass is close to m_i (1 + m_j / (2 d)) at leading order
    # (docs/references.md item 7); at d = 1.4 M (first slice) within a few per cent.
    t0, _, _, m_heavy = expected["heavy"][0]
    assert m_heavy == pytest.approx(0.6 * (1 + 0.4 / (2 * 1.4)), rel=0.03)
    # No common horizon at d = 1.4 M; one at d = 0.45 M (well below the equal-mass 0.766 M threshold,
    # Brill & Lindquist 1963 / Cadez 1974, from memory), whose mass is close to the total bare mass 1.
    assert expected["common"][0][2] is False
    assert expected["common"][-1][2] is True
    assert expected["common"][-1][3] == pytest.approx(1.0, abs=0.02)


def test_summary_states_the_rows(small_archive):
    path, expected = small_archive
    record = load_run(path)
    assert record.labels == ("heavy", "light", "common")
    assert record.merged_labels == ("common",)
    summary = summarise(record)
    first_common = min((t, it) for t, it, found, _ in expected["common"] if found)
    assert (summary.common_first_time, summary.common_first_iteration) == pytest.approx(first_common)
    assert summary.common_label == "common"
    assert summary.slices_skipped == 1 and summary.slices_processed == len(expected["heavy"])
    assert summary.skipped_iterations == expected["skipped_iterations"]
    for label in ("heavy", "light", "common"):
        last = [row for row in expected[label] if row[2]][-1]
        assert summary.surface(label).final_irreducible_mass == pytest.approx(last[3], rel=1e-12)
        assert summary.surface(label).found == sum(row[2] for row in expected[label])
    text = summary_text(summary)
    assert f"first found at t = {first_common[0]:.4f} M, iteration {first_common[1]}" in text
    assert "1 skipped" in text


@pytest.fixture(scope="module")
def small_report(small_archive, tmp_path_factory):
    """The report of the small archive, written once for the tests that read it."""
    path, _ = small_archive
    return write_report(path, tmp_path_factory.mktemp("small-report"))


def test_report_writes_pngs_and_a_summary(small_archive, small_report):
    path, expected = small_archive
    result = small_report
    names = sorted(p.name for p in result.plots)
    assert names == ["areas_masses.png", "cross_sections.png", "formation.png", "guidance.png", "mots.png",
                     "multipoles.png", "spin.png", "tracks.png"]
    for plot in result.plots:
        width, height = _png_size(plot)
        assert width > 300 and height > 300
    assert result.summary_path.read_text().startswith("run run-0123456789ab")
    # Default cross-section times include the first common horizon.
    assert result.summary.common_first_time in result.section_times
    # An archive without tracking groups: the tracks plot falls back to the found centroids (all
    # inside its ranges), the guidance plot says there is none, the summary has no tracking part.
    (x0, x1, y0, y1), = result.limits["tracks.png"]
    record = load_run(path)
    for label, cols in record.surfaces.items():
        c = np.asarray(cols["centroid"])[np.asarray(cols["found"], bool)]
        assert np.all((x0 <= c[:, 0]) & (c[:, 0] <= x1) & (y0 <= c[:, 1]) & (c[:, 1] <= y1)), label
    assert result.limits["guidance.png"] == ()
    assert result.summary.tracks == () and result.summary.guidance is None
    assert "refinement guidance" not in result.summary_path.read_text()


def test_areas_plot_draws_every_found_area_and_mass_against_time(small_archive, small_report):
    _, expected = small_archive
    figure = small_report.figures["areas_masses.png"]
    area_axes, mass_axes = figure.axes[:2]
    for axes in (area_axes, mass_axes):
        lines = {line.get_label(): line for line in axes.lines if not line.get_label().startswith("_")}
        assert sorted(lines) == ["common", "heavy", "light"]
        for label, line in lines.items():
            rows = sorted((t, m) for t, _, found, m in expected[label] if found)
            assert np.allclose(line.get_xdata(), [t for t, _ in rows], rtol=0, atol=1e-12)
            if axes is mass_axes:
                assert np.allclose(line.get_ydata(), [m for _, m in rows], rtol=1e-12)
            else:  # area = 16 pi M_irr^2 (the archived mass is sqrt(A / 16 pi))
                assert np.allclose(line.get_ydata(), [16 * math.pi * m * m for _, m in rows], rtol=1e-9)
    # The first common horizon is marked by a vertical line at its time on both panels.
    first_common = min(t for t, _, found, _ in expected["common"] if found)
    for axes in (area_axes, mass_axes):
        verticals = [l for l in axes.lines if l.get_label().startswith("_") and np.ptp(l.get_xdata()) == 0]
        assert [float(l.get_xdata()[0]) for l in verticals] == [pytest.approx(first_common)]


def test_summary_file_states_each_surfaces_numbers(small_archive, small_report):
    _, expected = small_archive
    text = small_report.summary_path.read_text()
    for label in ("heavy", "light", "common"):
        found = sorted((t, m) for t, _, f, m in expected[label] if f)
        row = next(line.split() for line in text.splitlines() if re.match(rf"{label} +\d+/\d+ ", line))
        # surface, found/attempts, first t, last t, area, M_irr, centroid (3), |Theta|max, wall s
        assert row[1] == f"{len(found)}/{len(expected[label])}"
        assert float(row[2]) == pytest.approx(found[0][0], abs=5e-4)
        assert float(row[3]) == pytest.approx(found[-1][0], abs=5e-4)
        assert float(row[4]) == pytest.approx(16 * math.pi * found[-1][1] ** 2, abs=5e-6)
        assert float(row[5]) == pytest.approx(found[-1][1], abs=5e-6)


def test_cross_section_plot_draws_one_curve_per_found_surface_at_the_chosen_time(small_archive, tmp_path):
    path, expected = small_archive
    record = load_run(path)
    t_two = expected["common"][0][0]       # no common surface there
    t_three = expected["common"][-1][0]    # common surface found
    for t, labels in ((t_two, ["heavy", "light"]), (t_three, ["heavy", "light", "common"])):
        figure = plot_cross_sections(record, (t,), tmp_path / f"t{t}.png").figure
        (axes,) = [ax for ax in figure.axes if ax.get_visible()]
        curves = [line for line in axes.lines if not line.get_label().startswith("_")]
        assert [line.get_label() for line in curves] == labels
        assert axes.get_title() == f"t = {t:.3f} M"
        for line in curves:
            cols = record.surfaces[line.get_label()]
            row = int(np.flatnonzero(np.isclose(cols["time"], t, rtol=0, atol=1e-9))[0])
            x, y = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
            assert (x[0], y[0]) == (x[-1], y[-1]) and len(x) > 100  # a closed curve
            # Through the archived centre: the distance from the centre stays within the coordinate
            # radius range the measurement archived for that surface (at its nodes; 1 % slack for
            # the curve's points between the nodes).
            r = np.hypot(x - cols["centre"][row][0], y - cols["centre"][row][1])
            least, mean, largest = (float(v) for v in cols["coordinate_radius"][row])
            slack = 0.01 * mean
            assert least - slack <= r.min() and r.max() <= largest + slack


def test_report_command_line(small_archive, tmp_path, capsys):
    path, _ = small_archive
    status = main(["report", str(path), "--output", str(tmp_path / "cli"), "--times", "0,2.8"])
    out = capsys.readouterr()
    assert status == 0
    assert "common horizon (common) first found" in out.out
    assert (tmp_path / "cli" / "tracks.png").exists()
    assert "report: 10/10" in out.err  # progress lines (read, eight plots, summary)
    assert (tmp_path / "cli" / "spin.png").exists()
    assert (tmp_path / "cli" / "mots.png").exists()


def test_report_of_a_missing_archive_fails_with_a_reason(tmp_path, capsys):
    status = main(["report", str(tmp_path / "nope.zarr")])
    assert status == 2
    assert "no such path" in capsys.readouterr().err


# -- pure pieces of the tracking plots and summary ------------------------------------------------


def test_cone_path_shades_the_union_of_the_discs_along_the_path():
    cone = cone_path([[0.0, 0.0], [1.0, 0.0]], [0.1, 0.3])
    assert cone.contains_point((0.0, 0.09)) and cone.contains_point((1.0, 0.29))
    assert cone.contains_point((0.5, 0.19))        # the joining quadrilateral: half-way the radius is 0.2
    assert not cone.contains_point((0.5, 0.25))
    assert not cone.contains_point((1.31, 0.0)) and not cone.contains_point((-0.11, 0.0))
    # Unknown (infinite) uncertainties are not drawn.
    assert cone_path([[0.0, 0.0], [1.0, 0.0]], [math.inf, math.inf]) is None


def test_forecast_check_measures_the_error_against_the_later_track():
    # A forecast made at t = 1 along +x at speed 1 (leads 1 .. 2), a track that moves at speed 1.5.
    leads = np.linspace(1.0, 2.0, 9)
    forecasts = {"time": np.array([1.0]), "lead_time": leads[None, :], "model": np.array([3]),
                 "position": np.stack([leads - 1.0, 0 * leads, 0 * leads], axis=1)[None],
                 "uncertainty": (0.3 * (leads - 1.0))[None, :]}
    times = np.array([0.5, 1.0, 1.5, 2.0, 2.5])
    track = {"time": times, "source": np.array([1, 1, 1, 1, 1]),
             "position": np.stack([1.5 * (times - 1.0), 0 * times, 0 * times], axis=1)}
    check = forecast_check(forecasts, track)
    # Compared at t = 1.5 and 2 (inside the leads, after the forecast): errors 0.25 and 0.5, stated 0.15 and 0.3.
    assert check.comparisons == 2 and check.max_error == pytest.approx(0.5)
    assert check.median_error == pytest.approx(0.375) and check.with_uncertainty == 2 and check.covered == 0
    assert check.by_model == (("orbit", 2, pytest.approx(0.375)),)
    loose = dict(forecasts, uncertainty=(0.6 * (leads - 1.0))[None, :])
    assert forecast_check(loose, track).covered == 2
    assert forecast_check(forecasts, {"time": times[:2], "source": np.array([1, 1]),
                                      "position": track["position"][:2]}) is None


# -- the report of a real demo run ----------------------------------------------------------------


@pytest.fixture(scope="module")
def demo_report(demo_run, tmp_path_factory):
    workdir, done = demo_run
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    archive = re.search(r"^archive: (\S+)", done.stdout, flags=re.MULTILINE).group(1)
    result = write_report(archive, tmp_path_factory.mktemp("demo-report"))
    return archive, result, open_archive(archive), load_run(archive)


def _inside(points, limits):
    x0, x1, y0, y1 = limits
    p = np.asarray(points, float).reshape(-1, 2)
    return bool(np.all((x0 <= p[:, 0]) & (p[:, 0] <= x1) & (y0 <= p[:, 1]) & (p[:, 1] <= y1)))


@pytest.mark.slow
def test_tracks_plot_holds_every_track_and_forecast_path(demo_report):
    archive, result, view, record = demo_report
    width, height = _png_size(result.output_dir / "tracks.png")
    assert width > 600 and height > 600
    (limits,) = result.limits["tracks.png"]
    assert set(view.track_labels) >= {"heavy", "light", "common"}
    for label in view.track_labels:
        assert _inside(view.track(label)["position"][:, :2], limits), label
    # Every horizon track is drawn point by point from the archive (x, y in the xy plane).
    (axes,) = result.figures["tracks.png"].axes
    lines = {line.get_label(): line for line in axes.lines}
    for label in view.track_labels:
        horizon = view.track(label, source="horizon")["position"]
        line = lines[f"{label} horizon"]
        assert np.array_equal(line.get_xdata(), horizon[:, 0]) and np.array_equal(line.get_ydata(), horizon[:, 1])
    # The demo sends a shift: both bodies have puncture tracks, drawn too (inside the ranges above).
    for label in ("heavy", "light"):
        puncture = view.track(label, source="puncture")["position"]
        assert len(puncture) >= 10
        line = lines[f"{label} puncture (shift)"]
        assert np.array_equal(line.get_xdata(), puncture[:, 0]) and np.array_equal(line.get_ydata(), puncture[:, 1])
    chosen = chosen_forecasts(record)
    assert {label for label, _ in chosen} >= {"heavy", "light"}
    for label, row in chosen:
        assert _inside(view.forecasts(label)["position"][row][:, :2], limits)
    # The ranges are those of what is drawn, the tracks and the chosen forecast paths (plus a margin of
    # at most 0.3 of their span), not the whole grid. Forecast paths count: on a loaded machine the
    # demo skips slices, and a polynomial fit to sparse points may run well beyond the tracks.
    every = np.concatenate([view.track(l)["position"][:, :2] for l in view.track_labels]
                           + [view.forecasts(l)["position"][row][:, :2] for l, row in chosen])
    assert (limits[1] - limits[0]) < 2.0 * float(np.max(np.ptp(every, axis=0)))


@pytest.mark.slow
def test_guidance_plot_draws_the_regions_of_the_chosen_updates(demo_report):
    archive, result, view, record = demo_report
    width, height = _png_size(result.output_dir / "guidance.png")
    assert width > 1000 and height > 300
    updates = guidance_updates(record)
    assert len(updates) == len(view.guidance()["updates"]["time"])
    picks = default_guidance_choice(updates)
    post = [i for i, u in enumerate(updates) if u.post_merger]
    assert picks[0] == 0 and picks[-1] == len(updates) - 1 and post and post[0] in picks and post[0] - 1 in picks
    panels = result.limits["guidance.png"]
    assert len(panels) == len(picks)
    for limits, index in zip(panels, picks):
        for body in updates[index].bodies:
            # The sphere form's circle and the box form fit in the panel, and so do the tracks.
            c, r = body.centre[:2], body.radius
            assert _inside([c - r, c + r, body.lower[:2], body.upper[:2]], limits)
        for label in view.track_labels:
            assert _inside(view.track(label)["position"][:, :2], limits)
    # Each panel draws, for every body of its update, a circle with the archived finest sphere: a
    # merged region row of that update covering the body on its finest level, or the body's own.
    guidance = view.guidance()
    bodies, regions = guidance["bodies"], guidance["regions"]
    axes = result.figures["guidance.png"].axes
    from matplotlib.patches import Circle

    for k, index in enumerate(picks):
        seq = updates[index].event_seq
        circles = [p for p in axes[k].patches if isinstance(p, Circle)]
        assert circles
        for b in np.flatnonzero(bodies["event_seq"] == seq):
            label, level = str(bodies["label"][b]), int(bodies["finest_level"][b])
            covering = [r for r in np.flatnonzero((regions["event_seq"] == seq) & (regions["level"] == level))
                        if label in str(regions["bodies"][r]).split("+")]
            if covering:
                centre, radius = regions["centre"][covering[0]], regions["radius"][covering[0]]
            else:
                centre, radius = bodies["centre"][b], bodies["finest_radius"][b]
            assert any(label in c.get_label().split(":")[0].split("+") and c.radius == pytest.approx(radius)
                       and np.allclose(c.center, centre[:2]) for c in circles), (k, label)


@pytest.mark.slow
def test_summary_states_the_merger_and_the_guidance(demo_report):
    archive, result, view, record = demo_report
    text = result.summary_path.read_text()
    events = view.tracking_events()
    formed = [i for i, k in enumerate(events["kind"]) if k == "common_horizon_formed"]
    assert len(formed) == 1
    i = formed[0]
    assert (f"common horizon formed (server event) at t = {events['time'][i]:.4f} M, iteration "
            f"{events['iteration'][i]}: {events['message'][i]}") in text
    updates = view.guidance()["updates"]
    assert f"refinement guidance (advisory: the evolution decides): {len(updates['time'])} updates" in text
    # Merger: the first update with a single remnant region, from the archive's own columns.
    order = np.argsort(updates["time"])
    first_post = next(j for j in order if updates["post_merger"][j])
    assert (f"after merger: a single region around the remnant from t = {updates['time'][first_post]:.3f} M "
            f"(iteration {updates['iteration'][first_post]})") in text
    # The bodies' finest regions merged before that: an update whose finest-level region covered two bodies.
    regions, bodies = view.guidance()["regions"], view.guidance()["bodies"]
    merged_iterations = []
    for j in order:
        seq = updates["event_seq"][j]
        for b in np.flatnonzero(bodies["event_seq"] == seq):
            level = bodies["finest_level"][b]
            rows = np.flatnonzero((regions["event_seq"] == seq) & (regions["level"] == level))
            if not updates["post_merger"][j] and any("+" in str(regions["bodies"][r]) and
                                                     str(bodies["label"][b]) in str(regions["bodies"][r]).split("+")
                                                     for r in rows):
                merged_iterations.append(int(updates["iteration"][j]))
    assert merged_iterations, "the demo's bodies come close enough for their finest regions to merge"
    assert f"(first at iteration {min(merged_iterations)})" in text
    # The final remnant region, as archived.
    last = order[-1]
    rows = np.flatnonzero(bodies["event_seq"] == updates["event_seq"][last])
    assert [str(bodies["label"][r]) for r in rows] == ["common"]
    level = int(bodies["finest_level"][rows[0]])
    region = [r for r in np.flatnonzero((regions["event_seq"] == updates["event_seq"][last]) & (regions["level"] == level))]
    assert len(region) == 1
    assert (f"    common: finest level {level} (remnant), centre ({regions['centre'][region[0]][0]:+.3f}, "
            f"{regions['centre'][region[0]][1]:+.3f}, {regions['centre'][region[0]][2]:+.3f}), "
            f"radius {regions['radius'][region[0]]:.4f}") in text
    # Tracks: puncture points from the shift for both bodies; forecasts checked against the later track.
    for label in ("heavy", "light"):
        n = len(view.track(label, source="puncture")["time"])
        assert re.search(rf"  {label}: \d+ horizon-centroid points .*; {n} puncture points integrated from the shift", text)
        summary = next(t for t in result.summary.tracks if t.label == label)
        # One comparison per (forecast, later horizon-track point inside its finite lead range),
        # counted from the archive's columns (how many depends on how many slices the demo's
        # server processed, hence on the machine's load: count, do not assume).
        forecasts, track = view.forecasts(label), view.track(label, source="horizon")
        expected = 0
        for row in range(len(forecasts["time"])):
            ok = np.isfinite(forecasts["lead_time"][row]) & np.all(np.isfinite(forecasts["position"][row]), axis=1)
            if np.count_nonzero(ok) >= 2:
                end = float(forecasts["lead_time"][row][ok][-1])
                eps = 1e-9 * max(1.0, abs(end))
                expected += int(np.sum((track["time"] > forecasts["time"][row] + eps) & (track["time"] <= end + eps)))
        assert expected >= 1, "the demo's forecasts have later track points to be checked against"
        assert summary.check is not None and summary.check.comparisons == expected
        assert f"over {summary.check.comparisons} comparisons" in text
    # The warnings the server archived, counted (a loaded machine makes the demo skip slices, and
    # a slice that lacks data a surface needs is a warning).
    warnings = int(np.sum(np.asarray(events["kind"]).astype(str) == "warning"))
    assert re.search(rf"^warnings: {warnings}\b", text, flags=re.MULTILINE)


def test_compare_surfaces_finds_any_difference(small_archive):
    import dataclasses

    from penumbra_server.cli.report import compare_surfaces

    path, expected = small_archive
    record = load_run(path)
    same = compare_surfaces(record, record)
    attempts = sum(len(rows) for label, rows in expected.items() if label != "skipped_iterations")
    found = sum(row[2] for label, rows in expected.items() if label != "skipped_iterations" for row in rows)
    assert (same.compared, same.same_outcome, same.found_in_both, same.only_in_one) == (attempts, attempts, found, 0)
    assert same.identical_outcomes and same.max_relative_area_difference == 0.0
    # One area off by 1e-9 relative, one attempt missing, one outcome flipped: each is seen.
    heavy = {k: np.array(v, copy=True) for k, v in record.surfaces["heavy"].items()}
    heavy["area"][1] *= 1 + 1e-9
    light = {k: np.asarray(v)[1:] for k, v in record.surfaces["light"].items()}
    common = {k: np.array(v, copy=True) for k, v in record.surfaces["common"].items()}
    common["found"][-1] = False
    other = dataclasses.replace(record, surfaces={"heavy": heavy, "light": light, "common": common})
    diff = compare_surfaces(record, other)
    assert diff.only_in_one == 1 and diff.compared == attempts - 1 and diff.same_outcome == attempts - 2
    assert diff.max_relative_area_difference == pytest.approx(1e-9, rel=1e-3)
    assert not diff.identical_outcomes
