"""Both finder engines against one contract: the local process pool and a Dask LocalCluster
(real worker processes, n_workers 2, one thread each).

Same job -> same outcome (to round-off) as running the job in this process; a failing job -> a
failure outcome, never an exception; close() ends the worker processes; a worker killed
mid-job (SIGKILL while a gated job waits for a file) -> the process pool reports the job
failed and replaces itself, Dask runs the job again elsewhere and it completes.
"""

from __future__ import annotations

import asyncio
import logging
import os
import signal

import numpy as np
import pytest

from penumbra_server.server.executors import EngineSettings, ProcessPoolFinderExecutor, start_executor
from penumbra_server.server.jobs import (REASON_FOUND, REASON_NO_CANDIDATE, REASON_WORKER_FAILED, SurfaceOutcome,
                                         run_surface_job)

import executor_support as es

pytest.importorskip("distributed")
pytestmark = pytest.mark.slow  # each Dask LocalCluster takes a few seconds to start

ENGINES = ("process", "dask")


@pytest.fixture(scope="module")
def loop():
    thread = es.LoopThread()
    yield thread
    thread.close()


def _settings(engine: str, workers: int) -> EngineSettings:
    if engine == "process":
        return EngineSettings(engine="process", workers=workers)
    return EngineSettings(engine="dask", dask_local_workers=workers)


@pytest.fixture(scope="module", params=ENGINES)
def executor(request, loop):
    started = loop.run(start_executor(_settings(request.param, 2), job_function=es.hooked_job))
    yield started
    loop.run(started.close())


@pytest.fixture(scope="module")
def reference():
    """The horizon job and its outcome computed in this process."""
    job = es.horizon_job()
    return job, run_surface_job(job)


def _pids(executor) -> list[int]:
    pids = executor.worker_pids
    return sorted(pids.values() if isinstance(pids, dict) else pids)


def assert_same_outcome(got: SurfaceOutcome, want: SurfaceOutcome, *, same_label: bool = True) -> None:
    if same_label:
        assert got.label == want.label
    assert (got.found, got.reason, got.status, got.method, got.guess, got.iterations, got.lmax) == \
        (want.found, want.reason, want.status, want.method, want.guess, want.iterations, want.lmax)
    for name in ("coefficients", "centre"):  # None when not found
        a, b = getattr(got, name), getattr(want, name)
        assert (a is None) == (b is None), name
        if b is not None:
            np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-12, err_msg=name)
    assert got.residual_max == pytest.approx(want.residual_max, rel=1e-8, abs=1e-14, nan_ok=True)
    assert set(got.quantities) == set(want.quantities)
    for name, value in want.quantities.items():
        np.testing.assert_allclose(got.quantities[name], value, rtol=1e-10, atol=1e-12, err_msg=name)


def test_workers_are_separate_single_threaded_processes(executor):
    pids = _pids(executor)
    assert len(pids) == 2 and os.getpid() not in pids
    assert set(executor.worker_thread_settings.values()) == {"1"}


def _worker_profiler_enabled() -> bool:
    import dask

    return bool(dask.config.get("distributed.worker.profile.enabled"))


def test_local_dask_scheduler_apart_workers_with_glibc_malloc_defaults_and_no_profiler(executor, loop):
    """Dask's nanny would set MALLOC_TRIM_THRESHOLD_=65536, which pins glibc's mmap threshold and
    made the finder's jobs ~1.8 times slower; the local cluster's workers inherit this process's
    setting instead (normally unset), and do not run the dashboard's stack sampler."""
    if isinstance(executor, ProcessPoolFinderExecutor):
        pytest.skip("the process pool's workers inherit this process's environment as it is")
    # The scheduler runs in a process of its own (server/dask_local.py), not on this event loop.
    assert executor.scheduler_pid is not None and executor.scheduler_pid not in (os.getpid(), *_pids(executor))
    assert es.process_alive(executor.scheduler_pid)
    assert executor.worker_malloc_settings["MALLOC_TRIM_THRESHOLD_"] == os.environ.get("MALLOC_TRIM_THRESHOLD_")
    assert executor.worker_malloc_settings["MALLOC_TRIM_THRESHOLD_"] != "65536"

    async def profiler_settings():
        return await executor._client.run(_worker_profiler_enabled)

    profiling = loop.run(profiler_settings())
    assert len(profiling) == 2 and not any(profiling.values())


def test_same_jobs_give_the_outcomes_computed_here(executor, loop, reference):
    job, want = reference
    assert want.found and want.reason == REASON_FOUND  # the reference itself: a horizon was found
    hopeless = es.hopeless_job()

    async def together():
        return await asyncio.gather(executor.run(job), executor.run(hopeless), executor.run(job))

    first, nothing, second = loop.run(together())
    assert_same_outcome(first, want)
    assert_same_outcome(second, want)
    assert_same_outcome(nothing, run_surface_job(hopeless))
    assert not nothing.found and nothing.reason == REASON_NO_CANDIDATE and "no sign change" in nothing.message


