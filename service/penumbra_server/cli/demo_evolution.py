"""The demo's pretend evolution: a separate process that talks to Penumbra only through the shim.

It plays the part of an evolution code on a compute node. It makes its data from the exact
Brill-Lindquist reference spacetime along the invented track of :mod:`.demo_scenario` (that is
our simulated evolution, not something a real code would do), and everything it sends or reads
goes through :mod:`penumbra_shim`: open a run, submit slices (which return at once), read the
latest results between "steps", stop a few slices after the server first reports a common
horizon, wait until the server has dealt with every slice, close the run.

    python -m penumbra_server.cli.demo_evolution --server 127.0.0.1:PORT --run-id-file F

Prints one line per slice sent. Exit status 0 when the run was closed cleanly.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np

import penumbra_shim as ps

from penumbra_server.cli.demo_scenario import DemoScenario
from penumbra_server.numerics.slices import required_fields
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch

__all__ = ["run_spec_for", "slice_arrays", "main"]

VARIABLE_SET = "conformal_w"
#: Defaults measured to keep the demo to about a minute on two cores (see DEVELOPERS.md).
DEFAULT_SECONDS_PER_SLICE = 2.5
DEFAULT_LMAX = 10


def run_spec_for(scenario: DemoScenario, *, lmax: int = DEFAULT_LMAX, name: str = "invented-bl-inspiral") -> "ps.RunSpec":
    """The run spec the evolution opens: variable set, the two bodies (units of M), finder settings."""
    bodies = tuple(ps.Body(label=b["label"], position=b["position"], mass=b["mass"]) for b in scenario.bodies())
    return ps.RunSpec(
        variable_set=VARIABLE_SET,
        bodies=bodies,
        name=name,
        finder=ps.FinderOptions(lmax=lmax, tolerance=1e-8, max_iterations=40),
        backlog=ps.BacklogOptions(queue_depth=4, policy="keep_newest"),
    )


def slice_arrays(scenario: DemoScenario, index: int) -> dict:
    """Keyword arguments of ``ps.build_slice`` for slice ``index``: time, iteration, patches.

    Only the fields the conformal-W set requires travel (the data's lapse and shift carry no
    information here: Brill-Lindquist fixes neither).
    """
    time_m = scenario.time_of(index)
    spacetime = BrillLindquist(np.asarray(scenario.track.masses), scenario.track.positions(time_m))
    wanted = required_fields(VARIABLE_SET)
    patches = []
    for box in scenario.boxes_at(index):
        patch = sample_patch(spacetime, origin=box.origin, spacing=(box.spacing,) * 3, shape=box.shape,
                             level=box.level, variable_set=VARIABLE_SET)
        patches.append(ps.PatchData(origin=tuple(box.origin), spacing=(box.spacing,) * 3, level=box.level,
                                    fields={name: patch.fields[name] for name in wanted}, memory_order="C"))
    return {"time": time_m, "iteration": scenario.iteration_of(index), "variable_set": VARIABLE_SET,
            "patches": patches}


def _common_found(states: dict, body_labels: set[str]):
    """The latest found report of a surface that is not one of the bodies (a common horizon), or None."""
    found = [s.latest_found for label, s in states.items() if label not in body_labels and s.latest_found is not None]
    return min(found, key=lambda s: s.iteration) if found else None


def _write_atomic(path: Path, text: str) -> None:
    tmp = path.with_name(path.name + f".tmp{os.getpid()}")
    tmp.write_text(text)
    os.replace(tmp, path)


def evolve(*, server: str, run_id_file: Path | None, seconds_per_slice: float, max_slices: int | None,
           lmax: int, drain_timeout_s: float = 120.0, out=sys.stdout) -> int:
    scenario = DemoScenario()
    client = ps.connect(server)
    run = client.open_run(run_spec_for(scenario, lmax=lmax))
    body_labels = {b["label"] for b in scenario.bodies()}
    if run_id_file is not None:
        _write_atomic(run_id_file, run.run_id + "\n")
    print(f"evolution: opened run {run.run_id} on {server}", file=out, flush=True)
    limit = scenario.slice_count if max_slices is None else min(max_slices, scenario.slice_count)
    common_iteration = None
    sent = 0
    blocked_max = 0.0
    for index in range(limit):
        step_started = time.monotonic()
        arrays = slice_arrays(scenario, index)
        t_build = time.perf_counter()
        outgoing = ps.build_slice(**arrays)  # validates and copies
        t0 = time.perf_counter()
        run.submit(outgoing)
        blocked = time.perf_counter() - t0
        blocked_max = max(blocked_max, blocked)
        sent += 1
        d = float(scenario.track.separation(scenario.time_of(index)))
        print(f"evolution: sent slice {index} (t = {scenario.time_of(index):.2f} M, iteration "
              f"{scenario.iteration_of(index)}, separation {d:.3f} M, {outgoing.nbytes / 2**20:.1f} MiB); "
              f"build_slice {1e3 * (t0 - t_build):.1f} ms, submit returned in {1e3 * blocked:.1f} ms",
              file=out, flush=True)
        # Between steps an evolution code reads the latest results (the cached copy is cheap).
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
    run.flush(timeout_s=60.0)
    # Wait until the server has processed or skipped every slice before closing the run.
    deadline = time.monotonic() + drain_timeout_s
    while time.monotonic() < deadline:
        info = client.get_run(run.run_id)
        if info.slices_processed + info.slices_skipped >= info.slices_received >= sent:
            break
        time.sleep(0.2)
    else:
        print("evolution: server still busy after the drain timeout; closing anyway", file=out, flush=True)
    info = client.get_run(run.run_id)
    run.close(close_run=True)
    client.close()
    print("evolution: closed run; " + json.dumps({
        "run_id": info.run_id, "slices_sent": sent, "received": info.slices_received,
        "processed": info.slices_processed, "skipped": info.slices_skipped,
        "submit_blocked_max_ms": round(1e3 * blocked_max, 2)}), file=out, flush=True)
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="penumbra-demo-evolution", description=__doc__.splitlines()[0])
    parser.add_argument("--server", required=True, help="HOST:PORT of the Penumbra server")
    parser.add_argument("--run-id-file", type=Path, default=None, help="write the run id here once opened")
    parser.add_argument("--seconds-per-slice", type=float, default=DEFAULT_SECONDS_PER_SLICE,
                        help=f"pretend cost of the evolution between slices, s (default {DEFAULT_SECONDS_PER_SLICE})")
    parser.add_argument("--max-slices", type=int, default=None, help="stop after this many slices")
    parser.add_argument("--lmax", type=int, default=DEFAULT_LMAX, help=f"finder l_max (default {DEFAULT_LMAX})")
    args = parser.parse_args(argv)
    return evolve(server=args.server, run_id_file=args.run_id_file, seconds_per_slice=args.seconds_per_slice,
                  max_slices=args.max_slices, lmax=args.lmax)


if __name__ == "__main__":
    sys.exit(main())
