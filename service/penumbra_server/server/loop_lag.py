"""A probe of the event loop's responsiveness: how late a short periodic sleep wakes up.

Every request the server answers on its loop waits behind whatever runs there; a probe that
asks to wake every ``period_s`` and measures how late it woke sees the longest stall any
request saw (to the probe's resolution). Used by the load test and the benchmark notes; cheap
enough (one wake-up per period) to run in a live server.
"""

from __future__ import annotations

import asyncio
import time

__all__ = ["LoopLagProbe"]


class LoopLagProbe:
    """Measures the event loop's stalls: ``max_lag_s`` (longest lateness seen), ``samples``.

    ``await probe.start()`` on the loop to measure (a task); :meth:`reset` starts a new window.
    """

    def __init__(self, period_s: float = 0.005) -> None:
        self.period_s = float(period_s)
        self.max_lag_s = 0.0
        self.samples = 0
        self._task: asyncio.Task | None = None

    async def start(self) -> None:
        if self._task is None:
            self._task = asyncio.get_running_loop().create_task(self._run())

    async def stop(self) -> None:
        if self._task is not None:
            self._task.cancel()
            self._task = None

    def reset(self) -> None:
        self.max_lag_s = 0.0
        self.samples = 0

    async def _run(self) -> None:
        while True:
            before = time.perf_counter()
            await asyncio.sleep(self.period_s)
            lag = time.perf_counter() - before - self.period_s
            self.samples += 1
            if lag > self.max_lag_s:
                self.max_lag_s = lag
