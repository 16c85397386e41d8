"""`penumbra demo`: server, pretend evolution and report, end to end on one machine.

1. start `penumbra serve` as a subprocess on a free loopback port (archive under --workdir);
2. start the pretend evolution (:mod:`.demo_evolution`) as another process: it talks to the
   server only through the shim, sends its slices cropped to the server's data windows and
   (by default) every slice whole to a control run as well;
3. follow the run's events from here and print progress;
4. when the evolution has closed its runs, write the report (:mod:`.report`) and print a
   summary: when the common horizon first appeared, final masses, slices skipped, the bytes
   sent cropped against whole, whether the control run found the same surfaces, the latest
   refinement guidance (advisory), paths.

The data are invented (see :mod:`.demo_scenario` and the README): Brill-Lindquist snapshots
along a made-up shrinking orbit, not an evolution of Einstein's equations.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

from penumbra_server.cli.progress import Progress
from penumbra_server.cli.safe_text import terminal_safe

__all__ = ["run_demo", "start_server_process", "stop_process", "byte_lines", "comparison_line", "guidance_lines"]


def _child_env() -> dict[str, str]:
    env = dict(os.environ)
    # One BLAS thread per process: the server's workers and the evolution share two cores.
    for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        env.setdefault(name, "1")
    env["PYTHONUNBUFFERED"] = "1"
    return env


def _wait_for_file(path: Path, process: subprocess.Popen, timeout_s: float, what: str) -> str:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if path.exists():
            text = path.read_text().strip()
            if text:
                return text
        if process.poll() is not None:
            raise RuntimeError(f"{what} exited with status {process.returncode} before writing {path}")
        time.sleep(0.05)
    raise TimeoutError(f"{what} did not write {path} within {timeout_s:.0f} s")


def start_server_process(archive_root: Path, *, workers: int, log_path: Path, ready_file: Path,
                         timeout_s: float = 60.0) -> tuple[subprocess.Popen, str]:
    """Start `penumbra serve` on 127.0.0.1 with a free port; return (process, bound address)."""
    ready_file.unlink(missing_ok=True)
    log = open(log_path, "w")
    process = subprocess.Popen(
        [sys.executable, "-m", "penumbra_server.cli.main", "serve", "--listen", "127.0.0.1:0",
         "--archive-root", str(archive_root), "--workers", str(workers), "--ready-file", str(ready_file),
         "--grace", "2"],
        stdout=log, stderr=subprocess.STDOUT, env=_child_env(),
    )
    log.close()
    try:
        address = _wait_for_file(ready_file, process, timeout_s, "the server")
    except Exception:
        stop_process(process)
        raise
    return process, address


def stop_process(process: subprocess.Popen, *, timeout_s: float = 15.0) -> int | None:
    """SIGINT, then SIGTERM, then SIGKILL, waiting in between; returns the exit status."""
    for sig in (signal.SIGINT, signal.SIGTERM, signal.SIGKILL):
        if process.poll() is not None:
            break
        process.send_signal(sig)
        try:
            process.wait(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            continue
    return process.poll()


class _EventFollower:
    """Follows a run's events in a thread and keeps what the demo prints."""

    def __init__(self, client, run_id: str, body_labels: set[str], progress: Progress) -> None:
        self.client = client
        self.run_id = run_id
        self.body_labels = body_labels
        self.progress = progress
        self.common_first = None  # (time, iteration) of the first common-horizon slice reported
        self.latest: dict[str, object] = {}
        self.skipped: list[int] = []
        self.error: BaseException | None = None
        self.thread = threading.Thread(target=self._follow, name="penumbra-demo-events", daemon=True)

    def _follow(self) -> None:
        try:
            for event in self.client.watch(self.run_id, from_seq=1, idle_timeout_s=None):
                kind = event.kind
                if kind == "common_horizon_formed" and event.common is not None:
                    c = event.common
                    self.progress.show(f"server: common horizon {c.label!r} formed at t = {c.time:.2f} M "
                                       f"(bodies {c.separation:.3f} M apart, M_irr {c.irreducible_mass:.4f} M)")
                elif kind == "warning":
                    self.progress.show(terminal_safe(f"server warning ({event.warning_kind}, {event.label}): {event.message}"))
                if kind in ("surface_found", "surface_not_found") and event.surface is not None:
                    s = event.surface
                    self.latest[s.label] = s
                    if (kind == "surface_found" and s.label not in self.body_labels
                            and (self.common_first is None or s.iteration < self.common_first[1])):
                        self.common_first = (float(s.time), int(s.iteration))
                elif kind == "slice_skipped":
                    self.skipped.append(int(event.skipped_iteration if event.skipped_iteration >= 0
                                            else event.iteration))
                    self.progress.show(f"server skipped iteration {self.skipped[-1]} (backlog)")
                elif kind == "slice_processed":
                    parts = []
                    for label, s in sorted(self.latest.items(), key=lambda kv: (kv[0] not in self.body_labels, kv[0])):
                        if int(s.iteration) != int(event.iteration):
                            continue
                        parts.append(f"{label} M_irr={s.irreducible_mass:.4f}" if s.found else f"{label} -")
                    self.progress.step(f"t = {event.time:.2f} M, iteration {event.iteration}: " + ", ".join(parts))
        except BaseException as err:  # surfaced by the demo after the run
            self.error = err


