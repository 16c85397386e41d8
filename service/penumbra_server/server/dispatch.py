"""Fair sharing of one finder executor among the runs of a server.

Each run hands its finder jobs to its own :class:`RunDispatch` (the run's view of the executor);
the :class:`FairDispatcher` keeps them in one queue per run and passes at most ``slots`` jobs to
the executor at once (default: its worker count). A free slot goes to the runs in turn
(round-robin over the runs with jobs waiting, one job per turn), so a run with a long backlog,
or with several slices in flight, never holds back another run's job by more than one job per
run: the executor's own queue is first come, first served and would.

Within a run the turn goes to the job of its oldest slice (a later slice's searches that need
the earlier slices' outcomes wait for every search of those), and within a slice to a search
that another waits for (``SurfaceJob.leads``: the surface the inner common MOTS is searched
inside) before the rest; otherwise first come, first served.

Hand-over: when a ``leads`` job ends, its slot is kept for up to :data:`HANDOVER_TURNS` turns of
the event loop, until a job of the same run and slice is waiting (the found surface's measurement,
queued as soon as its outcome is delivered): that job of the older slice then takes the slot, not
a later slice's job that happened to be queued already. Counted in loop turns, not seconds.

Everything here runs on the server's event loop thread.
"""

from __future__ import annotations

import asyncio
from collections import deque

from .executors import FinderExecutor
from .jobs import SurfaceJob, SurfaceOutcome

__all__ = ["FairDispatcher", "RunDispatch", "HANDOVER_TURNS"]

#: Event-loop turns a finished ``leads`` job keeps its slot for a follow-up of its slice (module
#: docstring); the measurement job arrives within a handful.
HANDOVER_TURNS = 20


class FairDispatcher:
    """Round-robin among runs in front of ``executor`` (module docstring).

    Attributes:
        executor: where the jobs run.
        slots: jobs at the executor at once (at least 1).
        dispatched: jobs handed to the executor so far, in order, as (run id, job label,
            iteration) — what the jobs' owners can be checked against.
    """

    def __init__(self, executor: FinderExecutor, *, slots: int | None = None) -> None:
        self.executor = executor
        self.slots = int(slots if slots is not None else max(1, getattr(executor, "workers", 1)))
        if self.slots < 1:
            raise ValueError(f"slots: expected at least 1, got {self.slots}")
        self._waiting: dict[str, list[tuple[tuple, SurfaceJob, asyncio.Future]]] = {}
        self._arrivals = 0
        #: Runs with jobs waiting, in the order they get their next turn.
        self._turns: deque[str] = deque()
        self._running: set[asyncio.Task] = set()
        self.dispatched: list[tuple[str, str, int]] = []

    @property
    def workers(self) -> int:
        return self.executor.workers

    def for_run(self, run_id: str) -> "RunDispatch":
        """The executor as one run sees it."""
        return RunDispatch(self, run_id)

    def waiting(self, run_id: str | None = None) -> int:
        """Jobs not yet at the executor (of ``run_id``, or of all runs)."""
        if run_id is not None:
            return sum(1 for _, _, future in self._waiting.get(run_id, ()) if not future.done())
        return sum(self.waiting(r) for r in self._waiting)

    @property
    def running(self) -> int:
        """Jobs at the executor now."""
        return len(self._running)

    async def run(self, run_id: str, job: SurfaceJob) -> SurfaceOutcome:
        """Queue ``job`` for ``run_id`` and wait for its outcome (cancelling the wait withdraws a
        job that has not reached the executor yet)."""
        future = asyncio.get_running_loop().create_future()
        queue = self._waiting.setdefault(run_id, [])
        if not queue:
            self._turns.append(run_id)
        self._arrivals += 1
        order = (int(job.data.iteration), 0 if getattr(job, "leads", False) else 1, self._arrivals)
        queue.append((order, job, future))
        self._dispatch()
        return await future

    def _dispatch(self) -> None:
        while len(self._running) < self.slots and self._turns:
            run_id = self._turns.popleft()
            queue = self._waiting[run_id]
            first = min(range(len(queue)), key=lambda index: queue[index][0])
            _, job, future = queue.pop(first)
            if queue:
                self._turns.append(run_id)  # its next job waits for the other runs' turns
            else:
                del self._waiting[run_id]
            if future.done():  # withdrawn (the run stopped) before its turn
                continue
            self.dispatched.append((run_id, job.label, int(job.data.iteration)))
            task = asyncio.ensure_future(self._execute(run_id, job, future))
            self._running.add(task)
            task.add_done_callback(self._finished)

    async def _execute(self, run_id: str, job: SurfaceJob, future: asyncio.Future) -> None:
        try:
            outcome = await self.executor.run(job)
        except asyncio.CancelledError:
            if not future.done():
                future.cancel()
            raise
        except Exception as exc:  # the executor's own failure: the run's search sees it
            if not future.done():
                future.set_exception(exc)
            return
        if not future.done():
            future.set_result(outcome)
        if getattr(job, "leads", False):
            iteration = int(job.data.iteration)
            for _ in range(HANDOVER_TURNS):
                if any(int(queued.data.iteration) == iteration and not waiter.done()
                       for _, queued, waiter in self._waiting.get(run_id, ())):
                    break
                await asyncio.sleep(0)

    def _finished(self, task: asyncio.Task) -> None:
        self._running.discard(task)
        self._dispatch()

    async def close(self) -> None:
        """Withdraw waiting jobs and stop waiting for running ones (the executor is not closed)."""
        for queue in self._waiting.values():
            for _, _, future in queue:
                future.cancel()
        self._waiting.clear()
        self._turns.clear()
        running = list(self._running)
        for task in running:
            task.cancel()
        await asyncio.gather(*running, return_exceptions=True)


class RunDispatch:
    """One run's view of the shared executor: a :class:`FinderExecutor` whose jobs wait for the
    run's turn at the :class:`FairDispatcher`."""

    def __init__(self, dispatcher: FairDispatcher, run_id: str) -> None:
        self.dispatcher = dispatcher
        self.run_id = run_id

    @property
    def workers(self) -> int:
        return self.dispatcher.workers

    async def run(self, job: SurfaceJob) -> SurfaceOutcome:
        return await self.dispatcher.run(self.run_id, job)

    async def close(self) -> None:
        """The shared executor outlives every run: nothing to release."""
