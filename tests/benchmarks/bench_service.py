"""Service throughput on the demo's two-body sequence: 1 against 2 process workers, the archive's
share of a slice's time, and the Dask engine (LocalCluster) against the process engine.

Run: python tests/benchmarks/bench_service.py [--slices N] [--rounds R]   (about 10 minutes on
two cores with the defaults: all 21 slices, 2 rounds).
Prints exactly these lines on stdout (details on stderr):

    throughput workers 2 / workers 1: <ratio>
    archive share of slice time: <fraction>
    throughput dask local / process: <ratio>

The slices are the demo's (penumbra_server.cli.demo_evolution.slice_arrays: the invented
Brill-Lindquist inspiral of demo_scenario, conformal-W variables, lmax 10, the common horizon
searched once the bodies are close), built before timing and sent whole through the shim to a
real server on loopback (a server on its own event loop thread in this process, built as
`penumbra serve` builds it: start_executor, then create_server), with two slices of the run in
flight (``--slices-in-flight``; the server's default is one). The sender is a separate
process, as an evolution would be (so its serialisation does not compete for this process's
GIL); it sends as fast as the server accepts: it keeps at most the run's queue depth of slices unprocessed (so none is
skipped) and the server never waits for input. Throughput is slices processed per second of
wall time, first submit to last slice processed, pooled over the rounds; both ratios come from
configurations run one after another, interleaved, in one process run ("process 1",
"process 2", "dask 2").

Archive share: in the "process 2" run, the time the server's archive thread spends in
ArchiveWriter.commit, add_surface, fold and close (timed by wrapping those methods in this
process: every archive write of a run after its creation, the journal writes of the commits and
the bulk folds of the journal into the zarr arrays alike), per processed slice, over the mean
wall time of a slice in the server from the start of its processing to its slice_processed
commit (latency_s - queue_wait_s of the archive's slice rows).
"""

from __future__ import annotations

import argparse
import asyncio
import multiprocessing
import pickle
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

import penumbra_shim as ps
from penumbra_server.archive import open_archive
from penumbra_server.archive.writer import ArchiveWriter
from penumbra_server.cli.demo_evolution import DEFAULT_LMAX, run_spec_for, slice_arrays
from penumbra_server.cli.demo_scenario import DemoScenario
from penumbra_server.server import ServerOptions, create_server
from penumbra_server.server.executors import EngineSettings, start_executor


