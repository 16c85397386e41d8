"""A Penumbra server in its own process for the load test, its finder jobs metered by the test.

    python load_server.py ARCHIVE_DIR MAX_QUEUED_BYTES

Prints one JSON line {"address", "pid"} once serving; then reads commands on stdin, one a line:
``allow N`` lets N more finder jobs run (each job waits for an allowance: the test sets the
server's pace exactly), ``stats`` prints {"max_stall_ms", "probe_samples", "jobs_started",
"jobs_waiting"} (the event loop's longest stall since the last ``reset``; loop_lag.py),
``reset`` starts a new stall window, ``quit`` stops the server.
"""

from __future__ import annotations

import asyncio
import json
import os
import sys
import threading

from penumbra_server.server import BackgroundServer, ServerOptions
from penumbra_server.server.executors import ProcessPoolFinderExecutor
from penumbra_server.server.jobs import SurfaceJob, SurfaceOutcome
from penumbra_server.server.loop_lag import LoopLagProbe


class MeteredExecutor:
    """Real worker processes; each job waits for an allowance granted by :meth:`allow`."""

    def __init__(self, inner: ProcessPoolFinderExecutor) -> None:
        self.inner = inner
        self.workers = inner.workers
        self._lock = threading.Lock()
        self._allowance = 0
        self._waiting: list[tuple[asyncio.AbstractEventLoop, asyncio.Event]] = []
        self.started = 0

    async def run(self, job: SurfaceJob) -> SurfaceOutcome:
        gate = asyncio.Event()
        with self._lock:
            if self._allowance > 0:
                self._allowance -= 1
                gate.set()
            else:
                self._waiting.append((asyncio.get_running_loop(), gate))
        await gate.wait()
        with self._lock:
            self.started += 1
        return await self.inner.run(job)

    def allow(self, count: int) -> None:
        with self._lock:
            self._allowance += count
            go = []
            while self._allowance > 0 and self._waiting:
                self._allowance -= 1
                go.append(self._waiting.pop(0))
        for loop, gate in go:
            loop.call_soon_threadsafe(gate.set)

    @property
    def waiting(self) -> int:
        with self._lock:
            return len(self._waiting)

    async def close(self) -> None:
        await self.inner.close()


def main() -> None:
    archive, budget = sys.argv[1], int(sys.argv[2])
    executor = MeteredExecutor(asyncio.run(ProcessPoolFinderExecutor.start(1)))
    probe = LoopLagProbe()
    options = ServerOptions(workers=1, max_queued_bytes=budget)
    with BackgroundServer("127.0.0.1:0", archive_root=archive, workers=1, options=options, executor=executor) as bg:
        bg.call(probe.start)
        print(json.dumps({"address": bg.address, "pid": os.getpid()}), flush=True)
        for line in sys.stdin:
            words = line.split()
            if not words:
                continue
            if words[0] == "allow":
                executor.allow(int(words[1]))
            elif words[0] == "reset":
                probe.reset()
            elif words[0] == "stats":
                print(json.dumps({"max_stall_ms": 1e3 * probe.max_lag_s, "probe_samples": probe.samples,
                                  "jobs_started": executor.started, "jobs_waiting": executor.waiting}), flush=True)
            elif words[0] == "quit":
                break
        executor.allow(1 << 30)
    asyncio.run(executor.inner.close())


if __name__ == "__main__":
    main()
