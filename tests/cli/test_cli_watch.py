"""`penumbra watch` and `penumbra runs` against a real server on 127.0.0.1 (real workers, real zarr)."""

import io
import math

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.cli.demo_evolution import run_spec_for, slice_arrays
from penumbra_server.cli.demo_scenario import DemoScenario, GridLayout
from penumbra_server.cli.main import format_runs, main
from penumbra_server.cli.watch import RunProgress, render_frame, watch_run
from penumbra_server.server import BackgroundServer

# A coarser copy of the demo grid keeps the finds quick; both holes are still resolved.
SCENARIO = DemoScenario(layout=GridLayout(coarse_nodes=32, coarse_half_width=1.5, fine_nodes=24))


@pytest.fixture(scope="module")
def served_run(tmp_path_factory):
    """A server with one run that has processed two slices of the demo scenario."""
    root = tmp_path_factory.mktemp("watch-archive")
    with BackgroundServer("127.0.0.1:0", archive_root=root, workers=2) as bg:
        client = ps.connect(bg.address)
        run = client.open_run(run_spec_for(SCENARIO, lmax=6, name="watch-test"))
        for index in (0, 1):
            run.submit(ps.build_slice(**slice_arrays(SCENARIO, index)))
        assert run.flush(timeout_s=60)
        run_id = run.run_id
        # Wait until the server has dealt with both slices.
        for event in client.watch(run_id, from_seq=1, timeout_s=120):
            if event.kind == "slice_processed" and event.iteration == SCENARIO.iteration_of(1):
                break
        yield bg.address, client, run_id
        run.close()
        client.close()


def test_watch_once_renders_the_servers_latest_state(served_run):
    address, client, run_id = served_run
    out = io.StringIO()
    assert watch_run(client, run_id, once=True, stream=out, server=address) == 0
    frame = out.getvalue()
    assert "\x1b[" not in frame  # no escape codes without a terminal
    assert run_id in frame and "'watch-test'" in frame
    assert "received 2, processed 2, skipped 0, queued 0" in frame
    newest = f"t = {SCENARIO.time_of(1):.3f} M, iteration {SCENARIO.iteration_of(1)}"
    assert f"newest slice received: {newest};  newest processed: {newest}" in frame
    states = client.latest_surfaces(run_id)
    lines = frame.splitlines()
    assert states["heavy"].latest_attempt_found  # the large hole is found in both slices
    for label in ("heavy", "light"):
        state = states[label]
        row = next(line for line in lines if line.startswith(label + " "))
        if state.latest_attempt_found:
            assert f"found (it {state.latest_attempt_iteration})" in row
        else:
            assert f"NOT FOUND (it {state.latest_attempt_iteration}, {state.consecutive_misses} miss" in row
        found = state.latest_found
        assert found is not None and found.found
        assert f"{found.area:.5f}" in row and f"{found.irreducible_mass:.5f}" in row
        assert f"({found.centroid[0]:+.3f}, {found.centroid[1]:+.3f}, {found.centroid[2]:+.3f})" in row
        # Lag behind the evolution: newest slice received minus the time last found.
        assert f"{SCENARIO.time_of(1) - found.time:.3f} / " in row
    # The latest guidance is shown: every body of the server's latest guidance with its finest region.
    guidance = client.latest_guidance(run_id)
    assert guidance is not None and guidance.iteration == SCENARIO.iteration_of(1)
    assert f"refinement guidance (advisory: the evolution decides) from t = {guidance.time:.3f} M" in frame
    for body in guidance.bodies:
        row = next(l for l in lines if l.strip().startswith(body.label + " ") and " of " in l)
        assert f"{body.finest_radius:.4f}" in row and f"({body.centre[0]:+.3f}, {body.centre[1]:+.3f}" in row
    assert "common horizon: not formed yet" in frame  # two slices at 1.4 M separation
    # The heavy hole sits where the track puts it (centroid within a fine cell of the puncture).
    heavy = states["heavy"].latest_found
    np.testing.assert_allclose(heavy.centroid, SCENARIO.track.positions(SCENARIO.time_of(1))[0],
                               atol=SCENARIO.layout.fine_spacing)


