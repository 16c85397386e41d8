"""Finder jobs on a Dask cluster (``dask.distributed``): the engine beyond one machine.

:class:`DaskFinderExecutor` implements :class:`~penumbra_server.server.executors.FinderExecutor`
with a ``distributed.Client`` running on the server's event loop (``asynchronous=True``). It
either connects to a scheduler started elsewhere (``dask scheduler`` / ``dask worker`` on other
nodes, deploy/penumbra-dask.sbatch) or starts a local cluster of worker processes on this
machine, its scheduler in a process of its own (server/dask_local.py). This module imports ``distributed`` at the top: import it only when that engine is
configured (:func:`~penumbra_server.server.executors.start_executor` does).

Each job goes to the cluster as the task's argument (a cropped sub-box, small), not scattered
first: the scheduler then holds the whole task, so a task whose worker dies is simply run again
elsewhere, which it could not be if its input had lived only in the dead worker's memory.

Losing a worker mid-task: the scheduler itself reruns the task on another worker (up to its
``distributed.scheduler.allowed-failures``); if it gives up (``KilledWorker``) or forgets the task
(the client lost its scheduler connection), this executor submits the job again, at most
``resubmissions`` times. ``task_retries`` is Dask's ``retries=``: reruns of a task that raised.
Whatever happens, :meth:`DaskFinderExecutor.run` returns an outcome (REASON_WORKER_FAILED with
the reasons on final failure), never an exception, except when the awaiting task is cancelled.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import contextlib
import logging
import os
import re
import time
import uuid
from typing import Callable

import dask
from distributed import Client, SpecCluster
from distributed.comm.core import CommClosedError
from distributed.scheduler import KilledWorker

from .dask_local import start_local_cluster
from .jobs import SurfaceJob, SurfaceOutcome, run_surface_job, warm_up

__all__ = ["DaskFinderExecutor", "LOST_WORKER_ERRORS", "MALLOC_VARIABLES"]

log = logging.getLogger("penumbra.server.dask")

#: Errors of a Dask future that mean "the work was lost, not done": submit it again. KilledWorker:
#: the scheduler gave up after workers died running it; concurrent.futures.CancelledError (not
#: asyncio's): the scheduler forgot the task; CommClosedError: the connection dropped meanwhile.
LOST_WORKER_ERRORS = (KilledWorker, concurrent.futures.CancelledError, CommClosedError)


#: Environment variables that set glibc malloc thresholds (any of them pins the mmap threshold).
MALLOC_VARIABLES = ("MALLOC_TRIM_THRESHOLD_", "MALLOC_MMAP_THRESHOLD_")



def worker_malloc_environment() -> dict[str, str | None]:
    """On a worker: its glibc malloc variables (:data:`MALLOC_VARIABLES`), None where unset."""
    return {name: os.environ.get(name) for name in MALLOC_VARIABLES}


def _task_key(label: str) -> str:
    safe = re.sub(r"[^A-Za-z0-9_.-]", "_", label)[:40]
    return f"penumbra-find-{safe}-{uuid.uuid4().hex}"


class DaskFinderExecutor:
    """Finder jobs on a Dask cluster. Create with :meth:`start`; :meth:`close` when done.

    Attributes:
        workers: workers connected when the executor started (a cluster may grow or shrink).
        scheduler_address: the scheduler's address (for a local cluster, a loopback one).
        scheduler_pid: the local cluster's scheduler process (None for a scheduler started elsewhere).
        worker_pids: worker process ids at start ({worker address: pid}).
        worker_thread_settings: BLAS/OpenMP thread variables as one worker saw them.
        worker_malloc_settings: glibc malloc variables (:data:`MALLOC_VARIABLES`) as one worker saw
            them (None: unset, glibc's adaptive defaults).
        resubmitted: jobs submitted again by this executor after a lost-worker error.
    """

    def __init__(self, client: Client, cluster: SpecCluster | None, *, task_retries: int, resubmissions: int,
                 job_function: Callable[[SurfaceJob], SurfaceOutcome]) -> None:
        if task_retries < 0 or resubmissions < 0:
            raise ValueError(f"task_retries, resubmissions: expected >= 0, got {task_retries}, {resubmissions}")
        self._client: Client | None = client
        self._cluster = cluster
        self.task_retries = int(task_retries)
        self.resubmissions = int(resubmissions)
        self._job_function = job_function
        self.scheduler_address: str = client.scheduler.address
        process = getattr(getattr(cluster, "scheduler", None), "process", None)
        self.scheduler_pid: int | None = process.pid if process is not None else None
        self.workers = 0
        self.worker_pids: dict[str, int] = {}
        self.worker_thread_settings: dict[str, str | None] = {}
        self.worker_malloc_settings: dict[str, str | None] = {}
        self.resubmitted = 0

    @classmethod
    async def start(cls, *, scheduler_address: str | None = None, local_workers: int = 0, task_retries: int = 1,
                    resubmissions: int = 2, connect_timeout_s: float = 30.0,
                    job_function: Callable[[SurfaceJob], SurfaceOutcome] = run_surface_job) -> "DaskFinderExecutor":
        """Connect to ``scheduler_address`` or start a local cluster of ``local_workers`` processes
        (one thread each, BLAS single-threaded; server/dask_local.py); import the numerics on every worker.

        ``job_function``: what a task runs (default :func:`run_surface_job`; tests pass a
        deliberately slow or failing one). It must be importable on the workers.

        Raises:
            ValueError: neither or both of ``scheduler_address`` and ``local_workers``.
            OSError: the scheduler could not be reached within ``connect_timeout_s``.
            RuntimeError: the workers could not import the numerics (penumbra-horizons missing
                or a different version there).
        """
        if (scheduler_address is None) == (local_workers < 1):
            raise ValueError("dask engine: give either a scheduler address or a number of local workers "
                             f"(got scheduler_address={scheduler_address!r}, local_workers={local_workers})")
        # Inputs travel inside the task on purpose (module docstring): no warning about it.
        dask.config.set({"distributed.admin.large-graph-warning-threshold": "1GiB"})
        cluster = None
        try:
            if scheduler_address is None:
                cluster = await start_local_cluster(local_workers)
                client = await Client(cluster, asynchronous=True)
            else:
                client = await Client(scheduler_address, asynchronous=True, timeout=connect_timeout_s)
        except BaseException:
            if cluster is not None:
                await cluster.close()
            raise
        executor = cls(client, cluster, task_retries=task_retries, resubmissions=resubmissions,
                       job_function=job_function)
        try:
            await executor._warm_up()
        except BaseException:
            await executor.close()
            raise
        return executor

    async def _warm_up(self) -> None:
        try:
            started = await self._client.run(warm_up)
        except Exception as exc:
            raise RuntimeError(f"dask workers at {self.scheduler_address} cannot run the finder "
                               f"(is penumbra-horizons installed there?): {type(exc).__name__}: {exc}") from exc
        self.workers = len(started)
        self.worker_pids = {address: pid for address, (pid, _) in started.items()}
        if started:
            self.worker_thread_settings = next(iter(started.values()))[1]
            malloc = await self._client.run(worker_malloc_environment)
            self.worker_malloc_settings = next(iter(malloc.values()))
            pinned = sorted({address for address, names in malloc.items() if names.get("MALLOC_TRIM_THRESHOLD_")})
            if pinned:
                log.warning("dask workers %s run with MALLOC_TRIM_THRESHOLD_=%s (Dask's nanny default): glibc then "
                            "maps every array of 128 KiB or more afresh and finder jobs take up to ~1.8 times as long; "
                            "unset it for the workers (distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_: "
                            "null in their Dask configuration)", ", ".join(pinned),
                            malloc[pinned[0]]["MALLOC_TRIM_THRESHOLD_"])
        else:
            log.warning("dask scheduler %s has no workers yet: jobs wait until some connect", self.scheduler_address)

    async def run(self, job: SurfaceJob) -> SurfaceOutcome:
        """Run one job on the cluster; an outcome always (see the module docstring)."""
        client = self._client
        if client is None:
            raise RuntimeError("executor is closed")
        started = time.perf_counter()
        lost: list[str] = []
        for attempt in range(1 + self.resubmissions):
            if attempt:
                self.resubmitted += 1
                log.warning("surface %r: submitting again after a lost worker (%s)", job.label, lost[-1])
            try:
                future = client.submit(self._job_function, job, key=_task_key(job.label), pure=False,
                                       retries=self.task_retries)
            except Exception as exc:  # the client is closing or cannot serialise the job
                return SurfaceOutcome.failed(job.label, f"could not submit to dask: {type(exc).__name__}: {exc}",
                                             wall_time_s=time.perf_counter() - started)
            try:
                return await future
            except asyncio.CancelledError:
                with contextlib.suppress(Exception):
                    await client.cancel([future])
                raise
            except LOST_WORKER_ERRORS as exc:
                lost.append(f"{type(exc).__name__}: {exc}")
            except Exception as exc:  # the task raised on every one of its retries
                return SurfaceOutcome.failed(
                    job.label, f"dask task raised {type(exc).__name__}: {exc} (tried {1 + self.task_retries} times)",
                    wall_time_s=time.perf_counter() - started)
            finally:
                future.release()
            if self._client is None:
                break
        return SurfaceOutcome.failed(
            job.label, f"dask worker lost while finding the surface, {len(lost)} attempt(s): {'; '.join(lost)}",
            wall_time_s=time.perf_counter() - started)

    async def close(self) -> None:
        """Disconnect; a local cluster's workers and scheduler stop (remote workers keep running)."""
        client, self._client = self._client, None
        cluster, self._cluster = self._cluster, None
        if client is not None:
            with contextlib.suppress(Exception):
                await client.close()
        if cluster is not None:
            await cluster.close()
