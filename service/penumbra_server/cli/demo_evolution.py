"""The demo's pretend evolution: a separate process that talks to Penumbra only through the shim.

It plays the part of an evolution code on a compute node. It makes its data from the exact
Brill-Lindquist reference spacetime along the invented track of :mod:`.demo_scenario` (that is
our simulated evolution, not something a real code would do), and everything it sends or reads
goes through :mod:`penumbra_shim`: open a run, submit slices (which return at once), read the
latest results and the latest refinement guidance at each "regrid step", stop a few slices
after the server first reports a common horizon, wait until the server has dealt with every
slice, close the run.

Slices go to the run cropped to the data windows the server asks for
(``submit(..., crop_to_windows=True)``; ``--no-crop`` sends them whole); when the server lags
behind and the windows have expired, the shim grows them by the server's speed bound times the
lag. So that the demo shows the same thing on any machine, the pretend evolution never runs
more than :data:`LEAD_SLICES` slices ahead of the windows the server has issued (for the run
and its control): before sending slice k it waits, if need be, until the shim holds windows
made from slice k - LEAD_SLICES or later. A real evolution would not wait (it would send whole
or widely grown slices meanwhile); this demo's grid reaches only 3 M, so windows grown over a
long lag would cover nearly all of it and go whole. With the bound the server's queue never
overflows (no slice is skipped, so both runs see the same history), the first slice alone goes
whole, and every later one goes cropped within its windows' validity. (This grid is too small
to show growth: the first windows, made before any forecast, already cover much of it, and
grown a little they would keep nearly all of it, which goes whole; the service tests and
tests/benchmarks/bench_production_windows.py show growth.) With ``--control``
(the demo's default) every slice also goes whole to a second run, the control, so that the
demo can show that the cropped sends found the same surfaces; it doubles the server's work.

The pretend evolution does not act on the guidance: its boxes follow the invented track. It
prints what it read, as an evolution code would log it before deciding.

    python -m penumbra_server.cli.demo_evolution --server 127.0.0.1:PORT --run-id-file F [--stats-file S]

Prints one line per slice sent. Exit status 0 when the runs were closed cleanly. The stats file
(JSON) holds the run ids and the byte counts of the shim's sender (``run.stats``) and of every
slice's acknowledgement.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time
from pathlib import Path

import numpy as np

import penumbra_shim as ps

from penumbra_server.cli.demo_scenario import DemoScenario, blended_shift_fields
from penumbra_server.numerics.slices import required_fields
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch

__all__ = ["run_spec_for", "slice_arrays", "guidance_line", "evolve", "main", "DEFAULT_LMAX",
           "DEFAULT_SECONDS_PER_SLICE", "DEFAULT_SECONDS_PER_SLICE_WITH_CONTROL", "DEFAULT_STEERING_SLICES"]

VARIABLE_SET = "conformal_w"
#: Wall-clock seconds between slices: a pace two workers keep up with on two cores for one run
#: (see DEVELOPERS.md), and for the run plus its control run (twice the server's work).
DEFAULT_SECONDS_PER_SLICE = 2.5
DEFAULT_SECONDS_PER_SLICE_WITH_CONTROL = 3.5
DEFAULT_LMAX = 10
#: The pretend evolution moves its fine boxes every slice; it tells the server it steers them every
#: this many slices (RefinementOptions.steering_interval = this x the slice interval).
DEFAULT_STEERING_SLICES = 2
#: Slices the pretend evolution may run ahead of the server's latest windows (module docstring):
#: with windows valid for DEFAULT_STEERING_SLICES slices, every slice lies within its windows'
#: validity (no growth needed), and at most two slices wait in the server's queue (depth 4).
LEAD_SLICES = 2


def run_spec_for(scenario: DemoScenario, *, lmax: int = DEFAULT_LMAX, name: str = "invented-bl-inspiral",
                 steering_interval: float | None = None) -> "ps.RunSpec":
    """The run spec the evolution opens: variable set, the two bodies (units of M), finder
    settings, and the refinement policy (steering interval in M; default
    ``DEFAULT_STEERING_SLICES`` slice intervals, the rest the shim's defaults)."""
    bodies = tuple(ps.Body(label=b["label"], position=b["position"], mass=b["mass"]) for b in scenario.bodies())
    if steering_interval is None:
        steering_interval = DEFAULT_STEERING_SLICES * scenario.slice_interval
    return ps.RunSpec(
        variable_set=VARIABLE_SET,
        bodies=bodies,
        name=name,
        finder=ps.FinderOptions(lmax=lmax, tolerance=1e-8, max_iterations=40),
        backlog=ps.BacklogOptions(queue_depth=4, policy="keep_newest"),
        refinement=ps.RefinementOptions(steering_interval=float(steering_interval)),
        shift_gauge="moving_puncture",  # the invented shift carries the punctures (puncture tracks)
    )


def slice_arrays(scenario: DemoScenario, index: int, *, shift: bool = True) -> dict:
    """Keyword arguments of ``ps.build_slice`` for slice ``index``: time, iteration, patches.

    The fields the conformal-W set requires and, with ``shift``, the invented shift
    (:func:`~penumbra_server.cli.demo_scenario.blended_shift_fields`) from which the server
    integrates puncture tracks. No lapse: nothing here uses it.
    """
    time_m = scenario.time_of(index)
    positions = scenario.track.positions(time_m)
    spacetime = BrillLindquist(np.asarray(scenario.track.masses), positions)
    velocities = scenario.track.velocities(time_m)
    wanted = required_fields(VARIABLE_SET)
    patches = []
    for box in scenario.boxes_at(index):
        patch = sample_patch(spacetime, origin=box.origin, spacing=(box.spacing,) * 3, shape=box.shape,
                             level=box.level, variable_set=VARIABLE_SET)
        fields = {name: patch.fields[name] for name in wanted}
        if shift:
            fields.update(blended_shift_fields(box, positions, velocities))
        patches.append(ps.PatchData(origin=tuple(box.origin), spacing=(box.spacing,) * 3, level=box.level,
                                    fields=fields, memory_order="C"))
    return {"time": time_m, "iteration": scenario.iteration_of(index), "variable_set": VARIABLE_SET,
            "patches": patches}


def guidance_line(guidance) -> str:
    """One log line for the latest refinement guidance (a ``ps.Guidance``, or None)."""
    if guidance is None:
        return "no guidance yet"
    parts = []
    for body in guidance.bodies:
        c = body.centre
        parts.append(f"{body.label} finest level {body.finest_level}: centre ({c[0]:+.3f}, {c[1]:+.3f}, {c[2]:+.3f}), "
                     f"radius {body.finest_radius:.3f} M, spacing {body.finest_spacing:.4f} M")
    merged = [r for r in guidance.finest_regions if r.merged]
    head = (f"from iteration {guidance.iteration} (t = {guidance.time:.2f} M), valid "
            f"{guidance.valid_from:.2f}..{guidance.valid_until:.2f} M"
            + (", post-merger" if guidance.post_merger else "")
            + (", merged finest region " + "+".join(merged[0].bodies) if merged else ""))
    return head + "; " + "; ".join(parts)


def _common_found(states: dict, body_labels: set[str]):
    """The latest found report of a surface that is not one of the bodies (a common horizon), or None."""
    found = [s.latest_found for label, s in states.items() if label not in body_labels and s.latest_found is not None]
    return min(found, key=lambda s: s.iteration) if found else None


def _await_windows(handles, iteration: int, timeout_s: float) -> float:
    """Wait until every handle's cache holds data windows made from ``iteration`` or later
    (module docstring); return the seconds waited, raise TimeoutError after ``timeout_s``."""
    started = time.monotonic()
    while True:
        held = [h.latest_windows() for h in handles]
        if all(w is not None and w.iteration >= iteration for w in held):
            return time.monotonic() - started
        if time.monotonic() - started > timeout_s:
            raise TimeoutError(f"no data windows from iteration {iteration} within {timeout_s:g} s; "
                               f"the shim holds {[None if w is None else w.iteration for w in held]}")
        time.sleep(0.05)


def _write_atomic(path: Path, text: str) -> None:
    tmp = path.with_name(path.name + f".tmp{os.getpid()}")
    tmp.write_text(text)
    os.replace(tmp, path)


def _drain(client, run_ids, sent: int, timeout_s: float, out) -> None:
    """Wait until the server has processed or skipped every slice of each run."""
    deadline = time.monotonic() + timeout_s
    pending = list(run_ids)
    while pending and time.monotonic() < deadline:
        info = client.get_run(pending[0])
        if info.slices_processed + info.slices_skipped >= info.slices_received >= sent:
            pending.pop(0)
            continue
        time.sleep(0.2)
    if pending:
        print("evolution: server still busy after the drain timeout; closing anyway", file=out, flush=True)


def _acks(tickets) -> list[dict]:
    rows = []
    for ticket in tickets:
        try:
            ack = ticket.result(timeout_s=0)
        except Exception as err:  # refused or not resolved: recorded, not fatal
            rows.append({"iteration": ticket.iteration, "accepted": False, "error": str(err)})
            continue
        rows.append({"iteration": ack.iteration, "accepted": ack.accepted, "cropped": ack.cropped,
                     "bytes_sent": ack.bytes_sent, "bytes_whole": ack.uncropped_bytes or ticket.nbytes,
                     "skipped_locally": ack.skipped_locally})
    return rows


def _stats(run) -> dict:
    s = run.stats
    return {"submitted": s.submitted, "sent": s.sent, "bytes_sent": s.bytes_sent, "bytes_uncropped": s.bytes_uncropped,
            "cropped": s.cropped, "sent_whole": s.sent_whole, "grown": s.grown,
            "whole_without_windows": s.whole_without_windows, "whole_nearly_all": s.whole_nearly_all,
            "dropped_locally": s.dropped_locally,
            "refused": s.refused}


def evolve(*, server: str, run_id_file: Path | None, seconds_per_slice: float, max_slices: int | None,
           lmax: int, crop: bool = True, control: bool = False, steering_interval: float | None = None,
           stats_file: Path | None = None, scenario: DemoScenario | None = None, drain_timeout_s: float = 120.0,
           out=sys.stdout) -> int:
    """Send the scenario's slices; see the module docstring. Returns 0 when the runs were closed."""
    scenario = scenario or DemoScenario()
    client = ps.connect(server)
    spec = run_spec_for(scenario, lmax=lmax, steering_interval=steering_interval)
    run = client.open_run(spec, crop_to_windows=crop)
    twin = None
    if control:
        twin = client.open_run(run_spec_for(scenario, lmax=lmax, steering_interval=steering_interval,
                                            name=spec.name + "-control-whole"), crop_to_windows=False)
    body_labels = {b["label"] for b in scenario.bodies()}
    # The demo's watcher needs the run id: wait for the runs to open (open_run waited 5 s at most).
    for handle in (run, twin):
        if handle is not None and not handle.wait_open(drain_timeout_s):
            print(f"evolution: no run opened on {server} within {drain_timeout_s:g} s: {handle.errors}", file=out,
                  flush=True)
            client.close()
            return 1
    if run_id_file is not None:
        _write_atomic(run_id_file, run.run_id + "\n")
    print(f"evolution: opened run {run.run_id} on {server} (slices {'cropped to the data windows' if crop else 'whole'})"
          + (f" and control run {twin.run_id} (whole slices)" if twin else ""), file=out, flush=True)
    limit = scenario.slice_count if max_slices is None else min(max_slices, scenario.slice_count)
    common_iteration = None
    sent = 0
    blocked_max = 0.0
    tickets, twin_tickets = [], []
    waited_s = 0.0
    for index in range(limit):
        if index > 0:
            waited = _await_windows([h for h in (run, twin) if h is not None],
                                    scenario.iteration_of(max(0, index - LEAD_SLICES)), drain_timeout_s)
            waited_s += waited
            if index == 1:
                windows = run.latest_windows()
                print(f"evolution: first data windows (from iteration {windows.iteration}) held after {waited:.1f} s; "
                      f"bodies move at most {windows.speed_bound:.3g} M/M", file=out, flush=True)
        step_started = time.monotonic()
        arrays = slice_arrays(scenario, index)
        t_build = time.perf_counter()
        outgoing = ps.build_slice(**arrays)  # validates and copies
        t0 = time.perf_counter()
        tickets.append(run.submit(outgoing))
        blocked = time.perf_counter() - t0
        if twin is not None:
            twin_tickets.append(twin.submit(outgoing))
        blocked_max = max(blocked_max, blocked)
        sent += 1
        d = float(scenario.track.separation(scenario.time_of(index)))
        print(f"evolution: sent slice {index} (t = {scenario.time_of(index):.2f} M, iteration "
              f"{scenario.iteration_of(index)}, separation {d:.3f} M, {outgoing.nbytes / 2**20:.1f} MiB whole); "
              f"build_slice {1e3 * (t0 - t_build):.1f} ms, submit returned in {1e3 * blocked:.1f} ms",
              file=out, flush=True)
        # The regrid step: read the latest results and guidance (cached copies, never waiting).
        print(f"evolution: guidance (advisory; not applied, the boxes follow the invented track) "
              f"{guidance_line(run.latest_guidance())}", file=out, flush=True)
        if common_iteration is None:
            common = _common_found(run.latest_surfaces(refresh=True), body_labels)
            if common is not None:
                common_iteration = int(common.iteration)
                print(f"evolution: server reports a common horizon at iteration {common_iteration}",
                      file=out, flush=True)
        if common_iteration is not None:
            beyond = index - common_iteration // scenario.iterations_per_slice
            if beyond >= scenario.slices_after_common:
                break
        time.sleep(max(0.0, seconds_per_slice - (time.monotonic() - step_started)))
    for handle in (run, twin):
        if handle is not None:
            handle.flush(timeout_s=60.0)
    _drain(client, [h.run_id for h in (run, twin) if h is not None], sent, drain_timeout_s, out)
    info = client.get_run(run.run_id)
    final_guidance = run.latest_guidance(refresh=True)
    record = {
        "run_id": run.run_id, "control_run_id": twin.run_id if twin else None, "crop": crop,
        "steering_interval": spec.refinement.steering_interval, "slices_sent": sent,
        "stats": _stats(run), "acks": _acks(tickets),
        "control_stats": _stats(twin) if twin else None, "control_acks": _acks(twin_tickets) if twin else None,
        "final_guidance": guidance_line(final_guidance),
        "submit_blocked_max_ms": round(1e3 * blocked_max, 2),
        "waited_for_windows_s": round(waited_s, 2), "lead_slices": LEAD_SLICES,
    }
    print(f"evolution: latest guidance (advisory) {record['final_guidance']}", file=out, flush=True)
    for handle in (run, twin):
        if handle is not None:
            handle.close(close_run=True)
    client.close()
    if stats_file is not None:
        _write_atomic(stats_file, json.dumps(record, indent=1) + "\n")
    s = record["stats"]
    ratio = s["bytes_sent"] / s["bytes_uncropped"] if s["bytes_uncropped"] else math.nan
    print("evolution: closed run; " + json.dumps({
        "run_id": info.run_id, "slices_sent": sent, "received": info.slices_received,
        "processed": info.slices_processed, "skipped": info.slices_skipped,
        "bytes_sent": s["bytes_sent"], "bytes_whole": s["bytes_uncropped"], "byte_ratio": round(ratio, 4),
        "submit_blocked_max_ms": record["submit_blocked_max_ms"]}), file=out, flush=True)
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="penumbra-demo-evolution", description=__doc__.splitlines()[0])
    parser.add_argument("--server", required=True, help="HOST:PORT of the Penumbra server")
    parser.add_argument("--run-id-file", type=Path, default=None, help="write the run id here once opened")
    parser.add_argument("--stats-file", type=Path, default=None, help="write run ids and byte counts here (JSON) at the end")
    parser.add_argument("--seconds-per-slice", type=float, default=None,
                        help=f"pretend cost of the evolution between slices, s (default {DEFAULT_SECONDS_PER_SLICE}; "
                             f"{DEFAULT_SECONDS_PER_SLICE_WITH_CONTROL} with --control)")
    parser.add_argument("--max-slices", type=int, default=None, help="stop after this many slices")
    parser.add_argument("--lmax", type=int, default=DEFAULT_LMAX, help=f"finder l_max (default {DEFAULT_LMAX})")
    parser.add_argument("--steering-interval", type=float, default=None,
                        help=f"steering interval told to the server, M (default {DEFAULT_STEERING_SLICES} slice intervals)")
    parser.add_argument("--no-crop", dest="crop", action="store_false",
                        help="send slices whole instead of cropped to the server's data windows")
    parser.add_argument("--control", action="store_true",
                        help="also send every slice whole to a second (control) run")
    args = parser.parse_args(argv)
    pace = args.seconds_per_slice
    if pace is None:
        pace = DEFAULT_SECONDS_PER_SLICE_WITH_CONTROL if args.control else DEFAULT_SECONDS_PER_SLICE
    return evolve(server=args.server, run_id_file=args.run_id_file, seconds_per_slice=pace,
                  max_slices=args.max_slices, lmax=args.lmax, crop=args.crop, control=args.control,
                  steering_interval=args.steering_interval, stats_file=args.stats_file)


if __name__ == "__main__":
    sys.exit(main())
