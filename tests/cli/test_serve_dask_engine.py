"""`penumbra serve --engine dask --dask-local-workers N` end to end: a real server subprocess on
loopback, a real Dask LocalCluster of worker processes, a lone Brill-Lindquist hole through the shim.

Published check: a lone Brill-Lindquist puncture is Schwarzschild in isotropic coordinates,
horizon area 16 pi m^2 (Baumgarte & Shapiro, Numerical Relativity, Cambridge 2010, ch. 3 and 7;
docs/references.md item 1).
"""

from __future__ import annotations

import signal

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch

from serve_support import children_of, cmdline, kill_all, outlived, start_serve, stop, wait_for_ready

pytest.importorskip("distributed")
pytestmark = pytest.mark.slow  # the server starts a Dask LocalCluster

CENTRE = (0.013, -0.021, 0.017)


def _lone_hole_slice(iteration: int, nodes: int = 33, half_width: float = 1.2) -> ps.OutgoingSlice:
    h = 2 * half_width / (nodes - 1)
    origin = tuple(np.asarray(CENTRE) - half_width)
    patch = sample_patch(BrillLindquist(masses=(1.0,), positions=(CENTRE,)), origin=origin, spacing=(h, h, h),
                         shape=(nodes,) * 3)
    fields = {name: patch.fields[name] for name in ps.required_fields("adm")}
    return ps.build_slice(time=0.1 * iteration, iteration=iteration, variable_set="adm",
                          patches=[ps.PatchData(origin=origin, spacing=(h, h, h), fields=fields)])


def test_a_server_on_the_dask_engine_finds_a_lone_hole(tmp_path):
    process, ready = start_serve(tmp_path, "--engine", "dask", "--dask-local-workers", "1")
    workers = {}
    try:
        address = wait_for_ready(ready, process, timeout_s=180)
        workers = children_of(process.pid)  # the LocalCluster's worker process(es)
        assert workers, "the dask engine started no worker process under the server"
        with ps.connect(address, deadline_s=60.0) as client:
            spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", CENTRE, 1.0),), name="lone on dask",
                              finder=ps.FinderOptions(lmax=6, tolerance=1e-8))
            run = client.open_run(spec)
            for iteration in range(2):
                run.submit(_lone_hole_slice(iteration))
            assert run.flush(120)
            run.close()
            events = list(client.watch(run.run_id, from_seq=1, timeout_s=600))
        found = [e for e in events if e.kind == "surface_found"]
        assert [e.iteration for e in found] == [0, 1]
        for e in found:
            # Baumgarte & Shapiro (2010), ch. 3 and 7: area 16 pi m^2 (grid h = 0.075 m, lmax 6)
            assert e.surface.area / (16 * np.pi) == pytest.approx(1.0, abs=2e-3)
            assert np.allclose(e.surface.centroid, CENTRE, atol=0.02)
        process.send_signal(signal.SIGTERM)
        out, _ = process.communicate(timeout=60)
        assert process.returncode == 0, out
        assert "finder: dask local cluster of 1 worker process;" in out and "stopped" in out
        leftover = outlived(workers, 300.0)  # children notice their parent's exit within a moment
        assert not leftover, f"processes {sorted(leftover)} of the dask engine outlived the server by 300 s"
    finally:
        kill_all(workers)
        if process.poll() is None:
            stop(process)


def test_a_killed_server_takes_its_local_dask_cluster_with_it(tmp_path):
    """SIGKILL leaves no time to close anything: the local cluster's scheduler process (which
    watches its parent) and worker processes end by themselves."""
    process, ready = start_serve(tmp_path, "--engine", "dask", "--dask-local-workers", "1")
    children = {}
    try:
        wait_for_ready(ready, process, timeout_s=180)
        children = children_of(process.pid)
        commands = [cmdline(pid) for pid in children]
        assert any("penumbra_server.server.dask_local" in c for c in commands), commands  # the scheduler
        assert len(children) >= 2, commands  # and the worker
        process.kill()
        process.wait(timeout=30)
        leftover = outlived(children, 300.0)
        assert not leftover, f"processes {[cmdline(pid) for pid in leftover]} outlived the killed server by 300 s"
    finally:
        kill_all(children)
        if process.poll() is None:
            stop(process)
