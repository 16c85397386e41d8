"""Link benchmark: prints figures, asserts nothing (run: python tests/benchmarks/bench_link.py).

1. How long ``open_run`` takes against a live loopback server (OpenRun: spec check, archive
   group created, "opened" event committed) - the figure to compare with the default
   ``open_timeout_s`` (5 s): a run that takes longer to open is returned pending.
2. How long ``open_run`` blocks when nothing listens on the target, for a few open timeouts
   (before this change it blocked for the retry budget, 30 s by default, and then raised).
3. How long ``submit()`` blocks the caller while the handle is pending (it only queues/drops).
4. Time from a server coming up on the target to the pending run being open, its queued
   slices accepted and the outage recorded on the server.
"""

from __future__ import annotations

import argparse
import socket
import statistics
import tempfile
import time

import penumbra_shim as ps
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch
from penumbra_server.server import BackgroundServer, ServerOptions


def _spec(name: str, queue_depth: int = 4) -> ps.RunSpec:
    return ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0.013, -0.021, 0.017), 1.0),), name=name,
                      backlog=ps.BacklogOptions(queue_depth=queue_depth))


def _slice(iteration: int, nodes: int = 33) -> ps.OutgoingSlice:
    h = 2.4 / (nodes - 1)
    origin = (0.013 - 1.2, -0.021 - 1.2, 0.017 - 1.2)
    patch = sample_patch(BrillLindquist(masses=(1.0,), positions=((0.013, -0.021, 0.017),)), origin=origin,
                         spacing=(h, h, h), shape=(nodes,) * 3, variable_set="adm")
    fields = {k: v for k, v in patch.fields.items() if k in ps.required_fields("adm")}
    return ps.build_slice(time=0.1 * iteration, iteration=iteration, variable_set="adm",
                          patches=[ps.PatchData(origin=origin, spacing=(h, h, h), fields=fields)])


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _summary(values: list[float]) -> str:
    ms = sorted(v * 1e3 for v in values)
    return f"median {statistics.median(ms):8.1f} ms   max {ms[-1]:8.1f} ms   (n={len(ms)})"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--opens", type=int, default=20)
    args = parser.parse_args()
    root = tempfile.mkdtemp(prefix="bench-link-")

    with BackgroundServer("127.0.0.1:0", archive_root=root, workers=1, options=ServerOptions(workers=1)) as bg:
        with ps.connect(bg.address) as client:
            times, states = [], []
            for i in range(args.opens):
                t0 = time.perf_counter()
                run = client.open_run(_spec(f"open {i}"), cache_results=False)
                times.append(time.perf_counter() - t0)
                states.append(run.state)
                run.close()
            print(f"1. open_run on a live loopback server:      {_summary(times)}   states {set(states)}")

    address = f"127.0.0.1:{_free_port()}"
    with ps.connect(address, deadline_s=2.0) as client:
        for timeout in (0.1, 0.5, 2.0):
            t0 = time.perf_counter()
            run = client.open_run(_spec("nobody listens"), open_timeout_s=timeout, cache_results=False)
            took = time.perf_counter() - t0
            print(f"2. open_run, nothing listening, open_timeout_s={timeout:4.1f}: returned after {took * 1e3:8.1f} ms"
                  f" ({run.state})")
            run.close(timeout_s=0.0)
        run = client.open_run(_spec("pending submits", queue_depth=2), open_timeout_s=0.1, cache_results=False,
                              max_retry_s=600)
        slices = [_slice(i) for i in range(40)]
        blocks = [run.submit(s).submit_block_s for s in slices]
        print(f"3. submit() while pending (queue 2, 38 drops): {_summary(blocks)}   "
              f"dropped {run.dropped_by_reason}")
        t0 = time.perf_counter()
        with BackgroundServer(address, archive_root=root, workers=1, options=ServerOptions(workers=1)):
            t_up = time.perf_counter()
            run.wait_open(120)
            t_open = time.perf_counter()
            run.flush(120)
            t_flushed = time.perf_counter()
            deadline = time.monotonic() + 120
            while not run.gaps and time.monotonic() < deadline:
                time.sleep(0.01)
            t_gap = time.perf_counter()
            print(f"4. server start {t_up - t0:6.2f} s; after it: run open {t_open - t_up:6.2f} s, queued slices "
                  f"acknowledged {t_flushed - t_up:6.2f} s, outage recorded {t_gap - t_up:6.2f} s "
                  f"(gap ranges {[(r.iteration_first, r.iteration_last, r.count) for g in run.gaps for r in g.ranges]})")
            run.close()


if __name__ == "__main__":
    main()
