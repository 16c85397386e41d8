"""The Dask engine's local cluster: the scheduler in a process of its own, the workers' nannies
in the server process, one single-threaded worker process each.

Why not ``distributed.LocalCluster``: it runs the scheduler on the event loop of the process that
starts it, here the server's. Every job's input (tens of MB for the demo's common horizon) then
crosses the server's event loop three times (client to scheduler, into the scheduler, scheduler
to worker) and the scheduler's bookkeeping shares the loop and the GIL with gRPC ingest and the
archive thread; measured in the service benchmark, a job took ~250 ms (median) from submission
to its start on a worker, against ~175 ms with the scheduler in its own process (DEVELOPERS.md,
"The Dask engine keeps up with the process pool"). ``distributed``'s own ``SubprocessScheduler``
reads the scheduler's stderr only when it fails to start (a pipe that fills up would stop it)
and does not end with its parent; :class:`SchedulerProcess` runs this module instead, which
watches its parent (server/lifeline.py) and logs warnings only, to the server's stderr.

Worker settings (both measured, same section of DEVELOPERS.md): glibc's adaptive malloc
thresholds (Dask's nanny would set MALLOC_TRIM_THRESHOLD_=65536: every array of 128 KiB or more
is then mapped afresh, and the finder's jobs took ~1.8 times the CPU) and no statistical
profiler (it samples the task's stack every 10 ms for the dashboard, which is off: ~7 % more CPU
per job).

Run as ``python -m penumbra_server.server.dask_local PARENT_PID SCHEDULER_KWARGS_JSON``: the
scheduler process (started by :class:`SchedulerProcess`, not by hand).
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import os
import sys
import tempfile
import uuid
from pathlib import Path

import dask
from distributed import Nanny, Scheduler, SpecCluster
from distributed.deploy.spec import ProcessInterface

from .executors import BLAS_THREAD_VARIABLES, single_threaded_blas_env
from .lifeline import watch_parent

__all__ = ["GLIBC_MALLOC_DEFAULTS", "SchedulerProcess", "start_local_cluster"]

#: Nanny environment entries to drop (None unsets one in ``distributed.nanny.pre-spawn-environ``):
#: Dask's MALLOC_TRIM_THRESHOLD_ switches off glibc's adaptive mmap threshold (module docstring).
GLIBC_MALLOC_DEFAULTS = {"MALLOC_TRIM_THRESHOLD_": None}

#: Seconds the scheduler process has to write its address.
SCHEDULER_START_TIMEOUT_S = 120.0


class SchedulerProcess(ProcessInterface):
    """A Dask scheduler in a child process of this one, ended with it (a SpecCluster's scheduler).

    Attributes:
        address: the scheduler's address once started.
        process: the child process (``pid`` for tests and diagnostics).
    """

    def __init__(self, scheduler_kwargs: dict, timeout_s: float = SCHEDULER_START_TIMEOUT_S) -> None:
        self.scheduler_kwargs = dict(scheduler_kwargs)
        self.timeout_s = float(timeout_s)
        self.process: asyncio.subprocess.Process | None = None
        super().__init__()

    async def start(self) -> None:
        scheduler_file = Path(tempfile.gettempdir()) / f"penumbra-dask-scheduler-{uuid.uuid4().hex}.json"
        kwargs = {**self.scheduler_kwargs, "scheduler_file": str(scheduler_file)}
        env = {**os.environ,
               # The scheduler unpickles each task (its function and arguments) and sees this
               # process's Dask configuration, including what was set in code: this process's
               # import path and configuration, as multiprocessing's spawn gives the workers.
               "PYTHONPATH": os.pathsep.join(path for path in sys.path if path),
               "DASK_INTERNAL_INHERIT_CONFIG": dask.config.serialize(dask.config.global_config),
               "DASK_LOGGING__DISTRIBUTED": "warning"}
        self.process = await asyncio.create_subprocess_exec(
            sys.executable, "-m", __name__, str(os.getpid()), json.dumps(kwargs), env=env, stdin=asyncio.subprocess.DEVNULL)
        try:
            self.address = await self._wait_for_address(scheduler_file)
        except BaseException:
            await self.close()
            raise
        finally:
            with contextlib.suppress(OSError):
                scheduler_file.unlink()
        await super().start()

    async def _wait_for_address(self, scheduler_file: Path) -> str:
        loop = asyncio.get_running_loop()
        deadline = loop.time() + self.timeout_s
        while self.process.returncode is None:
            with contextlib.suppress(OSError, ValueError, KeyError):
                return json.loads(scheduler_file.read_text())["address"]  # written whole once listening
            if loop.time() > deadline:
                raise RuntimeError(f"dask scheduler process {self.process.pid} did not start within {self.timeout_s} s")
            await asyncio.sleep(0.05)
        raise RuntimeError(f"dask scheduler process exited with status {self.process.returncode} while starting "
                           "(its error is on the server's stderr)")

    async def close(self) -> None:
        process, self.process = self.process, None
        if process is not None and process.returncode is None:
            process.kill()  # the cluster has told it to close already; nothing of it needs saving
            await process.wait()
        await super().close()


async def start_local_cluster(workers: int) -> SpecCluster:
    """A cluster of ``workers`` single-threaded worker processes on loopback (module docstring),
    their scheduler in a child process, no dashboard."""
    blas = {name: "1" for name in BLAS_THREAD_VARIABLES}
    pre_spawn = {**dask.config.get("distributed.nanny.pre-spawn-environ", {}), **blas, **GLIBC_MALLOC_DEFAULTS}
    scheduler = {"cls": SchedulerProcess, "options": {"scheduler_kwargs": {
        # No dashboard; the scheduler's small HTTP server (health, metrics) on a free loopback port.
        "host": "127.0.0.1", "port": 0, "dashboard": False, "dashboard_address": "127.0.0.1:0"}}}
    worker = {"cls": Nanny, "options": {"host": "127.0.0.1", "nthreads": 1, "dashboard": False,
                                        "dashboard_address": None, "silence_logs": logging.WARN, "env": blas}}
    # Spawned workers copy the environment at start; the nanny also re-applies these to a
    # worker it restarts after a crash (it keeps the configuration it was made with).
    with single_threaded_blas_env(), dask.config.set({"distributed.nanny.pre-spawn-environ": pre_spawn,
                                                      "distributed.worker.profile.enabled": False}):
        return await SpecCluster(workers={i: worker for i in range(workers)}, scheduler=scheduler, worker=worker,
                                 asynchronous=True, silence_logs=logging.WARN, name="penumbra-local")


async def _serve(scheduler_kwargs: dict) -> None:
    async with Scheduler(**scheduler_kwargs) as scheduler:
        await scheduler.finished()


def main(argv: list[str]) -> int:
    """The scheduler process: end with the parent, serve until closed."""
    parent_pid, scheduler_kwargs = int(argv[0]), json.loads(argv[1])
    watch_parent(parent_pid)
    asyncio.run(_serve(scheduler_kwargs))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