def test_watch_command_line_once(served_run, capsys):
    address, _, run_id = served_run
    assert main(["watch", run_id, "--server", address, "--once"]) == 0
    out = capsys.readouterr().out
    assert out.count("penumbra watch") == 1 and "heavy" in out and "light" in out


def test_watch_unknown_run_says_so(served_run, capsys):
    address, _, _ = served_run
    assert main(["watch", "run-000000000000", "--server", address, "--once"]) == 1
    assert "not found" in capsys.readouterr().err


def test_runs_lists_the_run(served_run, capsys):
    address, client, run_id = served_run
    assert main(["runs", "--server", address]) == 0
    out = capsys.readouterr().out
    line = next(l for l in out.splitlines() if l.startswith(run_id))
    assert "watch-test" in line and "open" in line
    assert format_runs([]) == "no runs"


def test_frame_marks_misses_and_lag():
    spec = ps.RunSpec(variable_set="conformal_w", bodies=(ps.Body("A", (1, 0, 0), 0.5), ps.Body("B", (-1, 0, 0), 0.5)),
                      name="synthetic")
    info = ps.RunInfo(run_id="run-aaaaaaaaaaaa", name="synthetic", state="open", spec=spec, created_unix_s=0.0,
                      closed_unix_s=math.nan, slices_received=7, slices_processed=4, slices_skipped=1,
                      slices_duplicate=0, last_seq=20, archive_path="", last_received_iteration=50,
                      last_received_time=5.0)
    report = ps.SurfaceReport(label="A", time=2.0, iteration=20, found=True, status=0, area=12.566,
                              irreducible_mass=0.5, centroid=np.array([1.0, 0.0, 0.0]), residual_max=1e-9,
                              latency_s=0.25)
    states = {
        "A": ps.SurfaceState("A", report, False, 30, "not converged", 1),
        "B": ps.SurfaceState("B", None, False, -1, "", 0),
        "common": ps.SurfaceState("common", None, False, 30, "no candidate", 3),
    }
    progress = RunProgress(newest_time=3.0, newest_iteration=30, last_latency_s=0.5, last_seq=20,
                           skips=["skipped iteration 25 (superseded by 30)"])
    frame = render_frame(info, states, progress, now_unix_s=0.0)
    lines = frame.splitlines()
    assert "queued 2" in frame  # 7 received - 4 processed - 1 skipped
    row_a = next(l for l in lines if l.startswith("A "))
    # Lag behind the evolution: newest received t = 5 minus found at t = 2.
    assert "NOT FOUND (it 30, 1 miss)" in row_a and "2.000 (it 20)" in row_a and "3.000 / 0.25" in row_a
    assert "newest slice received: t = 5.000 M, iteration 50;  newest processed: t = 3.000 M, iteration 30" in frame
    assert next(l for l in lines if l.startswith("B ")).split()[1] == "waiting"
    assert "NOT FOUND (it 30, 3 misses)" in next(l for l in lines if l.startswith("common "))
    # bodies first, in spec order, then the rest (the surface table ends at the first blank line)
    table = lines[lines.index("") + 1:]
    table = table[:table.index("")]
    order = [l.split()[0] for l in table if l.split() and l.split()[0] in ("A", "B", "common")]
    assert order == ["A", "B", "common"]
    assert "skipped iteration 25 (superseded by 30)" in frame
    assert "common horizon: not formed yet" in frame and "refinement guidance: none yet" in frame


def _region(level, bodies, centre, radius):
    c = np.asarray(centre, float)
    return ps.RefinedRegion(level=level, spacing=0.1 / 2 ** (level - 1), bodies=tuple(bodies), centre=c, radius=radius,
                            lower=c - radius, upper=c + radius, reason="test")


