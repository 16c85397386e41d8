"""Helpers of the executor tests: finder jobs, a test-only job hook, an event loop on a thread.

The hook :func:`hooked_job` is what the executors under test run instead of
``run_surface_job``; it reads its instructions from the job's label, so one executor serves
ordinary, failing and deliberately slow jobs. It is imported by reference in the worker
processes (spawned children get this test process's ``sys.path``).
"""

from __future__ import annotations

import asyncio
import os
import threading
import time
from pathlib import Path

import numpy as np

from penumbra_server.numerics.slices import Slice
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch
from penumbra_server.numerics.surfaces import Surface
from penumbra_server.server.jobs import SurfaceJob, run_surface_job

#: A lone puncture of mass 1 slightly off the grid's symmetry centre (as service_support.LONE_CENTRE).
CENTRE = np.array([0.013, -0.021, 0.017])
#: Label prefix: wait for ``<dir>/open`` before running, after appending the pid to ``<dir>/started``.
GATED = "gated:"
#: Label: the hook raises (a job function that fails outright).
RAISES = "raises"
GATE_TIMEOUT_S = 300.0


def lone_hole_slice(nodes: int = 25, half_width: float = 1.1) -> Slice:
    """A lone Brill-Lindquist puncture of mass 1 on one ADM patch (units of M)."""
    h = 2 * half_width / (nodes - 1)
    patch = sample_patch(BrillLindquist(masses=(1.0,), positions=(tuple(CENTRE),)), origin=tuple(CENTRE - half_width),
                         spacing=(h, h, h), shape=(nodes,) * 3)
    return Slice(time=0.0, iteration=0, variable_set="adm", patches=(patch,))


def horizon_job(label: str = "A", data: Slice | None = None) -> SurfaceJob:
    """Find the horizon (radius 1/2 in isotropic coordinates) from a seed sphere of radius 0.4."""
    return SurfaceJob(label=label, data=data if data is not None else lone_hole_slice(), lmax=4, tolerance=1e-9,
                      max_iterations=30, seed=Surface.sphere(CENTRE, 0.4, 4), scan_centre=CENTRE,
                      scan_radii=(0.3, 0.8))


def hopeless_job(data: Slice | None = None) -> SurfaceJob:
    """Scan only spheres outside the horizon (expansion > 0 on all): no candidate."""
    return SurfaceJob(label="nothing", data=data if data is not None else lone_hole_slice(), lmax=4, tolerance=1e-9,
                      max_iterations=30, scan_centre=CENTRE, scan_radii=(0.7, 0.95))


def hooked_job(job: SurfaceJob):
    """The executors' job function in these tests (module docstring)."""
    if job.label == RAISES:
        raise RuntimeError("deliberate failure of the test hook")
    if job.label.startswith(GATED):
        gate = Path(job.label[len(GATED):])
        with open(gate / "started", "a") as f:
            f.write(f"{os.getpid()}\n")
        deadline = time.monotonic() + GATE_TIMEOUT_S
        while not (gate / "open").exists():
            if time.monotonic() > deadline:
                raise TimeoutError(f"the test never opened {gate / 'open'}")
            time.sleep(0.02)
    return run_surface_job(job)


def started_pids(gate: Path) -> list[int]:
    path = gate / "started"
    return [int(line) for line in path.read_text().split()] if path.exists() else []


def wait_for_starts(gate: Path, count: int, timeout_s: float = 120.0) -> list[int]:
    """The pids of the first ``count`` starts of a gated job; fails loudly after ``timeout_s``."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        pids = started_pids(gate)
        if len(pids) >= count:
            return pids
        time.sleep(0.02)
    raise AssertionError(f"gated job started {len(started_pids(gate))} time(s), expected {count} within {timeout_s} s")


def process_alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (FileNotFoundError, ProcessLookupError):
        return False
    return state != "Z"


def wait_until_gone(pids, timeout_s: float = 60.0) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if not any(process_alive(pid) for pid in pids):
            return
        time.sleep(0.05)
    raise AssertionError(f"worker processes {[p for p in pids if process_alive(p)]} still run {timeout_s} s after close()")


class LoopThread:
    """An asyncio event loop on its own thread, so that executors (bound to one loop) can
    outlive a single test; :meth:`run` runs a coroutine there and returns its result."""

    def __init__(self) -> None:
        self.loop = asyncio.new_event_loop()
        self._thread = threading.Thread(target=self.loop.run_forever, name="executor-tests", daemon=True)
        self._thread.start()

    def run(self, coroutine, timeout_s: float = 180.0):
        return asyncio.run_coroutine_threadsafe(coroutine, self.loop).result(timeout_s)

    def submit(self, coroutine):
        """Start ``coroutine`` on the loop; returns a concurrent.futures.Future."""
        return asyncio.run_coroutine_threadsafe(coroutine, self.loop)

    def close(self) -> None:
        self.loop.call_soon_threadsafe(self.loop.stop)
        self._thread.join(30)
        self.loop.close()
