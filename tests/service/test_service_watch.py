"""Watchers: resuming from the last sequence number misses nothing and repeats nothing; a watcher
that falls behind is told and resumes; the run never waits for a watcher."""

from __future__ import annotations

import asyncio
import threading

import grpc
import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc
from penumbra_server.server import BackgroundServer, ServerOptions
from penumbra_server.server.errors import ServiceError
from penumbra_server.server.events import EventLog

from held_executor import HeldExecutor
from service_support import lone_hole_slice, lone_spec


def _flat_slice(iteration: int, nodes: int = 9) -> ps.OutgoingSlice:
    """Flat space (gamma = identity, K = 0): no horizon, cheap to send and to search."""
    fields = {name: np.zeros((nodes,) * 3) for name in ps.required_fields("adm")}
    for name in ("gamma_xx", "gamma_yy", "gamma_zz"):
        fields[name] = np.ones((nodes,) * 3)
    return ps.build_slice(time=float(iteration), iteration=iteration, variable_set="adm",
                          patches=[ps.PatchData(origin=(-1, -1, -1), spacing=(2 / (nodes - 1),) * 3, fields=fields)])


def test_reconnecting_from_the_last_seq_misses_nothing_and_repeats_nothing(client, stub):
    run = client.open_run(lone_spec("resume"), cache_results=False)
    for i in range(3):
        run.submit(lone_hole_slice(i))
    assert run.flush(60)
    first_part = []
    call = stub.WatchRun(pb.WatchRunRequest(run_id=run.run_id, start_seq=1), timeout=60)
    for response in call:
        first_part.append(response.event)
        if len(first_part) == 4:
            break
    call.cancel()  # the watcher goes away mid-run
    for i in range(3, 5):
        run.submit(lone_hole_slice(i))
    run.close()
    resumed = [r.event for r in stub.WatchRun(pb.WatchRunRequest(run_id=run.run_id, start_seq=first_part[-1].seq + 1),
                                               timeout=60)]
    whole = [r.event for r in stub.WatchRun(pb.WatchRunRequest(run_id=run.run_id, start_seq=1), timeout=60)]
    assert [e.seq for e in whole] == list(range(1, len(whole) + 1))
    joined = first_part + resumed
    assert [e.SerializeToString() for e in joined] == [e.SerializeToString() for e in whole]
    assert sum(1 for e in whole if e.WhichOneof("kind") == "surface_found") == 5
    # The shim's stream from a middle seq returns exactly the tail.
    tail = list(client.watch(run.run_id, from_seq=5, timeout_s=600))
    assert [e.seq for e in tail] == [e.seq for e in whole[4:]]


def test_watching_from_beyond_the_next_event_is_out_of_range(client, stub):
    run = client.open_run(lone_spec("range"), cache_results=False)
    with pytest.raises(grpc.RpcError) as info:
        list(stub.WatchRun(pb.WatchRunRequest(run_id=run.run_id, start_seq=1000), timeout=10))
    assert info.value.code() == grpc.StatusCode.OUT_OF_RANGE and "start_seq" in info.value.details()
    with pytest.raises(grpc.RpcError) as missing:
        list(stub.WatchRun(pb.WatchRunRequest(run_id="run-000000000000"), timeout=10))
    assert missing.value.code() == grpc.StatusCode.NOT_FOUND
    run.close()


def test_event_log_overflow_keeps_a_gap_free_prefix_and_trimming_is_reported():
    async def scenario():
        log = EventLog(limit=5, subscriber_capacity=2)
        held, sub = log.subscribe(1)
        assert held == []
        for seq in range(1, 5):  # a burst: the watcher gets no chance to read in between
            log.append(pb.RunEvent(seq=seq))
        got = [await sub.next(), await sub.next(), await sub.next()]
        assert [e.seq for e in got[:2]] == [1, 2] and got[2] is None and sub.overflowed
        held, again = log.subscribe(3)  # resume where the overflowed watcher stopped
        assert [e.seq for e in held] == [3, 4]
        for seq in range(5, 9):
            log.append(pb.RunEvent(seq=seq))
        with pytest.raises(ServiceError) as info:
            log.subscribe(2)  # seq 1..3 were trimmed (limit 5)
        assert info.value.code == grpc.StatusCode.OUT_OF_RANGE and "start_seq=4" in info.value.message
        log.close()
        assert [(await again.next()).seq for _ in range(2)] == [5, 6]

    asyncio.run(scenario())


def test_a_watcher_that_falls_behind_is_told_and_the_shim_resumes_without_gaps(tmp_path):
    # Deterministic, whatever the machine's speed: the finds are held until all 40 slices were
    # accepted (so the server must skip), and every processed slice commits its data windows and
    # slice_processed together, a burst of two events that a queue of one cannot hold.
    options = ServerOptions(workers=1, subscriber_queue_size=1)
    held = HeldExecutor.start(1)
    try:
        _overflow_scenario(tmp_path, options, held)
    finally:
        held.close_pool()


def _overflow_scenario(tmp_path, options, held):
    with BackgroundServer(archive_root=tmp_path, workers=1, options=options, executor=held) as bg:
        with ps.connect(bg.address, deadline_s=20) as client:
            spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),), name="burst",
                              backlog=ps.BacklogOptions(queue_depth=1))
            run = client.open_run(spec, queue_depth=64, cache_results=False)
            channel = grpc.insecure_channel(bg.address)
            raw = pb_grpc.HorizonServiceStub(channel).WatchRun(pb.WatchRunRequest(run_id=run.run_id, start_seq=1),
                                                               timeout=60)
            live = client.watch(run.run_id, from_seq=1, timeout_s=600)  # read promptly, in a thread
            live_events: list[ps.Event] = []
            reader = threading.Thread(target=lambda: live_events.extend(live))
            reader.start()
            for i in range(40):
                run.submit(_flat_slice(i))
            assert run.flush(60)  # all accepted while the first find is held
            held.wait_until_held(1)
            held.release()  # the raw watcher reads nothing meanwhile
            run.close()
            reader.join(60)
            assert not reader.is_alive(), "the prompt watcher did not see the run close"
            # Even a prompt reader overflows a queue of one in a burst; the shim resumed each time.
            assert live.reconnects >= 1
            assert [e.seq for e in live_events] == list(range(1, len(live_events) + 1))
            assert live_events[-1].state == "closed"
            seen = []
            with pytest.raises(grpc.RpcError) as info:
                for response in raw:
                    seen.append(response.event.seq)
            assert info.value.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
            assert f"resume with start_seq={seen[-1] + 1 if seen else 1}" in info.value.details()
            channel.close()
            stream = client.watch(run.run_id, from_seq=1, timeout_s=600)
            events = list(stream)
            assert [e.seq for e in events] == list(range(1, len(events) + 1))
            assert events[-1].state == "closed" and stream.closed_run
            skipped = {e.skipped_iteration for e in events if e.kind == "slice_skipped"}
            processed = {e.iteration for e in events if e.kind == "slice_processed"}
            assert skipped and processed and not skipped & processed
            assert run.stats.dropped_locally == 0 and skipped | processed == set(range(40))
            assert [e.seq for e in events] == [e.seq for e in live_events]


def test_watch_without_a_run_id_is_refused_by_name(client):
    # A pending handle's run id is None until its run opens: watching it by id is a caller error,
    # reported at once and naming the argument (not an AttributeError deep in the stream).
    for bad in (None, "", 7):
        with pytest.raises(ValueError, match="run_id: expected a non-empty run id string"):
            client.watch(bad)