def _body(label, centre, radius, level=2):
    c = np.asarray(centre, float)
    return ps.BodyRefinement(label=label, centre=c, finest_level=level, radii=np.array([2 * radius, radius]),
                             spacings=np.array([0.1, 0.05]), lower=np.array([c - 2 * radius, c - radius]),
                             upper=np.array([c + 2 * radius, c + radius]), required_spacing=0.05, finest_spacing=0.05,
                             margins={}, reasons={}, horizon_max_radius=0.3, horizon_min_diameter=0.6)


def test_frame_shows_the_common_horizon_and_the_latest_guidance():
    spec = ps.RunSpec(variable_set="conformal_w", bodies=(ps.Body("A", (1, 0, 0), 0.5), ps.Body("B", (-1, 0, 0), 0.5)))
    info = ps.RunInfo(run_id="run-bbbbbbbbbbbb", name="synthetic", state="open", spec=spec, created_unix_s=0.0,
                      closed_unix_s=math.nan, slices_received=9, slices_processed=9, slices_skipped=0,
                      slices_duplicate=0, last_seq=90, archive_path="", last_received_iteration=80,
                      last_received_time=8.0)
    # Before merger: A's finest region is merged with B's on level 2.
    guidance = ps.Guidance(time=7.5, iteration=75, valid_from=7.5, valid_until=9.5, post_merger=False,
                           policy=ps.RefinementOptions(nesting_depth=2), reasons={},
                           bodies=(_body("A", (0.5, 0, 0), 0.7), _body("B", (-0.5, 0, 0), 0.6)),
                           levels=((_region(1, ("A", "B"), (0, 0, 0), 2.0),),
                                   (_region(2, ("A", "B"), (0, 0, 0), 1.2),)))
    progress = RunProgress(last_seq=90)
    frame = render_frame(info, {}, progress, guidance=guidance, now_unix_s=0.0)
    assert "refinement guidance (advisory: the evolution decides) from t = 7.500 M (iteration 75), valid 7.500 .. 9.500 M:" in frame
    row_a = next(l for l in frame.splitlines() if l.strip().startswith("A ") and "merged" in l)
    assert "2 of 2" in row_a and "(+0.500, +0.000, +0.000)" in row_a and "0.7000" in row_a and "merged A+B" in row_a
    # After merger: one remnant region, and the formation event.
    remnant = ps.Guidance(time=8.0, iteration=80, valid_from=8.0, valid_until=10.0, post_merger=True,
                          policy=ps.RefinementOptions(nesting_depth=2), reasons={},
                          bodies=(_body("common", (0.01, 0, 0), 1.1),),
                          levels=((_region(1, ("common",), (0.01, 0, 0), 2.2),), (_region(2, ("common",), (0.01, 0, 0), 1.1),)))
    progress.absorb(ps.CommonHorizonFormedEvent(seq=91, run_id=info.run_id, kind="common_horizon_formed", time=7.75, iteration=77,
                                                emitted_unix_s=0.0, label="common",
                                                common=ps.CommonHorizon(label="common", time=7.75, iteration=77,
                                                                        body_labels=("A", "B"), separation=0.74,
                                                                        irreducible_mass=0.99, area=49.3)))
    frame = render_frame(info, {}, progress, guidance=remnant, now_unix_s=0.0)
    assert ("common horizon: formed at t = 7.750 M (iteration 77), surface 'common', bodies 0.740 M apart, "
            "M_irr 0.9900 M") in frame
    assert ", after merger:" in frame
    row = next(l for l in frame.splitlines() if l.strip().startswith("common ") and "remnant" in l)
    assert "1.1000" in row and "(+0.010, +0.000, +0.000)" in row


