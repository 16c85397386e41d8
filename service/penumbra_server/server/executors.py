"""Where finder jobs run: a small interface, a local process-pool implementation, and the
choice of engine (:func:`start_executor`).

The scheduler only awaits ``executor.run(job)``. Two engines implement :class:`FinderExecutor`:
the process pool here, and a Dask cluster (server/dask_executor.py, which imports
``distributed``; it is imported only when that engine is chosen, so the server runs without
Dask installed).

The pool is created and its workers are started before the gRPC server starts (grpc and fork
do not mix), with the spawn start method, and with BLAS limited to one thread per worker so
that N workers on N cores do not fight.
"""

from __future__ import annotations

import asyncio
import contextlib
import multiprocessing
import os
import time
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from typing import Callable, Iterator, Protocol, runtime_checkable

from .jobs import SurfaceJob, SurfaceOutcome, run_surface_job, warm_up
from .lifeline import watch_parent

__all__ = ["FinderExecutor", "ProcessPoolFinderExecutor", "BLAS_THREAD_VARIABLES", "ENGINES", "EngineSettings",
           "start_executor", "single_threaded_blas_env"]

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
def single_threaded_blas_env() -> Iterator[None]:
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


#: Seconds a starting worker waits for the others before the pool is given up as broken.
WORKER_START_TIMEOUT_S = 300.0


def _start_worker(parent_pid: int, all_started) -> None:
    """Pool initializer: exit with the server (server/lifeline.py), import the numerics, wait
    until every worker of the pool has done the same."""
    watch_parent(parent_pid)
    warm_up()
    all_started.wait(WORKER_START_TIMEOUT_S)


class ProcessPoolFinderExecutor:
    """Finder jobs in local worker processes (spawn start method).

    Create with :meth:`start`, which launches every worker and waits until each has imported
    the numerics. A pool broken by a dying worker is replaced; the job that was running
    returns a REASON_WORKER_FAILED outcome. Workers exit by themselves when this process dies.
    ``job_function``: what a worker runs (default :func:`run_surface_job`; tests pass a slow or
    failing one); if it raises, the job's outcome says so.
    """

    def __init__(self, workers: int, *, start_method: str = "spawn",
                 job_function: Callable[[SurfaceJob], SurfaceOutcome] = run_surface_job) -> None:
        if workers < 1:
            raise ValueError(f"workers: expected at least 1, got {workers}")
        self.workers = int(workers)
        self._start_method = start_method
        self._job_function = job_function
        self._pool: ProcessPoolExecutor | None = None
        self.worker_pids: tuple[int, ...] = ()
        #: BLAS/OpenMP thread variables as a worker saw them (all "1").
        self.worker_thread_settings: dict[str, str | None] = {}
        self.pools_started = 0

    @classmethod
    async def start(cls, workers: int, *, start_method: str = "spawn",
                    job_function: Callable[[SurfaceJob], SurfaceOutcome] = run_surface_job,
                    ) -> "ProcessPoolFinderExecutor":
        executor = cls(workers, start_method=start_method, job_function=job_function)
        await executor._launch()
        return executor

    async def _launch(self) -> None:
        context = multiprocessing.get_context(self._start_method)
        # Every worker imports the numerics in its initializer, then waits for the others: once
        # any warm-up task has run, all workers are up (however slowly a loaded machine starts them).
        all_started = context.Barrier(self.workers)
        with single_threaded_blas_env():
            pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=context, initializer=_start_worker,
                                       initargs=(os.getpid(), all_started))
            # ProcessPoolExecutor starts a worker per submitted task while none is idle: one
            # warm-up task per worker, submitted together, starts all of them now.
            futures = [pool.submit(warm_up) for _ in range(self.workers)]
        started = await asyncio.gather(*(asyncio.wrap_future(f) for f in futures))
        self._pool = pool
        self.worker_pids = tuple(sorted(pool._processes))  # every worker, whichever ran the warm-ups
        self.worker_thread_settings = started[0][1]
        self.pools_started += 1

    async def run(self, job: SurfaceJob) -> SurfaceOutcome:
        if self._pool is None:
            raise RuntimeError("executor is closed")
        pool = self._pool
        loop = asyncio.get_running_loop()
        started = time.perf_counter()
        try:
            return await loop.run_in_executor(pool, self._job_function, job)
        except BrokenProcessPool as exc:
            if self._pool is pool:  # first job to notice replaces the pool
                self._pool = None
                pool.shutdown(wait=False, cancel_futures=True)
                await self._launch()
            return SurfaceOutcome.failed(job.label, f"worker process died while finding the surface ({exc})")
        except Exception as exc:  # the job function raised (run_surface_job never does) or did not pickle
            return SurfaceOutcome.failed(job.label, f"worker raised {type(exc).__name__}: {exc}",
                                         wall_time_s=time.perf_counter() - started)

    async def close(self) -> None:
        pool, self._pool = self._pool, None
        if pool is not None:
            await asyncio.get_running_loop().run_in_executor(None, lambda: pool.shutdown(wait=True, cancel_futures=True))


#: The engines :func:`start_executor` knows.
ENGINES = ("process", "dask")


@dataclass(frozen=True)
class EngineSettings:
    """Which engine runs the finder jobs, and its settings.

    Attributes:
        engine: "process" (local worker processes) or "dask" (a Dask cluster).
        workers: worker processes of the process engine.
        dask_scheduler: address of a running Dask scheduler (e.g. "tcp://node17:8786").
        dask_local_workers: instead, start a LocalCluster of this many worker processes.
        task_retries: Dask reruns of a task that raised (``retries=`` of submit).
        resubmissions: jobs submitted again after their Dask worker was lost.
    """

    engine: str = "process"
    workers: int = 2
    dask_scheduler: str | None = None
    dask_local_workers: int = 0
    task_retries: int = 1
    resubmissions: int = 2

    def __post_init__(self) -> None:
        if self.engine not in ENGINES:
            raise ValueError(f"engine: expected one of {', '.join(ENGINES)}, got {self.engine!r}")

    def describe(self) -> str:
        """A few words for the server's start-up line."""
        def processes(n: int) -> str:
            return f"{n} worker process" + ("" if n == 1 else "es")

        if self.engine == "process":
            return processes(self.workers)
        if self.dask_scheduler:
            return f"dask scheduler {self.dask_scheduler}"
        return f"dask local cluster of {processes(self.dask_local_workers)}"


async def start_executor(settings: EngineSettings, *,
                         job_function: Callable[[SurfaceJob], SurfaceOutcome] = run_surface_job) -> FinderExecutor:
    """Start the executor of ``settings`` (its workers running and warmed up).

    Raises:
        RuntimeError: the Dask engine is chosen but ``distributed`` is not installed, or its
            workers cannot run the finder.
        OSError: the Dask scheduler could not be reached.
    """
    if settings.engine == "process":
        return await ProcessPoolFinderExecutor.start(settings.workers, job_function=job_function)
    try:
        from .dask_executor import DaskFinderExecutor  # imports distributed: only for this engine
    except ImportError as err:
        raise RuntimeError(f"engine dask: the 'distributed' package is not installed ({err}); "
                           "install it with pip install 'penumbra-horizons[dask]'") from None
    return await DaskFinderExecutor.start(scheduler_address=settings.dask_scheduler,
                                          local_workers=settings.dask_local_workers,
                                          task_retries=settings.task_retries, resubmissions=settings.resubmissions,
                                          job_function=job_function)
