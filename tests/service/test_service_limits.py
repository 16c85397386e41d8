"""Server limits over the wire: overflowing shapes, garbage bytes, headers naming many fields.

Each refusal is a specific status code naming the field or the limit, never INTERNAL/UNKNOWN,
and a header naming many fields is checked off the event loop: other clients keep being served.
"""

from __future__ import annotations

import asyncio
import threading
import time

import grpc
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc
from penumbra_server.server import BackgroundServer, ServerOptions

from service_support import lone_hole_slice, lone_spec, raw_requests


@pytest.fixture(scope="module")
def target(server):
    with ps.connect(server.address, deadline_s=20.0) as client:
        run = client.open_run(lone_spec("limits target"), cache_results=False)
        yield run.run_id


def _copy(requests):
    out = []
    for r in requests:
        c = pb.SendSliceRequest()
        c.CopyFrom(r)
        out.append(c)
    return out


def _refused(stub, requests) -> grpc.RpcError:
    with pytest.raises(grpc.RpcError) as info:
        stub.SendSlice(iter(requests), timeout=30)
    return info.value


@pytest.mark.parametrize("shape", [[2**31 - 1] * 3, [2**31 - 1, 2**31 - 1, 2], [2**20, 2**20, 2**20]])
def test_shape_whose_node_count_overflows_is_invalid(stub, target, shape):
    requests = _copy(raw_requests(lone_hole_slice(1), target))
    header = requests[0].header
    header.patches[0].shape[:] = shape
    err = _refused(stub, requests[:1])
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT, err.details()
    assert "header.patches[0].shape" in err.details()


def test_garbage_bytes_on_the_raw_channel_are_invalid(server):
    """Bytes that are no SendSliceRequest: the servicer's stream reader turns protobuf's
    DecodeError into INVALID_ARGUMENT (reason MALFORMED_MESSAGE)."""
    with grpc.insecure_channel(server.address) as channel:
        send = channel.stream_unary("/penumbra.v1.HorizonService/SendSlice",
                                    request_serializer=lambda b: b, response_deserializer=pb.SendSliceResponse.FromString)
        with pytest.raises(grpc.RpcError) as info:
            send(iter([b"\xff\xff\xff\xff\x0f garbage \x00\x01"]), timeout=30)
    assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT, info.value.details()
    assert "message 0" in info.value.details() and "SendSliceRequest" in info.value.details()


def _many_fields_header(run_id: str, count: int):
    requests = _copy(raw_requests(lone_hole_slice(1), run_id))
    names = requests[0].header.patches[0].field_names
    names.extend(f"made_up_{i}" for i in range(count))
    return requests[:1]


def test_too_many_fields_per_patch_is_resource_exhausted_naming_the_limit(stub, target):
    err = _refused(stub, _many_fields_header(target, 20_000))
    assert err.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
    assert "header.patches[0].field_names" in err.details() and "max_fields_per_patch" in err.details()


def test_too_many_patches_is_resource_exhausted_naming_the_limit(stub, target):
    requests = _copy(raw_requests(lone_hole_slice(1), target))
    header = requests[0].header
    for _ in range(4097):
        header.patches.add().CopyFrom(header.patches[0])
    err = _refused(stub, requests[:1])
    assert err.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
    assert "max_patches_per_header" in err.details()


def test_duplicate_field_is_invalid(stub, target):
    requests = _copy(raw_requests(lone_hole_slice(1), target))
    names = requests[0].header.patches[0].field_names
    names.append(names[0])
    err = _refused(stub, requests[:1])
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "listed more than once" in err.details() and names[0] in err.details()


@pytest.fixture(scope="module")
def roomy_server(tmp_path_factory):
    """A server whose field cap lets a 20,000-name header reach the per-name checks."""
    options = ServerOptions(workers=1, max_fields_per_patch=1_000_000, upload_idle_timeout_s=1.0)
    with BackgroundServer("127.0.0.1:0", archive_root=tmp_path_factory.mktemp("roomy"), workers=1,
                          options=options) as bg:
        yield bg


def test_twenty_thousand_field_header_is_refused_while_other_runs_are_served(roomy_server):
    with ps.connect(roomy_server.address, deadline_s=30.0) as client:
        target_run = client.open_run(lone_spec("many fields"), cache_results=False)
        other = client.open_run(lone_spec("bystander"), cache_results=False)
    header = _many_fields_header(target_run.run_id, 20_000)
    channel = grpc.insecure_channel(roomy_server.address)
    stub = pb_grpc.HorizonServiceStub(channel)
    outcome: dict = {}

    def send() -> None:
        started = time.perf_counter()
        try:
            stub.SendSlice(iter(header), timeout=30)
            outcome["error"] = None
        except grpc.RpcError as exc:
            outcome["error"] = exc
        outcome["seconds"] = time.perf_counter() - started

    # A loop-lag probe on the server's own event loop: the longest stall while the header is checked.
    stop_probe = threading.Event()

    async def probe() -> float:
        worst = 0.0
        while not stop_probe.is_set():
            before = time.perf_counter()
            await asyncio.sleep(0.005)
            worst = max(worst, time.perf_counter() - before - 0.005)
        return worst

    probing = asyncio.run_coroutine_threadsafe(probe(), roomy_server._loop)
    sender = threading.Thread(target=send)
    sender.start()
    # GetRun on the other run while the header is being checked: it must answer.
    latencies = []
    while sender.is_alive() or not latencies:
        started = time.perf_counter()
        reply = stub.GetRun(pb.GetRunRequest(run_id=other.run_id), timeout=30)
        latencies.append(time.perf_counter() - started)
        assert reply.run.run_id == other.run_id
    sender.join(30)
    stop_probe.set()
    worst_stall = probing.result(30)
    channel.close()
    assert not sender.is_alive(), "the 20,000-field header was not answered within 30 s"
    err = outcome["error"]
    assert err is not None and err.code() == grpc.StatusCode.INVALID_ARGUMENT, err
    assert "unknown field" in err.details() and "more" in err.details()
    assert len(err.details()) < 2000  # a few names, the rest counted
    print(f"20,000-field header refused in {outcome['seconds']:.3f} s; "
          f"{len(latencies)} GetRun calls meanwhile, slowest {max(latencies):.3f} s; "
          f"longest event-loop stall {worst_stall:.3f} s")