def test_live_watch_redraws_until_the_run_closes(served_run):
    import threading

    address, client, _ = served_run
    run = client.open_run(run_spec_for(SCENARIO, lmax=6, name="live-watch"))
    out = io.StringIO()
    result = {}
    watcher = threading.Thread(target=lambda: result.setdefault(
        "status", watch_run(client, run.run_id, interval_s=0.2, stream=out, server=address)))
    watcher.start()
    run.submit(ps.build_slice(**slice_arrays(SCENARIO, 0)))
    run.close()  # flushes, lets the server drain, closes the run
    watcher.join(timeout=60)
    assert not watcher.is_alive() and result["status"] == 0
    frames = [f for f in out.getvalue().split("penumbra watch  ") if f]
    assert len(frames) >= 2
    assert "state closed" in frames[-1] and "received 1, processed 1" in frames[-1]
    assert "state open" in frames[0]


@pytest.mark.slow
def test_watch_once_on_a_finished_demo_run_shows_the_merger_and_the_remnant_guidance(demo_run, tmp_path):
    """A server started on (a copy of) the demo's archive serves the closed run from the archive:
    the frame states when the common horizon formed and the latest, post-merger guidance."""
    import re
    import shutil

    from penumbra_server.archive import open_archive
    from penumbra_server.cli.watch import find_common_formed

    workdir, done = demo_run
    assert done.returncode == 0, done.stdout[-3000:]
    archive = re.search(r"^archive: (\S+)", done.stdout, flags=re.MULTILINE).group(1)
    root = tmp_path / "archive"
    shutil.copytree(workdir / "archive", root)
    view = open_archive(archive)
    events = view.tracking_events()
    formed = [i for i, k in enumerate(events["kind"]) if k == "common_horizon_formed"][0]
    with BackgroundServer("127.0.0.1:0", archive_root=root, workers=1) as bg:
        client = ps.connect(bg.address)
        try:
            info = client.get_run(view.run_id)
            assert info.state == "closed"
            common = find_common_formed(client, view.run_id, int(info.last_seq))
            assert (common.time, common.iteration) == (events["time"][formed], events["iteration"][formed])
            out = io.StringIO()
            assert watch_run(client, view.run_id, once=True, stream=out, server=bg.address) == 0
            guidance = client.latest_guidance(view.run_id)
        finally:
            client.close()
    frame = out.getvalue()
    assert f"common horizon: formed at t = {common.time:.3f} M (iteration {common.iteration}), surface 'common'" in frame
    updates = view.guidance()["updates"]
    last = int(np.argmax(updates["time"]))
    assert guidance is not None and guidance.iteration == int(updates["iteration"][last]) and guidance.post_merger
    assert f"from t = {updates['time'][last]:.3f} M (iteration {updates['iteration'][last]})" in frame
    assert ", after merger:" in frame
    body = guidance.body("common")
    row = next(l for l in frame.splitlines() if l.strip().startswith("common ") and l.rstrip().endswith("remnant"))
    assert f"{body.finest_radius:.4f}" in row and f"{body.finest_spacing:.5f}" in row


def test_frame_shows_spin_and_masses_with_error_bars():
    spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),), name="spin")
    info = ps.RunInfo(run_id="run-bbbbbbbbbbbb", name="spin", state="open", spec=spec, created_unix_s=0.0,
                      closed_unix_s=math.nan, slices_received=1, slices_processed=1, slices_skipped=0,
                      slices_duplicate=0, last_seq=3, archive_path="", last_received_iteration=0,
                      last_received_time=0.0)
    report = ps.SurfaceReport(label="A", time=0.0, iteration=0, found=True, status=0, area=45.2393,
                              irreducible_mass=0.948687, irreducible_mass_error=1.2e-4, area_error=1.14e-2,
                              akv_christodoulou_mass=1.0000036, akv_christodoulou_mass_error=1.04e-4,
                              dimensionless_spin=0.5999994, dimensionless_spin_error=1.11e-4,
                              spin_direction=np.array([0.0, 0.6, 0.8]), centroid=np.zeros(3), residual_max=1e-9,
                              latency_s=0.25, circumference_spin=0.6012)
    frame = render_frame(info, {"A": ps.SurfaceState("A", report, True, 0, "found", 0)}, None, now_unix_s=0.0)
    row = next(l for l in frame.splitlines() if l.startswith("A "))
    assert "chi" in frame and "M_chr [M]" in frame and "spin axis" in frame
    assert "45.23930 +-1.1e-02" in row and "0.94869 +-1.2e-04" in row
    assert "1.00000 +-1.0e-04" in row and "0.6000 +-1.1e-04" in row
    assert "(+0.00, +0.60, +0.80)" in row
    assert "chi (C_p/C_e)" in frame and " 0.601 " in row  # the circumference estimate beside the AKV chi


