"""A finder executor for tests that decide which job runs when: the real process pool, but every
job waits at a gate of its own until the test opens that job's gate (by surface label and
iteration). It keeps a log of arrivals and completions in the order they happened, so a test
can prove what started before what finished. No sleeps, no hoping the machine is slow enough."""

from __future__ import annotations

import asyncio
import threading
import time

from penumbra_server.server.executors import ProcessPoolFinderExecutor
from penumbra_server.server.jobs import SurfaceJob, SurfaceOutcome

__all__ = ["GatedExecutor"]


class GatedExecutor:
    """A :class:`~penumbra_server.server.executors.FinderExecutor` over real worker processes.

    ``log`` holds ("arrived" | "done", label, iteration, seeded) tuples in order (``seeded``:
    whether the job carried a seed surface; a measurement job never does). Thread-safe: the test
    thread opens gates of jobs waiting on the server's loop. Make it with :meth:`start` outside any event loop and call
    :meth:`close_pool` after the server stopped.
    """

    def __init__(self, inner: ProcessPoolFinderExecutor) -> None:
        self.inner = inner
        self.workers = inner.workers
        self._lock = threading.Lock()
        self._gates: dict[tuple[str, int], tuple[asyncio.AbstractEventLoop, asyncio.Event]] = {}
        self._opened: set[tuple[str, int]] = set()
        self._all_open = False
        self.log: list[tuple[str, str, int, bool]] = []

    @classmethod
    def start(cls, workers: int = 1) -> "GatedExecutor":
        return cls(asyncio.run(ProcessPoolFinderExecutor.start(workers)))

    async def run(self, job: SurfaceJob) -> SurfaceOutcome:
        key = (job.label, int(job.data.iteration))
        gate = asyncio.Event()
        with self._lock:
            self.log.append(("arrived", key[0], key[1], getattr(job, "seed", None) is not None))
            if self._all_open or key in self._opened:
                gate.set()
            else:
                self._gates[key] = (asyncio.get_running_loop(), gate)
        await gate.wait()
        outcome = await self.inner.run(job)
        with self._lock:
            self.log.append(("done", key[0], key[1], getattr(job, "seed", None) is not None))
        return outcome

    def entries(self, what: str) -> list[tuple[str, int]]:
        """(label, iteration) of the jobs that ``what`` ("arrived" or "done"), in order."""
        with self._lock:
            return [(label, iteration) for kind, label, iteration, _ in self.log if kind == what]

    def seeded(self, label: str, iteration: int) -> bool:
        """Whether the job of ``label`` in ``iteration`` carried a seed surface."""
        with self._lock:
            return next(s for kind, lab, it, s in self.log if kind == "arrived" and (lab, it) == (label, iteration))

    def wait_for(self, what: str, label: str, iteration: int, timeout_s: float = 120.0) -> None:
        """Block until the job of ``label`` in ``iteration`` ``what`` ("arrived" or "done");
        fails loudly after ``timeout_s``."""
        deadline = time.monotonic() + timeout_s
        while (label, iteration) not in self.entries(what):
            if time.monotonic() > deadline:
                raise AssertionError(f"job {label!r} of iteration {iteration} not {what} within {timeout_s} s; "
                                     f"log: {self.log}")
            time.sleep(0.01)

    def open(self, label: str, iteration: int) -> None:
        """Let the job of ``label`` in ``iteration`` run (now, or when it arrives)."""
        key = (label, iteration)
        with self._lock:
            self._opened.add(key)
            held = self._gates.pop(key, None)
        if held is not None:
            held[0].call_soon_threadsafe(held[1].set)

    def open_all(self) -> None:
        """Let every held job run, and every later one at once."""
        with self._lock:
            self._all_open = True
            held, self._gates = list(self._gates.values()), {}
        for loop, gate in held:
            loop.call_soon_threadsafe(gate.set)

    async def close(self) -> None:
        """The server does not own this executor (it never calls this); see :meth:`close_pool`."""

    def close_pool(self) -> None:
        asyncio.run(self.inner.close())
