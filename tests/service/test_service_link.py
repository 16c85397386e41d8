"""The link between the evolution and the server never stalls the run, and outages are recorded.

Real processes throughout: a client that starts while nothing listens on its target, a real
server started later on that same port (then stopped and restarted there with the same archive
root), real zarr archives, raw wire requests for refusals. Conditions are waited for with
polling loops whose deadlines are generous and fail loudly; nothing depends on machine speed.
"""

from __future__ import annotations

import math
import socket
import threading
import time

import grpc
import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc
from penumbra_server.archive import open_archive
from penumbra_server.server import BackgroundServer, ServerOptions

from service_support import box, lone_hole, lone_hole_slice, lone_spec, patch_data, raw_requests

LINK_DOWN = ps.DROP_REASONS["link_down"]


def _free_loopback_port() -> int:
    """A port nothing listens on (bound and released; the server binds it later)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _wait_for(condition, what: str, timeout_s: float = 120.0, interval_s: float = 0.05):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        value = condition()
        if value:
            return value
        time.sleep(interval_s)
    raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")


class _Reader:
    """Iterates an event stream on a thread and keeps what it saw."""

    def __init__(self, stream: ps.EventStream) -> None:
        self.stream = stream
        self.events: list[ps.Event] = []
        self.error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        try:
            for event in self.stream:
                self.events.append(event)
        except BaseException as exc:  # reported by the test
            self.error = exc

    def of_kind(self, kind: str) -> list[ps.Event]:
        return [e for e in list(self.events) if e.kind == kind]

    def processed(self, iteration: int) -> bool:
        return any(e.iteration == iteration for e in self.of_kind("slice_processed"))

    def join(self, timeout_s: float = 120.0) -> None:
        self._thread.join(timeout_s)
        assert not self._thread.is_alive(), "the event stream did not end"
        assert self.error is None, repr(self.error)


def _link_down_range(first: int, last: int, count: int) -> ps.DroppedRange:
    return ps.DroppedRange(first, last, count, "link_down", 0.1 * first, 0.1 * last)


def _same_ranges(actual, expected) -> bool:
    return len(actual) == len(expected) and all(
        (a.iteration_first, a.iteration_last, a.count, a.reason) == (e.iteration_first, e.iteration_last, e.count,
                                                                    e.reason)
        and math.isclose(a.time_first, e.time_first) and math.isclose(a.time_last, e.time_last)
        for a, e in zip(actual, expected))


@pytest.mark.slow
def test_a_run_opened_before_its_server_exists_records_both_outages(tmp_path):
    address = f"127.0.0.1:{_free_loopback_port()}"
    options = ServerOptions(workers=1)
    open_timeout_s = 0.5
    # Client queue of 2, server queue of 4: the server's backlog policy never skips here.
    client = ps.connect(address, deadline_s=2.0, retry_budget_s=60.0)
    servers: list[BackgroundServer] = []
    try:
        started = time.monotonic()
        run = client.open_run(lone_spec("late server", queue_depth=4), queue_depth=2, max_retry_s=600.0,
                              open_timeout_s=open_timeout_s)
        # Before, open_run blocked until the retry budget (60 s here) ran out, then raised.
        assert time.monotonic() - started < 10 * open_timeout_s
        assert run.state == "pending" and run.run_id is None and run.info is None and not run.link_up
        assert run.latest_surfaces() == {} and run.latest_guidance() is None and run.latest_windows() is None
        assert run.describe() is None
        reader = _Reader(run.events(timeout_s=600, idle_timeout_s=None))  # waits for the run to open

        # While pending, submits never wait; the queue keeps the newest two, the rest is dropped.
        tickets = [run.submit(lone_hole_slice(i)) for i in range(6)]
        for ticket in tickets[:4]:
            ack = ticket.result(0)
            assert ack.skipped_locally and not ack.accepted and ack.drop_reason == LINK_DOWN
        assert not tickets[4].done() and not tickets[5].done()
        assert run.dropped_by_reason["link_down"] == 4 and run.stats.dropped_locally == 4
        assert [d.iteration for d in run.dropped] == [0, 1, 2, 3]

        servers.append(BackgroundServer(address, archive_root=tmp_path, workers=1, options=options).start())
        assert run.wait_open(120), run.errors
        assert run.state == "open" and run.run_id.startswith("run-") and run.info.run_id == run.run_id
        assert [t.result(120).accepted for t in tickets[4:]] == [True, True]
        _wait_for(lambda: len(run.gaps) == 1, "the first outage recorded on the server")
        first_gap = run.gaps[0]
        assert _same_ranges(first_gap.ranges, [_link_down_range(0, 3, 4)]) and first_gap.gap_index == 0
        assert first_gap.start_unix_s <= first_gap.end_unix_s and "OpenRun" in first_gap.cause
        assert run.submit(lone_hole_slice(6)).result(120).accepted
        _wait_for(lambda: all(reader.processed(i) for i in (4, 5, 6)), "slices 4-6 processed")

        # The server goes away mid-run.
        servers.pop().stop()
        ticket_7 = run.submit(lone_hole_slice(7))
        _wait_for(lambda: not run.link_up, "the sender noticing the outage")
        tickets = {i: run.submit(lone_hole_slice(i)) for i in (8, 9, 10, 11)}
        # Keep newest: 8 and 9 give way to 10 and 11; 7, retried while newer slices wait, too.
        # (Whichever of 7 or 8 the sender holds when its attempt fails, the same three go.)
        for i in (8, 9):
            assert tickets[i].result(120).drop_reason == LINK_DOWN
        assert _wait_for(lambda: ticket_7.done(), "slice 7 given up", timeout_s=120)
        assert ticket_7.result(0).skipped_locally and ticket_7.result(0).drop_reason == LINK_DOWN
        assert not tickets[11].done()

        servers.append(BackgroundServer(address, archive_root=tmp_path, workers=1, options=options).start())
        assert tickets[10].result(120).accepted and tickets[11].result(120).accepted
        # A late retry of the handle's OpenRun, after the restart, still finds the same run.
        channel = grpc.insecure_channel(address)
        try:
            retried = pb_grpc.HorizonServiceStub(channel).OpenRun(run._open_request, timeout=60)
        finally:
            channel.close()
        assert retried.run.run_id == run.run_id
        _wait_for(lambda: len(run.gaps) == 2, "the second outage recorded on the server")
        second_gap = run.gaps[1]
        assert _same_ranges(second_gap.ranges, [_link_down_range(7, 9, 3)]) and second_gap.gap_index == 1
        assert second_gap.start_unix_s > first_gap.end_unix_s and "SendSlice" in second_gap.cause
        info = run.close()
        assert info.client_gaps_recorded == 2 and info.state == "closed" and run.state == "closed"
        reader.join()
        # After the restart the event log was rebuilt from the archive: the first gap is replayed.
        replayed = [e for e in client.watch(run.run_id, timeout_s=120) if e.kind == "client_gap_recorded"]
    finally:
        client.close()
        for server in servers:
            server.stop()

    gap_events = reader.of_kind("client_gap_recorded")
    assert [e.gap.gap_index for e in gap_events] == [0, 1]
    assert [e.seq for e in gap_events] == [first_gap.event_seq, second_gap.event_seq]
    assert _same_ranges(gap_events[0].gap.ranges, first_gap.ranges)
    assert _same_ranges(gap_events[1].gap.ranges, second_gap.ranges)
    assert gap_events[0].iteration == 0 and gap_events[1].iteration == 7
    assert [(e.seq, e.gap.gap_index, e.gap.ranges) for e in replayed] == [
        (e.seq, e.gap.gap_index, e.gap.ranges) for e in gap_events]
    seqs = [e.seq for e in reader.events]
    assert seqs == list(range(1, len(seqs) + 1)), "the watcher missed or repeated events"
    assert {e.iteration for e in reader.of_kind("slice_processed")} == {4, 5, 6, 10, 11}

    view = open_archive(tmp_path, run.run_id)
    gaps = view.client_gap_list()
    assert [(g["gap_index"], g["slices_dropped"], g["event_seq"]) for g in gaps] == [
        (0, 4, first_gap.event_seq), (1, 3, second_gap.event_seq)]
    assert [[(r["iteration_first"], r["iteration_last"], r["count"], r["reason"]) for r in g["ranges"]]
            for g in gaps] == [[(0, 3, 4, "link_down")], [(7, 9, 3, "link_down")]]
    assert gaps[0]["start_unix_s"] == pytest.approx(first_gap.start_unix_s)
    assert gaps[1]["end_unix_s"] == pytest.approx(second_gap.end_unix_s)
    assert sorted(view.slices()["iteration"].tolist()) == [4, 5, 6, 10, 11]


def test_attach_while_unreachable_returns_pending_and_close_drops_what_waits():
    client = ps.connect(f"127.0.0.1:{_free_loopback_port()}", deadline_s=2.0)
    try:
        started = time.monotonic()
        run = client.attach_run("run-0123456789ab", open_timeout_s=0.2)
        assert time.monotonic() - started < 2.0  # 10x the open timeout
        assert run.state == "pending" and run.run_id == "run-0123456789ab" and run.info is None
        tickets = [run.submit(lone_hole_slice(i)) for i in range(5)]  # default depth 4 while the spec is unknown
        assert tickets[0].result(0).drop_reason == LINK_DOWN
        assert run.close(timeout_s=0.2) is None
        for ticket in tickets[1:]:
            ack = ticket.result(30)
            assert ack.skipped_locally and ack.drop_reason == ps.DROP_REASONS["handle_closed"]
        assert run.dropped_by_reason == {"link_down": 1, "queue_full": 0, "retry_time_exceeded": 0,
                                         "handle_closed": 4, "server_busy": 0}
        # A stream of a run that never answers ends by its idle timeout, not never.
        stream = client.watch("run-0123456789ab", idle_timeout_s=0.3)
        assert list(stream) == [] and stream.end_reason == "idle_timeout"
    finally:
        client.close()


def test_a_refusal_within_the_open_timeout_is_raised(server):
    with ps.connect(server.address, deadline_s=20.0) as client:
        with pytest.raises(ps.RunNotFoundError):
            client.attach_run("run-000000000000", open_timeout_s=60.0)
        spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0, 0, 0), 1.0),),
                          finder=ps.FinderOptions(lmax=1000))  # only the server checks the degree
        with pytest.raises(ps.PenumbraError) as info:
            client.open_run(spec, open_timeout_s=60.0)
        assert info.value.code == grpc.StatusCode.INVALID_ARGUMENT and "spec.finder.lmax" in info.value.details


def test_rejected_slices_appear_in_the_run_events(server, client, stub):
    run = client.open_run(lone_spec("rejections"), cache_results=False)
    reader = _Reader(run.events(timeout_s=300))
    # A NaN with the shim's own check bypassed: the server refuses it, naming the field.
    patch = patch_data(lone_hole(), box((0.013, -0.021, 0.017), 1.2, 17))
    fields = dict(patch.fields)
    fields["gamma_yy"] = np.array(fields["gamma_yy"], copy=True)
    fields["gamma_yy"][3, 4, 5] = np.nan
    nan_slice = ps.build_slice(time=0.7, iteration=7, variable_set="adm", check_finite=False,
                               patches=[ps.PatchData(origin=patch.origin, spacing=patch.spacing, fields=fields)])
    error = run.submit(nan_slice).exception(120)
    assert isinstance(error, ps.PenumbraError) and error.code == grpc.StatusCode.INVALID_ARGUMENT
    # A header whose shape does not match the data, as raw wire messages.
    requests = raw_requests(lone_hole_slice(8), run.run_id, chunk_bytes=100_000)
    header = requests[0].header
    header.patches[0].shape[:] = [33, 33, 32]
    header.total_bytes = 33 * 33 * 32 * 8 * len(header.patches[0].field_names)
    with pytest.raises(grpc.RpcError) as refused:
        stub.SendSlice(iter(requests), timeout=60)
    assert refused.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    # A stream that ends before the data the header declared: DATA_LOSS.
    with pytest.raises(grpc.RpcError) as cut:
        stub.SendSlice(iter(raw_requests(lone_hole_slice(9), run.run_id, chunk_bytes=100_000)[:3]), timeout=60)
    assert cut.value.code() == grpc.StatusCode.DATA_LOSS
    # Still taking slices; then the refusals are in the stream and the archive.
    assert run.submit(lone_hole_slice(10)).result(120).accepted
    info = run.close()
    reader.join()
    assert info.slices_rejected == 3
    rejected = reader.of_kind("slice_rejected")
    assert [(e.iteration, e.status_code) for e in rejected] == [
        (7, "INVALID_ARGUMENT"), (8, "INVALID_ARGUMENT"), (9, "DATA_LOSS")]
    assert "gamma_yy" in rejected[0].message and rejected[0].time == pytest.approx(0.7)
    assert rejected[0].message == error.details and refused.value.details() == rejected[1].message
    events = open_archive(info.archive_path).tracking_events()
    kinds = [str(k) for k in events["kind"]]
    assert kinds.count("slice_rejected") == 3
    assert sorted(int(s) for s, k in zip(events["seq"], kinds) if k == "slice_rejected") == [e.seq for e in rejected]
    assert [e.iteration for e in reader.of_kind("slice_processed")] == [10]


def test_record_client_gap_is_idempotent_and_checks_its_fields(client, stub):
    run = client.open_run(lone_spec("gap contract"), cache_results=False)
    request = pb.RecordClientGapRequest(
        run_id=run.run_id, gap_id="gap-1", start_unix_s=1000.0, end_unix_s=1010.5, cause="cable unplugged",
        ranges=[pb.DroppedRange(iteration_first=16, iteration_last=48, count=3, reason=pb.CLIENT_DROP_REASON_LINK_DOWN,
                                time_first_m=2.0, time_last_m=6.0),
                pb.DroppedRange(iteration_first=56, iteration_last=56, count=1,
                                reason=pb.CLIENT_DROP_REASON_RETRY_TIME_EXCEEDED, time_first_m=7.0, time_last_m=7.0)])
    first = stub.RecordClientGap(request, timeout=60)
    again = stub.RecordClientGap(request, timeout=60)
    assert not first.duplicate and again.duplicate
    assert (again.event_seq, again.gap_index) == (first.event_seq, first.gap_index) == (first.event_seq, 0)
    empty = stub.RecordClientGap(pb.RecordClientGapRequest(run_id=run.run_id, start_unix_s=2000.0, end_unix_s=2001.0),
                                 timeout=60)
    assert empty.gap_index == 1 and empty.event_seq > first.event_seq
    bad_cases = [
        (dict(end_unix_s=999.0), "end_unix_s"),
        (dict(start_unix_s=float("nan")), "start_unix_s"),
        (dict(gap_id="g" * 65), "gap_id"),
    ]
    for change, field in bad_cases:
        bad = pb.RecordClientGapRequest()
        bad.CopyFrom(request)
        for name, value in change.items():
            setattr(bad, name, value)
        with pytest.raises(grpc.RpcError) as info:
            stub.RecordClientGap(bad, timeout=60)
        assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT and field in info.value.details()
    for change, field in [("count", "ranges[1].count"), ("reason", "ranges[1].reason"),
                          ("iteration_last", "ranges[1].iteration_last")]:
        bad = pb.RecordClientGapRequest()
        bad.CopyFrom(request)
        bad.gap_id = "gap-bad"
        setattr(bad.ranges[1], change, 0)
        with pytest.raises(grpc.RpcError) as info:
            stub.RecordClientGap(bad, timeout=60)
        assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT and field in info.value.details()
    with pytest.raises(grpc.RpcError) as info:
        stub.RecordClientGap(pb.RecordClientGapRequest(run_id="run-000000000000"), timeout=60)
    assert info.value.code() == grpc.StatusCode.NOT_FOUND
    info = run.close()
    assert info.client_gaps_recorded == 2
    with pytest.raises(grpc.RpcError) as closed:
        stub.RecordClientGap(pb.RecordClientGapRequest(run_id=run.run_id, start_unix_s=1.0, end_unix_s=2.0),
                             timeout=60)
    assert closed.value.code() == grpc.StatusCode.FAILED_PRECONDITION
    gaps = open_archive(info.archive_path).client_gap_list()
    assert [(g["gap_index"], g["gap_id"], g["slices_dropped"], g["cause"]) for g in gaps] == [
        (0, "gap-1", 4, "cable unplugged"), (1, "", 0, "")]
    assert gaps[0]["ranges"] == [
        {"iteration_first": 16, "iteration_last": 48, "count": 3, "reason": "link_down", "time_first": 2.0,
         "time_last": 6.0},
        {"iteration_first": 56, "iteration_last": 56, "count": 1, "reason": "retry_time_exceeded", "time_first": 7.0,
         "time_last": 7.0}]
    assert (gaps[0]["start_unix_s"], gaps[0]["end_unix_s"]) == (1000.0, 1010.5)
    events = [e for e in client.watch(run.run_id, timeout_s=600) if e.kind == "client_gap_recorded"]
    assert [(e.seq, e.gap.slices_dropped, e.iteration) for e in events] == [
        (first.event_seq, 4, 16), (empty.event_seq, 0, 0)]


def test_event_streams_end_by_idle_timeout_or_cancel(client):
    run = client.open_run(lone_spec("idle"), cache_results=False)
    try:
        idle = run.events(idle_timeout_s=0.5)
        seen = list(idle)  # the opening event, then half a second of nothing
        assert [e.kind for e in seen] == ["run_state_changed"] and idle.end_reason == "idle_timeout"
        assert client.watch(run.run_id).end_reason == "" and ps.DEFAULT_IDLE_TIMEOUT_S == 300.0
        forever = run.events(idle_timeout_s=None)
        reader = _Reader(forever)
        _wait_for(lambda: reader.events, "the opening event")
        forever.cancel()
        reader.join(60)
        assert forever.end_reason == "cancelled"
    finally:
        run.close()


def test_the_watch_view_shows_refusals_and_outages():
    from penumbra_server.cli.watch import RunProgress

    progress = RunProgress()
    progress.absorb(ps.SliceRejectedEvent(seq=5, run_id="run-x", kind="slice_rejected", time=0.7, iteration=7,
                                          emitted_unix_s=0.0, status_code="INVALID_ARGUMENT",
                                          message="patches[0].fields['gamma_yy']: non-finite value"))
    gap = ps.ClientGap("g", 100.0, 112.5, (ps.DroppedRange(0, 3, 4, "link_down", 0.0, 0.3),), "OpenRun: no answer")
    progress.absorb(ps.ClientGapRecordedEvent(seq=6, run_id="run-x", kind="client_gap_recorded", time=0.0,
                                              iteration=0, emitted_unix_s=0.0, gap=gap))
    assert progress.warnings == [
        "slice refused at iteration 7 (INVALID_ARGUMENT): patches[0].fields['gamma_yy']: non-finite value",
        "client link down 12.5 s, 4 slices dropped: 0-3 (4, link_down)"]