def _mib(n: float) -> str:
    return f"{n / 2**20:.1f} MiB"


def byte_lines(stats: dict) -> list[str]:
    """What the evolution's stats file says about cropping, as summary lines."""
    s = stats.get("stats") or {}
    sent, whole = int(s.get("bytes_sent", 0)), int(s.get("bytes_uncropped", 0))
    if not stats.get("crop"):
        return [f"data windows: slices sent whole (--no-crop): {_mib(sent)} in {s.get('sent', 0)} slices"]
    acks = [a for a in stats.get("acks", ()) if a.get("accepted")]
    cropped = [a for a in acks if a.get("cropped")]
    reasons = []
    for key, text in (("whole_without_windows", "no windows yet"),
                      ("whole_nearly_all", "expired windows grown to nearly all of it")):
        if int(s.get(key, 0)):
            reasons.append(f"{int(s[key])} {text}")
    grown = int(s.get("grown", 0))
    lines = [f"data windows: {len(cropped)} of {len(acks)} slices sent cropped to the server's windows"
             + (f" ({grown} to windows grown after they expired)" if grown else "")
             + f", {len(acks) - len(cropped)} whole" + (f" ({'; '.join(reasons)})" if reasons else "")
             + f"; bytes sent {_mib(sent)} of {_mib(whole)} whole: ratio {sent / whole:.3f}"
             if whole else "data windows: nothing sent"]
    if cropped:
        mean_sent = sum(a["bytes_sent"] for a in cropped) / len(cropped)
        mean_whole = sum(a["bytes_whole"] for a in cropped) / len(cropped)
        lines.append(f"  per cropped slice: {_mib(mean_sent)} sent against {_mib(mean_whole)} whole on average "
                     f"(ratio {mean_sent / mean_whole:.3f}; smallest {min(a['bytes_sent'] / a['bytes_whole'] for a in cropped):.3f}, "
                     f"largest {max(a['bytes_sent'] / a['bytes_whole'] for a in cropped):.3f})")
    return lines


def comparison_line(comparison, control_run_id: str) -> str:
    """The control run's verdict (a :class:`~penumbra_server.cli.report.SurfaceComparison`)."""
    c = comparison
    verdict = ("the same surfaces were found" if c.identical_outcomes and c.only_in_one == 0
               and not c.max_relative_area_difference > 1e-10 else "the surfaces DIFFER")
    return (f"same surfaces: the control run {control_run_id} got every slice whole; {verdict}: {c.compared} "
            f"attempts compared by iteration and label, {c.same_outcome} with the same outcome, {c.found_in_both} "
            f"found in both (largest relative area difference {c.max_relative_area_difference:.1e}, largest "
            f"coefficient difference {c.max_coefficient_difference:.1e} M)"
            + (f", {c.only_in_one} attempts in one run only (slices skipped by one of them)" if c.only_in_one else ""))


def guidance_lines(summary) -> list[str]:
    """The latest recommended finest regions, per body or the remnant, from a report summary."""
    g = summary.guidance
    if g is None:
        return ["refinement guidance: none received"]
    f = g.final
    lines = [f"refinement guidance (advisory: the evolution decides; this pretend evolution only logs it), latest "
             f"from t = {f.time:.2f} M, valid {f.valid_from:.2f} .. {f.valid_until:.2f} M"
             + (", after merger: one region around the remnant" if f.post_merger else "") + ":"]
    for b in f.bodies:
        c = b.centre
        lines.append(f"  {b.label}: finest level {b.finest_level} of {f.nesting_depth}, centre ({c[0]:+.3f}, {c[1]:+.3f}, "
                     f"{c[2]:+.3f}) M, radius {b.radius:.3f} M, spacing {b.spacing:.4f} M"
                     + (f" (merged region {'+'.join(b.region_bodies)})" if b.merged and not f.post_merger else ""))
    return lines


