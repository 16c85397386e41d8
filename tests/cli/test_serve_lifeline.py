"""Worker processes and the resource tracker end when `penumbra serve` is killed with SIGKILL."""

import sys

import pytest

from serve_support import children_of, cmdline, kill_all, outlived, start_serve, stop, wait_for_ready

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc (Linux)")


def test_workers_and_resource_tracker_exit_when_the_server_is_killed(tmp_path):
    process, ready = start_serve(tmp_path, workers=2)
    children = {}
    try:
        wait_for_ready(ready, process)
        children = children_of(process.pid)
        workers = {pid: t for pid, t in children.items() if "spawn_main" in cmdline(pid)}
        trackers = {pid: t for pid, t in children.items() if "resource_tracker" in cmdline(pid)}
        assert len(workers) == 2, {pid: cmdline(pid) for pid in children}
        assert len(trackers) == 1, {pid: cmdline(pid) for pid in children}
        process.kill()  # SIGKILL: no handler, no cleanup in the server
        process.wait(timeout=30)
        remaining = outlived(children, 20.0)
        assert not remaining, ("still running 20 s after the server was killed: "
                               + "; ".join(f"{pid}: {cmdline(pid)}" for pid in remaining))
    finally:
        stop(process)
        kill_all(children)  # only if the test failed: leave no orphans behind
