"""A finder executor for tests that need the server to fall behind: the real process pool, but
every job waits until the test releases it. No sleeps, no hoping the machine is slow enough."""

from __future__ import annotations

import asyncio
import threading
import time

from penumbra_server.server.executors import ProcessPoolFinderExecutor
from penumbra_server.server.jobs import SurfaceJob, SurfaceOutcome

__all__ = ["HeldExecutor"]


class HeldExecutor:
    """A :class:`~penumbra_server.server.executors.FinderExecutor` wrapping real worker
    processes; each job awaits an asyncio.Event of its own until :meth:`release` opens the gate.

    Make it with :meth:`start` (outside any event loop), hand it to ``BackgroundServer(...,
    executor=held)`` and call :meth:`close_pool` when the server has stopped. Thread-safe: the
    test thread releases jobs waiting on the server's loop.
    """

    def __init__(self, inner: ProcessPoolFinderExecutor) -> None:
        self.inner = inner
        self.workers = inner.workers
        self._lock = threading.Lock()
        self._held: list[tuple[asyncio.AbstractEventLoop, asyncio.Event]] = []
        self._open = False
        self.arrived = 0

    @classmethod
    def start(cls, workers: int = 1) -> "HeldExecutor":
        return cls(asyncio.run(ProcessPoolFinderExecutor.start(workers)))

    async def run(self, job: SurfaceJob) -> SurfaceOutcome:
        gate = asyncio.Event()
        with self._lock:
            self.arrived += 1
            if self._open:
                gate.set()
            else:
                self._held.append((asyncio.get_running_loop(), gate))
        await gate.wait()
        return await self.inner.run(job)

    @property
    def held(self) -> int:
        """Jobs waiting for their release."""
        with self._lock:
            return len(self._held)

    def wait_until_held(self, count: int = 1, timeout_s: float = 120.0) -> None:
        """Block until ``count`` jobs wait; fails loudly after ``timeout_s``."""
        deadline = time.monotonic() + timeout_s
        while self.held < count:
            if time.monotonic() > deadline:
                raise AssertionError(f"only {self.held} of {count} finder jobs reached the executor in {timeout_s} s")
            time.sleep(0.01)

    def release(self) -> None:
        """Let every held job run, and every later one at once."""
        with self._lock:
            self._open = True
            held, self._held = self._held, []
        for loop, gate in held:
            loop.call_soon_threadsafe(gate.set)

    async def close(self) -> None:
        """The server does not own this executor (it never calls this); see :meth:`close_pool`."""
        await self.inner.close()

    def close_pool(self) -> None:
        asyncio.run(self.inner.close())
