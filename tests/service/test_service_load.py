"""Load: one run held at 10 times the server's pace, memory bounded by the configured budget.

The server runs in its own process (load_server.py) with ``max_queued_bytes`` set; its finder
jobs run only when the test allows one, after every ten slices sent: exactly ten slices arrive
per slice processed. The client sends whole slices one after another (each answered before the
next); the run's queue (keep-newest, depth 8) would hold more than the budget, so the budget
binds: the server refuses what does not fit (RESOURCE_EXHAUSTED, QUEUED_BYTES_BUDGET).

Asserted: the server process's peak resident memory (VmHWM from /proc, reset after warm-up)
stays below the resident memory after warm-up plus the budget plus an allowance stated below.
Measured and printed, not asserted (timing): the longest event-loop stall inside the server
(loop_lag.py) and the longest latency of a trivial call (GetRun) seen by the client.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

import pytest

import penumbra_shim as ps

from service_support import LONE_CENTRE, box, lone_hole, lone_spec, patch_data, wait_until

NODES = 41                      # 41^3 nodes x 12 ADM fields x 8 bytes = 6.6 MB per slice
SLICES = 100
PACE = 10                       # slices sent per slice the server is allowed to process
BUDGET_SLICES = 3               # max_queued_bytes: three slices' bytes
#: Allowance beyond the budget (stated, not fitted): the slice in the finder and its crop for
#: the worker (two slices' bytes, not counted in queued bytes), the arriving slice's buffers
#: and its checked copy (two more), plus 64 MiB for gRPC buffers, the archive writer and the
#: allocator's slack.
ALLOWANCE_SLICES = 4
ALLOWANCE_FIXED = 64 * 2**20
IDLE_WINDOW_S = 5.0


def _status(pid: int) -> dict[str, int]:
    out = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        key, _, value = line.partition(":")
        if key in ("VmRSS", "VmHWM"):
            out[key] = int(value.split()[0]) * 1024
    return out


class _Server:
    def __init__(self, archive: Path, budget: int) -> None:
        env = dict(os.environ)
        self.proc = subprocess.Popen([sys.executable, str(Path(__file__).with_name("load_server.py")), str(archive),
                                      str(budget)], stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, env=env)
        line = self.proc.stdout.readline()
        if not line:
            raise AssertionError(f"load server exited with {self.proc.wait(60)} before serving")
        info = json.loads(line)
        self.address, self.pid = info["address"], info["pid"]

    def command(self, text: str) -> None:
        self.proc.stdin.write(text + "\n")
        self.proc.stdin.flush()

    def stats(self) -> dict:
        self.command("stats")
        return json.loads(self.proc.stdout.readline())

    def stop(self) -> None:
        try:
            self.command("quit")
            self.proc.wait(60)
        except (BrokenPipeError, subprocess.TimeoutExpired):
            self.proc.kill()
            self.proc.wait(60)


@pytest.mark.slow
def test_one_run_at_ten_times_the_server_pace_stays_within_the_memory_budget(tmp_path):
    hole = lone_hole()
    patches = [patch_data(hole, box(LONE_CENTRE, 1.2, NODES))]
    one = ps.build_slice(time=0.0, iteration=0, variable_set="adm", patches=patches)
    budget = BUDGET_SLICES * one.nbytes
    server = _Server(tmp_path, budget)
    try:
        with ps.connect(server.address, deadline_s=60.0) as client:
            run = client.open_run(lone_spec("load", queue_depth=8), queue_depth=SLICES + 1, cache_results=False)
            # Warm-up: one slice processed, so that imports, pools and the archive are in memory.
            assert run.submit(one).result(120).accepted
            server.command("allow 1")
            wait_until(lambda: client.get_run(run.run_id).slices_processed == 1, "the warm-up slice", 300.0)
            # The same probe over an idle window first: what the machine's own load costs the loop.
            server.command("reset")
            time.sleep(IDLE_WINDOW_S)  # a measurement window, not a wait for a condition
            idle = server.stats()
            baseline = _status(server.pid)["VmRSS"]
            Path(f"/proc/{server.pid}/clear_refs").write_text("5")  # VmHWM := VmRSS from here
            server.command("reset")
            outcomes = {"accepted": 0, "refused": 0}
            latency_max = 0.0
            for k in range(1, SLICES + 1):
                ticket = run.submit(ps.build_slice(time=0.1 * k, iteration=k, variable_set="adm", patches=patches))
                try:
                    outcomes["accepted" if ticket.result(120).accepted else "refused"] += 1
                except ps.PenumbraError as err:
                    assert "max_queued_bytes" in str(err), err
                    outcomes["refused"] += 1
                t0 = time.perf_counter()
                client.get_run(run.run_id)
                latency_max = max(latency_max, time.perf_counter() - t0)
                if k % PACE == 0:
                    server.command("allow 1")
            peak = _status(server.pid)["VmHWM"]
            stats = server.stats()
            server.command("allow 1000000")
            run.close()
            info = client.get_run(run.run_id)
    finally:
        server.stop()
    limit = baseline + budget + ALLOWANCE_SLICES * one.nbytes + ALLOWANCE_FIXED
    mib = 2**20
    print(f"\nload: {SLICES} slices of {one.nbytes / mib:.1f} MiB at {PACE}x the server's pace; budget "
          f"(max_queued_bytes) {budget / mib:.1f} MiB; accepted {outcomes['accepted']}, refused "
          f"{outcomes['refused']}; server processed {info.slices_processed}, skipped {info.slices_skipped}")
    print(f"load: server RSS after warm-up {baseline / mib:.0f} MiB, peak during overload {peak / mib:.0f} MiB "
          f"(+{(peak - baseline) / mib:.0f} MiB; budget {budget / mib:.0f} MiB; limit asserted {limit / mib:.0f} MiB)")
    print(f"load: longest event-loop stall in the server {stats['max_stall_ms']:.1f} ms over "
          f"{stats['probe_samples']} probes (idle server, same probe, {IDLE_WINDOW_S:g} s: "
          f"{idle['max_stall_ms']:.1f} ms); longest GetRun latency at the client {1e3 * latency_max:.1f} ms")
    assert outcomes["refused"] > 0, "the budget never bound: the test did not overload the server"
    assert peak <= limit