class ArchiveClock:
    """Seconds spent in (and calls of) the archive writer's commit, add_surface, fold and close,
    per archive path (a fold called inside a commit counts once, in the commit)."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self.calls: dict[str, int] = {}
        self._lock = threading.Lock()

    def install(self) -> None:
        inside = threading.local()
        for name in ("commit", "add_surface", "fold", "close"):
            original = getattr(ArchiveWriter, name)

            def timed(writer, *args, _original=original, **kwargs):
                if getattr(inside, "busy", False):  # nested (commit -> fold): timed by the outer call
                    return _original(writer, *args, **kwargs)
                inside.busy = True
                started = time.perf_counter()
                try:
                    return _original(writer, *args, **kwargs)
                finally:
                    inside.busy = False
                    with self._lock:
                        key = str(writer.path)
                        self.seconds[key] = self.seconds.get(key, 0.0) + time.perf_counter() - started
                        self.calls[key] = self.calls.get(key, 0) + 1

            setattr(ArchiveWriter, name, timed)


class JobClock:
    """Per finder job at the executor: seconds awaited in ``executor.run`` and the seconds the
    worker itself reported (``outcome.wall_time_s``); the difference is the engine's overhead
    (sending the job, queueing, returning the outcome)."""

    def __init__(self) -> None:
        self.awaited: list[float] = []
        self.worked: list[float] = []
        self.job_bytes: list[int] = []

    def install(self, executor) -> None:
        original = executor.run

        async def timed(job):
            self.job_bytes.append(len(pickle.dumps(job, protocol=5)) if len(self.job_bytes) < 4 else self.job_bytes[-1])
            started = time.perf_counter()
            outcome = await original(job)
            self.awaited.append(time.perf_counter() - started)
            self.worked.append(float(outcome.wall_time_s))
            return outcome

        executor.run = timed

    def describe(self) -> str:
        if not self.awaited:
            return "no jobs"
        awaited, worked = np.array(self.awaited), np.array(self.worked)
        return (f"{len(awaited)} jobs: awaited {awaited.mean():.3f} s, worked {worked.mean():.3f} s, "
                f"overhead {np.mean(awaited - worked) * 1e3:.0f} ms (median {np.median(awaited - worked) * 1e3:.0f}), "
                f"job pickle ~{np.mean(self.job_bytes[:4]) / 2**20:.2f} MiB")


class ServerThread:
    """A Penumbra server with the executor of ``engine``, on an event loop thread of its own."""

    def __init__(self, archive_root: Path, engine: EngineSettings, slices_in_flight: int = 2) -> None:
        self.slices_in_flight = slices_in_flight
        self.loop = asyncio.new_event_loop()
        self._thread = threading.Thread(target=self.loop.run_forever, name="bench-server", daemon=True)
        self._thread.start()
        self.executor = self._run(start_executor(engine), 300)
        self.jobs = JobClock()
        self.jobs.install(self.executor)
        self.server = self._run(self._create(archive_root), 120)

    async def _create(self, archive_root: Path):
        server = await create_server("127.0.0.1:0", archive_root=archive_root, executor=self.executor,
                                     options=ServerOptions(restore_runs=False, slices_in_flight=self.slices_in_flight))
        await server.start()
        return server

    def _run(self, coroutine, timeout_s: float):
        return asyncio.run_coroutine_threadsafe(coroutine, self.loop).result(timeout_s)

    def stop(self) -> None:
        self._run(self.server.stop(1.0), 120)
        self._run(self.executor.close(), 120)
        self.loop.call_soon_threadsafe(self.loop.stop)
        self._thread.join(30)


#: Seconds between the sender's GetRun polls while the run's queue is full: often enough that the
#: queue (4 slices) never runs dry, rarely enough that the polls (about 0.7 ms of CPU each,
#: client and server together, measured here) do not compete with the workers for the cores.
POLL_S = 0.05


def send_sequence(address: str, count: int, name: str, results, timeout_s: float = 1800.0) -> None:
    """In the sender process: build the first ``count`` demo slices, then send them to a new run
    as fast as the server accepts; puts (run id, seconds) on ``results``."""
    scenario = DemoScenario()
    slices = [ps.build_slice(**slice_arrays(scenario, index)) for index in range(count)]
    with ps.connect(address, deadline_s=120.0) as client:
        spec = run_spec_for(scenario, lmax=DEFAULT_LMAX, name=name)
        depth = spec.backlog.queue_depth
        run = client.open_run(spec, crop_to_windows=False)
        deadline = time.monotonic() + timeout_s

        def processed() -> int:
            info = client.get_run(run.run_id)
            if info.slices_skipped:
                raise RuntimeError(f"{name}: the server skipped {info.slices_skipped} slice(s); the sender must wait")
            return info.slices_processed

        started = time.perf_counter()
        done = 0
        for k, outgoing in enumerate(slices):
            while k - done >= depth:  # at most `depth` slices unprocessed: none is ever skipped
                if time.monotonic() > deadline:
                    raise TimeoutError(f"{name}: slice {k} not accepted within {timeout_s} s")
                time.sleep(POLL_S)
                done = processed()
            run.submit(outgoing)
        while done < len(slices):
            if time.monotonic() > deadline:
                raise TimeoutError(f"{name}: {done} of {len(slices)} slices processed after {timeout_s} s")
            time.sleep(POLL_S)
            done = processed()
        seconds = time.perf_counter() - started
        run.close(close_run=True)
    results.put((run.run_id, seconds))


def run_sender(address: str, count: int, name: str) -> tuple[str, float]:
    context = multiprocessing.get_context("spawn")
    results = context.Queue()
    sender = context.Process(target=send_sequence, args=(address, count, name, results), name=f"sender {name}")
    sender.start()
    try:
        return results.get(timeout=3600)
    finally:
        sender.join(60)
        if sender.exitcode != 0:
            raise RuntimeError(f"sender {name} exited with status {sender.exitcode}")


def found_counts(root: Path, run_id: str) -> dict[str, int]:
    view = open_archive(root, run_id)
    return {label: int(view.surface(label)["found"].sum()) for label in view.surface_labels}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--slices", type=int, default=None, help="send only the first N slices (default: all)")
    parser.add_argument("--rounds", type=int, default=2,
                        help="times each configuration runs, interleaved (default 2); figures pool all rounds")
    parser.add_argument("--slices-in-flight", type=int, default=2,
                        help="slices of the run searched at once (ServerOptions.slices_in_flight; default 2)")
    parser.add_argument("--only", default=None,
                        help='comma-separated configurations to run, e.g. "process 2,dask 2" (default: all); '
                             "prints only the ratios whose two configurations ran")
    args = parser.parse_args(argv)
    scenario = DemoScenario()
    count = scenario.slice_count if args.slices is None else min(args.slices, scenario.slice_count)
    print(f"slices in flight per run: {args.slices_in_flight}", file=sys.stderr)
    print(f"{count} slices of the demo sequence, {ps.build_slice(**slice_arrays(scenario, 0)).nbytes / 2**20:.1f} MiB "
          f"each, lmax {DEFAULT_LMAX}", file=sys.stderr)
    clock = ArchiveClock()
    clock.install()
    configurations = {
        "process 1": EngineSettings(engine="process", workers=1),
        "process 2": EngineSettings(engine="process", workers=2),
        "dask 2": EngineSettings(engine="dask", dask_local_workers=2),
    }
    if args.only:
        chosen = [name.strip() for name in args.only.split(",") if name.strip()]
        unknown = [name for name in chosen if name not in configurations]
        if unknown:
            parser.error(f"--only: unknown configuration(s) {unknown}; expected some of {list(configurations)}")
        configurations = {name: configurations[name] for name in chosen}
    seconds = {name: 0.0 for name in configurations}
    archive_s = {name: 0.0 for name in configurations}
    walls = {name: [] for name in configurations}
    found = {name: [] for name in configurations}
    with tempfile.TemporaryDirectory(prefix="penumbra-bench-service-") as tmp:
        # Rounds interleave the configurations, so a change of the machine's load spreads over all.
        for round_ in range(args.rounds):
            for name, engine in configurations.items():
                root = Path(tmp) / f"{name.replace(' ', '-')}-{round_}"
                server = ServerThread(root, engine, args.slices_in_flight)
                try:
                    cpu_started = time.process_time()  # this process: the server, its archive thread, and
                    # for "dask 2" the in-process scheduler and nannies (the workers are other processes)
                    run_id, took = run_sender(server.server.address, count, name)
                    server_cpu_s = time.process_time() - cpu_started
                finally:
                    server.stop()
                view = open_archive(root, run_id)
                rows = view.slices()
                in_server = rows["latency_s"] - rows["queue_wait_s"]
                spent = clock.seconds.get(str(view.path), float("nan"))
                seconds[name] += took
                archive_s[name] += spent
                walls[name].extend(in_server.tolist())
                found[name].append(found_counts(root, run_id))
                print(f"{name} (round {round_ + 1}): {took:.1f} s, {count / took:.3f} slices/s; per slice: wall in "
                      f"server {np.mean(in_server):.3f} s, archive {1e3 * spent / count:.1f} ms "
                      f"({clock.calls.get(str(view.path), 0) / count:.1f} writer calls); found {found[name][-1]}",
                      file=sys.stderr)
                print(f"{name} (round {round_ + 1}) finder jobs: {server.jobs.describe()}; server process CPU "
                      f"{server_cpu_s / count:.2f} s per slice", file=sys.stderr)
    rate = {name: args.rounds * count / seconds[name] for name in configurations}
    results = {name: {"archive_per_slice_s": archive_s[name] / (args.rounds * count),
                      "slice_wall_s": float(np.mean(walls[name])), "found": found[name][0]}
               for name in configurations}
    first = next(iter(found.values()))[0]
    if any(f != first for runs in found.values() for f in runs):
        print("warning: the runs found different numbers of surfaces", file=sys.stderr)
    if "process 1" in rate and "process 2" in rate:
        print(f"throughput workers 2 / workers 1: {rate['process 2'] / rate['process 1']:.3f}")
    if "process 2" in results:
        two = results["process 2"]
        print(f"archive share of slice time: {two['archive_per_slice_s'] / two['slice_wall_s']:.4f}")
    if "dask 2" in rate and "process 2" in rate:
        print(f"throughput dask local / process: {rate['dask 2'] / rate['process 2']:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
