"""A server restart: the run is re-opened from its archive, the shim re-sends what was not
acknowledged, and a watcher resumes from its last sequence number without gaps or repeats."""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.archive import open_archive
from penumbra_server.server import BackgroundServer, ServerOptions

from service_support import lone_hole_slice, lone_spec


def _wait_for(condition, what: str, timeout_s: float = 120.0) -> None:
    """Poll ``condition`` until true; fails loudly after ``timeout_s``."""
    deadline = time.monotonic() + timeout_s
    while not condition():
        if time.monotonic() > deadline:
            pytest.fail(f"timed out after {timeout_s} s waiting for {what}")
        time.sleep(0.02)


def test_restart_reopens_the_run_and_the_shim_carries_on(tmp_path):
    options = ServerOptions(workers=1)
    first = BackgroundServer("127.0.0.1:0", archive_root=tmp_path, workers=1, options=options).start()
    address = first.address
    # A short deadline, so an attempt during the outage fails soon and is retried.
    client = ps.connect(address, deadline_s=1.0, retry_budget_s=60.0)
    try:
        finished = client.open_run(lone_spec("finished before the restart"), cache_results=False)
        assert finished.submit(lone_hole_slice(0)).result(60).accepted
        finished.close()
        finished_events = [e.raw.SerializeToString() for e in client.watch(finished.run_id, timeout_s=600)]
        run = client.open_run(lone_spec("restart"), max_retry_s=60.0)
        stream = client.watch(run.run_id, from_seq=1, timeout_s=600)
        seen: list[ps.Event] = []
        reader = threading.Thread(target=lambda: seen.extend(stream))
        reader.start()
        for i in range(2):
            assert run.submit(lone_hole_slice(i)).result(60).accepted
        _wait_for(lambda: sum(e.kind == "slice_processed" for e in seen) >= 2, "both slices processed")
        first.stop()

        # While no server listens, the evolution keeps submitting and never waits: submit()
        # returns with the slice not yet sent.
        ticket = run.submit(lone_hole_slice(2))
        assert not ticket.done()
        # The first attempt fails (no server) before the second server starts: a re-send follows.
        _wait_for(lambda: run.stats.retries >= 1, "a failed send attempt while the server is down")
        second = BackgroundServer(address, archive_root=tmp_path, workers=1, options=options).start()
        try:
            ack = ticket.result(60)
            assert ack.accepted and ack.attempts >= 2  # re-sent after the restart
            assert second.server.restored_run_ids == [run.run_id]
            assert client.get_run(run.run_id).last_received_iteration == 2
            # the run closed before the restart is listed and its events read back unchanged
            # (apart from the emission times, which the archive keeps at commit precision)
            assert client.get_run(finished.run_id).state == "closed"
            assert {r.run_id for r in client.list_runs()} == {run.run_id, finished.run_id}
            again = [e.raw for e in client.watch(finished.run_id, timeout_s=600)]
            assert len(again) == len(finished_events)
            for old, new in zip(finished_events, again):
                before = pb.RunEvent.FromString(old)
                before.emit_time_unix_s = new.emit_time_unix_s = 0
                if before.HasField("surface_not_found"):
                    before.surface_not_found.message = new.surface_not_found.message = ""
                assert before == new, (str(before), str(new))
            # a re-send of an archived slice is a duplicate on the new server too
            assert run.submit(lone_hole_slice(1)).result(30).duplicate
            run.close()
            reader.join(60)
            assert not reader.is_alive(), "the watcher did not see the run close"
        finally:
            second.stop()
    finally:
        client.close()
    seqs = [e.seq for e in seen]
    assert seqs == list(range(1, len(seqs) + 1)), "the watcher missed or repeated events"
    assert stream.reconnects >= 1
    states = [(e.state, e.reason) for e in seen if e.kind == "run_state_changed"]
    assert states[0][0] == "open" and "restart" in states[1][1] and states[-1][0] == "closed"
    found = [e for e in seen if e.kind == "surface_found"]
    assert [e.iteration for e in found] == [0, 1, 2]
    # The slice after the restart was seeded from the archive's last surface (no new scan):
    assert found[2].surface.area == pytest.approx(16 * np.pi, rel=2e-3)  # docs/references.md item 1
    view = open_archive(tmp_path, run.run_id)
    assert view.surface("A")["event_seq"].tolist() == [e.seq for e in found]
    assert view.state == "closed"