def test_silent_upload_is_aborted_naming_the_idle_timeout(roomy_server):
    """The stream sends its header, then nothing: the server aborts it after upload_idle_timeout_s
    (1 s here) and does not wait for the client's own 30 s deadline."""
    with ps.connect(roomy_server.address, deadline_s=30.0) as client:
        run = client.open_run(lone_spec("silent upload"), cache_results=False)
    requests = raw_requests(lone_hole_slice(1), run.run_id)
    release = threading.Event()

    def stalled():
        yield requests[0]
        release.wait(60)  # never set before the server gives up

    with grpc.insecure_channel(roomy_server.address) as channel:
        stub = pb_grpc.HorizonServiceStub(channel)
        try:
            with pytest.raises(grpc.RpcError) as info:
                stub.SendSlice(stalled(), timeout=30)
        finally:
            release.set()
    assert info.value.code() == grpc.StatusCode.DEADLINE_EXCEEDED, info.value.details()
    assert "upload_idle_timeout_s" in info.value.details()


def test_slice_over_the_queued_bytes_budget_is_resource_exhausted_naming_the_budget(tmp_path):
    """A budget smaller than one slice: the header is refused before any data is read."""
    outgoing = lone_hole_slice(0)
    options = ServerOptions(workers=1, max_queued_bytes=1024 * 1024)
    with BackgroundServer("127.0.0.1:0", archive_root=tmp_path, workers=1, options=options) as bg:
        with ps.connect(bg.address, deadline_s=30.0) as client:
            run = client.open_run(lone_spec("budget"), cache_results=False)
        requests = raw_requests(outgoing, run.run_id)
        assert requests[0].header.total_bytes > options.max_queued_bytes
        with grpc.insecure_channel(bg.address) as channel:
            err = _refused(pb_grpc.HorizonServiceStub(channel), requests)
            # The refused reservation was released: GetRun still works and nothing was queued.
            info = pb_grpc.HorizonServiceStub(channel).GetRun(pb.GetRunRequest(run_id=run.run_id), timeout=30)
    assert err.code() == grpc.StatusCode.RESOURCE_EXHAUSTED, err.details()
    assert "max_queued_bytes" in err.details() and "header.total_bytes" in err.details()
    assert info.run.slices_received == 0


def test_open_runs_per_client_are_capped_naming_the_limit(tmp_path):
    options = ServerOptions(workers=1, max_open_runs_per_client=2)
    with BackgroundServer("127.0.0.1:0", archive_root=tmp_path, workers=1, options=options) as bg:
        with grpc.insecure_channel(bg.address) as channel:
            stub = pb_grpc.HorizonServiceStub(channel)
            spec = lone_spec("capped").to_wire()
            first = stub.OpenRun(pb.OpenRunRequest(spec=spec, request_id="first"), timeout=30).run.run_id
            stub.OpenRun(pb.OpenRunRequest(spec=spec), timeout=30)
            with pytest.raises(grpc.RpcError) as info:
                stub.OpenRun(pb.OpenRunRequest(spec=spec), timeout=30)
            # A retried OpenRun still finds its run; closing one makes room for another.
            again = stub.OpenRun(pb.OpenRunRequest(spec=spec, request_id="first"), timeout=30).run.run_id
            stub.CloseRun(pb.CloseRunRequest(run_id=first), timeout=30)
            third = stub.OpenRun(pb.OpenRunRequest(spec=spec), timeout=30).run
    assert info.value.code() == grpc.StatusCode.RESOURCE_EXHAUSTED, info.value.details()
    assert "max_open_runs_per_client = 2" in info.value.details() and "host 127.0.0.1" in info.value.details()
    assert again == first and third.run_id not in (first,)


def test_archive_bytes_per_client_are_capped_naming_the_limit(tmp_path):
    """A 1-byte budget: the client's first run fits (nothing archived yet); its archive then holds
    bytes, so the next OpenRun and the next slice of that run are refused."""
    options = ServerOptions(workers=1, max_archive_bytes_per_client=1)
    with BackgroundServer("127.0.0.1:0", archive_root=tmp_path, workers=1, options=options) as bg:
        with grpc.insecure_channel(bg.address) as channel:
            stub = pb_grpc.HorizonServiceStub(channel)
            spec = lone_spec("archive capped").to_wire()
            run_id = stub.OpenRun(pb.OpenRunRequest(spec=spec), timeout=30).run.run_id
            with pytest.raises(grpc.RpcError) as opening:
                stub.OpenRun(pb.OpenRunRequest(spec=spec), timeout=30)
            sending = _refused(stub, raw_requests(lone_hole_slice(0), run_id))
    for err, field in ((opening.value, "spec"), (sending, "header.run_id")):
        assert err.code() == grpc.StatusCode.RESOURCE_EXHAUSTED, err.details()
        assert err.details().startswith(field) and "max_archive_bytes_per_client = 1" in err.details()