def run_demo(*, workdir: Path, workers: int = 2, seconds_per_slice: float | None = None,
             max_slices: int | None = None, lmax: int | None = None, crop: bool = True, control: bool = True,
             steering_interval: float | None = None, out=sys.stdout) -> int:
    """Run the whole demo; return the exit status (0 when a common horizon was found and reported)."""
    import json

    import penumbra_shim as ps

    from penumbra_server.cli.demo_evolution import (DEFAULT_LMAX, DEFAULT_SECONDS_PER_SLICE,
                                                    DEFAULT_SECONDS_PER_SLICE_WITH_CONTROL)
    from penumbra_server.cli.demo_scenario import DemoScenario
    from penumbra_server.cli.report import compare_surfaces, load_run, summary_text, write_report

    started = time.monotonic()
    workdir = Path(workdir).resolve()
    archive_root = workdir / "archive"
    workdir.mkdir(parents=True, exist_ok=True)
    scenario = DemoScenario()
    total = scenario.slice_count if max_slices is None else min(max_slices, scenario.slice_count)
    pace = seconds_per_slice
    if pace is None:
        pace = DEFAULT_SECONDS_PER_SLICE_WITH_CONTROL if control else DEFAULT_SECONDS_PER_SLICE
    print(f"penumbra demo: invented data (Brill-Lindquist snapshots along a made-up orbit), up to {total} slices"
          f"{', sent cropped to the data windows' if crop else ', sent whole'}"
          f"{' and whole to a control run' if control else ''}, one every {pace:g} s; output in {workdir}",
          file=out, flush=True)

    server, address = start_server_process(archive_root, workers=workers, log_path=workdir / "server.log",
                                           ready_file=workdir / "server-address")
    print(f"penumbra demo: server pid {server.pid} on {address} (log {workdir / 'server.log'})", file=out, flush=True)
    evolution = None
    client = None
    try:
        run_id_file = workdir / "run-id"
        stats_file = workdir / "evolution-stats.json"
        run_id_file.unlink(missing_ok=True)
        stats_file.unlink(missing_ok=True)
        command = [sys.executable, "-m", "penumbra_server.cli.demo_evolution", "--server", address,
                   "--run-id-file", str(run_id_file), "--stats-file", str(stats_file),
                   "--seconds-per-slice", str(pace),
                   "--lmax", str(DEFAULT_LMAX if lmax is None else lmax)]
        if max_slices is not None:
            command += ["--max-slices", str(max_slices)]
        if not crop:
            command.append("--no-crop")
        if control:
            command.append("--control")
        if steering_interval is not None:
            command += ["--steering-interval", str(steering_interval)]
        with open(workdir / "evolution.log", "w") as evolution_log:
            evolution = subprocess.Popen(command, stdout=evolution_log, stderr=subprocess.STDOUT, env=_child_env())
        run_id = _wait_for_file(run_id_file, evolution, 60.0, "the evolution")
        print(f"penumbra demo: evolution pid {evolution.pid} opened run {run_id} "
              f"(log {workdir / 'evolution.log'}); `penumbra watch {run_id} --server {address}` follows it "
              f"from another terminal", file=out, flush=True)

        client = ps.connect(address)
        progress = Progress("slices processed", total, stream=out)
        follower = _EventFollower(client, run_id, {b["label"] for b in scenario.bodies()}, progress)
        follower.thread.start()
        status = evolution.wait(timeout=600)
        follower.thread.join(timeout=30)
        progress.finish("evolution finished")
        if status != 0:
            print(f"penumbra demo: the evolution exited with status {status}; see {workdir / 'evolution.log'}",
                  file=out, flush=True)
            return 1
        if follower.error is not None:
            print(f"penumbra demo: following events failed: {follower.error!r}", file=out, flush=True)
        stats = json.loads(stats_file.read_text())

        archive_path = Path(client.get_run(run_id).archive_path or archive_root / f"{run_id}.zarr")
        report = write_report(archive_path, workdir / "report", progress=Progress("report", 6, stream=out))
        summary = report.summary
        print("", file=out)
        print(summary_text(summary), file=out, end="")
        print("", file=out)
        if summary.common_first_time is not None:
            print(f"common horizon first appeared at t = {summary.common_first_time:.3f} M "
                  f"(iteration {summary.common_first_iteration}), separation "
                  f"{float(scenario.track.separation(summary.common_first_time)):.3f} M on the invented track",
                  file=out)
        else:
            print("common horizon: not found in this run", file=out)
        masses = ", ".join(f"{s.label} {s.final_irreducible_mass:.4f}" for s in summary.surfaces
                           if s.first_found_time is not None)
        print(f"final irreducible masses [M]: {masses}", file=out)
        print(f"slices skipped: {summary.slices_skipped} of {summary.slices_total}"
              + (f" (iterations {', '.join(map(str, summary.skipped_iterations))})" if summary.skipped_iterations else ""),
              file=out)
        for line in byte_lines(stats):
            print(line, file=out)
        control_id = stats.get("control_run_id")
        control_path = None
        if control_id:
            control_path = Path(client.get_run(control_id).archive_path or archive_root / f"{control_id}.zarr")
            print(comparison_line(compare_surfaces(load_run(archive_path), load_run(control_path)), control_id),
                  file=out)
        else:
            print("same surfaces: not checked in this run (no control run)", file=out)
        for line in guidance_lines(summary):
            print(line, file=out)
        print(f"archive: {archive_path}" + (f"  (control: {control_path})" if control_path else ""), file=out)
        print("plots: " + ", ".join(str(p) for p in report.plots), file=out)
        print(f"summary: {report.summary_path}", file=out)
        print(f"demo took {time.monotonic() - started:.1f} s", file=out, flush=True)
        return 0 if summary.common_first_time is not None else 1
    finally:
        if client is not None:
            client.close()
        if evolution is not None and evolution.poll() is None:
            stop_process(evolution)
        stop_process(server)