def test_a_job_function_that_raises_gives_a_failure_outcome(executor, loop):
    outcome = loop.run(executor.run(es.horizon_job(es.RAISES)))
    assert isinstance(outcome, SurfaceOutcome)
    assert not outcome.found and outcome.reason == REASON_WORKER_FAILED
    assert "deliberate failure of the test hook" in outcome.message and "RuntimeError" in outcome.message


def test_a_worker_killed_mid_job(executor, loop, reference, tmp_path):
    job, want = reference
    gate = tmp_path / "gate"
    gate.mkdir()
    pending = loop.submit(executor.run(es.horizon_job(es.GATED + str(gate), data=job.data)))
    first = es.wait_for_starts(gate, 1)[0]
    assert first in _pids(executor)
    os.kill(first, signal.SIGKILL)
    if isinstance(executor, ProcessPoolFinderExecutor):
        # The pool reports the job failed and replaces itself; the next job runs.
        outcome = pending.result(120)
        assert not outcome.found and outcome.reason == REASON_WORKER_FAILED and "died" in outcome.message
        assert first not in executor.worker_pids
        assert_same_outcome(loop.run(executor.run(job)), want)
    else:
        # The scheduler runs the task again on another worker (the gate is still shut, so it
        # cannot have finished before the kill); once the gate opens it completes.
        second = es.wait_for_starts(gate, 2)[1]
        assert second != first
        (gate / "open").touch()
        outcome = pending.result(120)
        assert_same_outcome(outcome, want, same_label=False)
        assert outcome.label.startswith(es.GATED)
    (gate / "open").touch()


@pytest.mark.parametrize("engine", ENGINES)
def test_close_ends_the_worker_processes(engine, loop):
    started = loop.run(start_executor(_settings(engine, 1), job_function=es.hooked_job))
    pids = _pids(started) + ([started.scheduler_pid] if engine == "dask" else [])
    assert pids and all(es.process_alive(pid) for pid in pids)
    loop.run(started.close())
    es.wait_until_gone(pids)
    with pytest.raises(RuntimeError, match="closed"):
        loop.run(started.run(es.horizon_job()))


@pytest.fixture(scope="module")
def strict_cluster(loop):
    """A LocalCluster (2 worker processes) whose scheduler gives a task up as soon as one worker
    dies running it (allowed-failures 0), so the executor's own resubmission is what reruns it."""
    import dask
    from distributed import LocalCluster

    from penumbra_server.server.executors import single_threaded_blas_env

    async def make():
        with single_threaded_blas_env(), dask.config.set({"distributed.scheduler.allowed-failures": 0}):
            return await LocalCluster(n_workers=2, threads_per_worker=1, processes=True, asynchronous=True,
                                      host="127.0.0.1", scheduler_port=0, dashboard_address=None,
                                      scheduler_kwargs={"dashboard": False, "dashboard_address": "127.0.0.1:0"})

    async def close(cluster):
        await cluster.close()  # on the loop's thread: from another thread close() would block

    cluster = loop.run(make())
    yield cluster
    loop.run(close(cluster))


def test_a_task_the_scheduler_gives_up_is_resubmitted_and_completes(strict_cluster, loop, reference, tmp_path,
                                                                    caplog):
    from penumbra_server.server.dask_executor import DaskFinderExecutor

    job, want = reference
    with caplog.at_level(logging.WARNING, logger="penumbra.server.dask"):
        executor = loop.run(DaskFinderExecutor.start(scheduler_address=strict_cluster.scheduler_address,
                                                     resubmissions=1, job_function=es.hooked_job))
    try:
        assert executor.workers == 2
        # That cluster was started with Dask's default nanny environment: the executor says what it costs.
        assert executor.worker_malloc_settings["MALLOC_TRIM_THRESHOLD_"] == "65536"
        assert any("MALLOC_TRIM_THRESHOLD_=65536" in r.getMessage() for r in caplog.records)
        gate = tmp_path / "gate"
        gate.mkdir()
        pending = loop.submit(executor.run(es.horizon_job(es.GATED + str(gate), data=job.data)))
        first = es.wait_for_starts(gate, 1)[0]
        os.kill(first, signal.SIGKILL)
        second = es.wait_for_starts(gate, 2)[1]
        assert second != first and executor.resubmitted == 1
        (gate / "open").touch()
        assert_same_outcome(pending.result(120), want, same_label=False)

        # Every allowed submission lost with its worker: a failure outcome naming why.
        gate = tmp_path / "doomed"
        gate.mkdir()
        pending = loop.submit(executor.run(es.horizon_job(es.GATED + str(gate), data=job.data)))
        for attempt in (1, 2):
            os.kill(es.wait_for_starts(gate, attempt)[attempt - 1], signal.SIGKILL)
        outcome = pending.result(120)
        assert not outcome.found and outcome.reason == REASON_WORKER_FAILED
        assert "dask worker lost while finding the surface, 2 attempt(s)" in outcome.message
        assert "KilledWorker" in outcome.message
        assert executor.resubmitted == 2 and len(es.started_pids(gate)) == 2
        (gate / "open").touch()
    finally:
        loop.run(executor.close())
    # Closing a client of a scheduler started elsewhere leaves that cluster's workers running.
    assert len(strict_cluster.workers) == 2
