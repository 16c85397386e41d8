"""Where finder jobs run: a small interface and a local process-pool implementation.

The scheduler only awaits ``executor.run(job)``; a distributed engine (e.g. a Dask client)
can implement :class:`FinderExecutor` later without touching the rest of the server.

The pool is created and its workers are started before the gRPC server starts (grpc and fork
do not mix), with the spawn start method, and with BLAS limited to one thread per worker so
that N workers on N cores do not fight.
"""

from __future__ import annotations

import asyncio
import contextlib
import multiprocessing
import os
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from typing import Iterator, Protocol, runtime_checkable

from .jobs import SurfaceJob, SurfaceOutcome, run_surface_job, warm_up
from .lifeline import watch_parent

__all__ = ["FinderExecutor", "ProcessPoolFinderExecutor", "BLAS_THREAD_VARIABLES"]

#: Environment variables that cap BLAS/OpenMP threads; set to 1 for worker processes.
BLAS_THREAD_VARIABLES = (
    "OMP_NUM_THREADS",
    "OPENBLAS_NUM_THREADS",
    "MKL_NUM_THREADS",
    "VECLIB_MAXIMUM_THREADS",
    "NUMEXPR_NUM_THREADS",
)


@runtime_checkable
class FinderExecutor(Protocol):
    """Runs finder jobs somewhere else than the event loop."""

    workers: int

    async def run(self, job: SurfaceJob) -> SurfaceOutcome:
        """Run one job; never raises for a failed find (that is an outcome)."""
        ...

    async def close(self) -> None:
        """Stop accepting jobs and release the workers."""
        ...


@contextlib.contextmanager
def _single_threaded_blas_env() -> Iterator[None]:
    # Spawned children copy the parent's environment at start: set the caps only while the
    # workers start, so the server process itself keeps whatever the user configured.
    saved = {name: os.environ.get(name) for name in BLAS_THREAD_VARIABLES}
    for name in BLAS_THREAD_VARIABLES:
        os.environ[name] = "1"
    try:
        yield
    finally:
        for name, value in saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value


class ProcessPoolFinderExecutor:
    """Finder jobs in local worker processes (spawn start method).

    Create with :meth:`start`, which launches every worker and waits until each has imported
    the numerics. A pool broken by a dying worker is replaced; the job that was running
    returns a REASON_WORKER_FAILED outcome. Workers exit by themselves when this process dies.
    """

    def __init__(self, workers: int, *, start_method: str = "spawn") -> None:
        if workers < 1:
            raise ValueError(f"workers: expected at least 1, got {workers}")
        self.workers = int(workers)
        self._start_method = start_method
        self._pool: ProcessPoolExecutor | None = None
        self.worker_pids: tuple[int, ...] = ()
        #: BLAS/OpenMP thread variables as a worker saw them (all "1").
        self.worker_thread_settings: dict[str, str | None] = {}
        self.pools_started = 0

    @classmethod
    async def start(cls, workers: int, *, start_method: str = "spawn") -> "ProcessPoolFinderExecutor":
        executor = cls(workers, start_method=start_method)
        await executor._launch()
        return executor

    async def _launch(self) -> None:
        context = multiprocessing.get_context(self._start_method)
        with _single_threaded_blas_env():
            # Each worker watches this process and exits when it dies (server/lifeline.py).
            pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=context, initializer=watch_parent,
                                       initargs=(os.getpid(),))
            # ProcessPoolExecutor starts workers on demand; one slow warm-up task per worker,
            # submitted together, makes it start all of them now.
            futures = [pool.submit(warm_up, 0.2) for _ in range(self.workers)]
        started = await asyncio.gather(*(asyncio.wrap_future(f) for f in futures))
        self._pool = pool
        # Every submit above spawned a process, but on a busy machine one worker may run both
        # warm-ups before the other is up: take the pids from the pool itself, not from who ran
        # the tasks (``_processes`` is private but has been stable since Python 3.2).
        spawned = getattr(pool, "_processes", None) or {}
        self.worker_pids = tuple(sorted(set(spawned) | {pid for pid, _ in started}))
        self.worker_thread_settings = started[0][1]
        self.pools_started += 1

    async def run(self, job: SurfaceJob) -> SurfaceOutcome:
        if self._pool is None:
            raise RuntimeError("executor is closed")
        pool = self._pool
        loop = asyncio.get_running_loop()
        try:
            return await loop.run_in_executor(pool, run_surface_job, job)
        except BrokenProcessPool as exc:
            if self._pool is pool:  # first job to notice replaces the pool
                self._pool = None
                pool.shutdown(wait=False, cancel_futures=True)
                await self._launch()
            return SurfaceOutcome.failed(job.label, f"worker process died while finding the surface ({exc})")

    async def close(self) -> None:
        pool, self._pool = self._pool, None
        if pool is not None:
            await asyncio.get_running_loop().run_in_executor(None, lambda: pool.shutdown(wait=True, cancel_futures=True))