def test_frame_shows_the_remnant_settling_from_the_common_surface_events():
    spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (1, 0, 0), 0.5), ps.Body("B", (-1, 0, 0), 0.5)))
    info = ps.RunInfo(run_id="run-cccccccccccc", name="remnant", state="open", spec=spec, created_unix_s=0.0,
                      closed_unix_s=math.nan, slices_received=30, slices_processed=30, slices_skipped=0,
                      slices_duplicate=0, last_seq=100, archive_path="", last_received_iteration=290,
                      last_received_time=29.0)
    progress = RunProgress(last_seq=0)
    progress.absorb(ps.CommonHorizonFormedEvent(seq=1, run_id=info.run_id, kind="common_horizon_formed", time=10.0,
                                                iteration=100, emitted_unix_s=0.0, label="common",
                                                common=ps.CommonHorizon(label="common", time=10.0, iteration=100,
                                                                        body_labels=("A", "B"), separation=0.7,
                                                                        irreducible_mass=0.9, area=40.0)))

    def found(t, chi):
        return ps.SurfaceFoundEvent(seq=int(t) + 2, run_id=info.run_id, kind="surface_found", time=t, iteration=int(10 * t),
                                    emitted_unix_s=0.0, surface=ps.SurfaceReport(
                                        label="common", time=t, iteration=int(10 * t), found=True, status=0,
                                        irreducible_mass=0.88, irreducible_mass_error=1e-4, akv_christodoulou_mass=0.95,
                                        akv_christodoulou_mass_error=1e-4, dimensionless_spin=chi,
                                        dimensionless_spin_error=1e-3, akv_angular_momentum=chi * 0.95 ** 2,
                                        akv_angular_momentum_error=1e-3, spin_direction=np.array([0.0, 0.0, 1.0])))

    # chi rings down towards 0.69 as 0.05 exp(-(t - 10) / 2): still moving at t = 14, settled by t = 28
    # (over the last 10 M it moves by less than its error bar 1e-3).
    for t in np.arange(10.0, 14.5, 1.0):
        progress.absorb(found(float(t), 0.69 + 0.05 * math.exp(-(t - 10.0) / 2.0)))
    early = next(l for l in render_frame(info, {}, progress, now_unix_s=0.0).splitlines() if l.startswith("remnant"))
    assert early.startswith("remnant (common): NOT settled over t = 4.000 .. 14.000 M (5 samples)")
    for t in np.arange(15.0, 28.5, 1.0):
        progress.absorb(found(float(t), 0.69 + 0.05 * math.exp(-(t - 10.0) / 2.0)))
    late = next(l for l in render_frame(info, {}, progress, now_unix_s=0.0).splitlines() if l.startswith("remnant"))
    assert late.startswith("remnant (common): settled over t = 18.000 .. 28.000 M (11 samples)")
    assert f"chi {0.69 + 0.05 * math.exp(-9.0):.5f} +- 1.0e-03" in late and "M_chr 0.950000 +- 1.0e-04 M" in late
    spread = 0.05 * (math.exp(-4.0) - math.exp(-9.0)) / 1e-3  # chi at t = 18 minus the latest, in error bars
    assert f"chi {spread:.2g}," in late
