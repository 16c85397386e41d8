"""Every refusal carries a machine-readable reason and the field at fault: the standard gRPC rich
error model (google.rpc.Status with a google.rpc.ErrorInfo in ``grpc-status-details-bin``), read
through the shim (ServerError.reason / .field, protobuf only) and through a raw call parsed with
grpcio-status."""

from __future__ import annotations

import subprocess
import sys

import grpc
import pytest
from google.rpc import error_details_pb2
from grpc_status import rpc_status

import penumbra_shim as ps
from penumbra_shim._errors import error_from_rpc
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.server import parts
from penumbra_server.server.errors import PenumbraServerError, ServiceError, field_of, status_trailer

from service_support import lone_hole_slice, lone_spec


def _error_info(err: grpc.RpcError) -> error_details_pb2.ErrorInfo:
    """The ErrorInfo of a failed raw call, parsed with grpcio-status (independent of the shim)."""
    status = rpc_status.from_call(err)
    assert status is not None, "no grpc-status-details-bin trailer"
    assert status.code == err.code().value[0] and status.message == err.details()
    infos = []
    for detail in status.details:
        info = error_details_pb2.ErrorInfo()
        if detail.Unpack(info):
            infos.append(info)
    assert len(infos) == 1, status
    return infos[0]


def _bad_part_index(run_id: str) -> list[pb.SendSliceRequest]:
    requests = list(lone_hole_slice(30).requests(run_id))
    requests[0].header.part_index, requests[0].header.part_count = 5, 2
    return requests


@pytest.fixture(scope="module")
def open_run(server):
    with ps.connect(server.address, deadline_s=20.0) as client:
        run = client.open_run(lone_spec("error details"), cache_results=False)
        yield run
        run.close()


def test_an_unknown_run_gives_its_reason_and_field(client, stub):
    with pytest.raises(ps.RunNotFoundError) as info:
        client.get_run("run-000000000000")
    assert (info.value.reason, info.value.field) == ("RUN_NOT_FOUND", "run_id")
    with pytest.raises(grpc.RpcError) as raw:
        stub.GetRun(pb.GetRunRequest(run_id="run-000000000000"), timeout=20)
    details = _error_info(raw.value)
    assert (details.reason, details.domain, dict(details.metadata)) == ("RUN_NOT_FOUND", "penumbra",
                                                                         {"field": "run_id"})


def test_a_bad_field_gives_its_reason_and_field(client, stub):
    with pytest.raises(ps.InvalidArgumentError) as info:
        client._call("ListRuns", pb.ListRunsRequest(page_size=5000))
    assert (info.value.reason, info.value.field) == ("INVALID_FIELD", "page_size")
    spec = lone_spec("bad lmax").to_wire()
    spec.finder.lmax = 1
    with pytest.raises(grpc.RpcError) as raw:
        stub.OpenRun(pb.OpenRunRequest(spec=spec), timeout=20)
    details = _error_info(raw.value)
    assert (details.reason, details.metadata["field"]) == ("INVALID_FIELD", "spec.finder.lmax")
    assert error_from_rpc(raw.value).field == "spec.finder.lmax"


def test_a_part_index_out_of_range_gives_the_parts_reason(stub, open_run):
    with pytest.raises(grpc.RpcError) as raw:
        stub.SendSlice(iter(_bad_part_index(open_run.run_id)), timeout=60)
    assert raw.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    details = _error_info(raw.value)
    assert (details.reason, details.domain, details.metadata["field"]) == (
        "PART_INDEX_OUT_OF_RANGE", "penumbra", "header.part_index")
    shim_error = error_from_rpc(raw.value, "SendSlice")  # what the shim's sender raises
    assert isinstance(shim_error, ps.InvalidArgumentError)
    assert (shim_error.reason, shim_error.field) == ("PART_INDEX_OUT_OF_RANGE", "header.part_index")


def test_every_parts_reason_is_upper_snake_on_the_wire():
    for reason, code in parts.REASONS.items():
        error = parts._refusal(reason, "header.part_count: test")
        assert error.reason == reason.upper() and error.code == code and error.field == "header.part_count"


def test_the_shim_reads_the_trailer_without_googleapis_common_protos():
    trailer = status_trailer(grpc.StatusCode.NOT_FOUND, "run_id: no run", "RUN_NOT_FOUND", "run_id")
    [(key, value)] = trailer
    program = (
        "import sys\n"
        "from penumbra_shim._rich_status import error_details\n"
        f"d = error_details([({key!r}, {value!r})])\n"
        "assert (d.reason, d.domain, d.field) == ('RUN_NOT_FOUND', 'penumbra', 'run_id'), (d.reason, d.field)\n"
        "assert not any(m.startswith(('google.rpc', 'grpc_status')) for m in sys.modules), sorted(sys.modules)\n"
    )
    subprocess.run([sys.executable, "-c", program], check=True, timeout=120)
    from penumbra_shim._rich_status import error_details

    assert error_details([(key, b"not a status")]).reason == ""  # malformed: empty, never an error
    assert error_details([]).field == ""


def test_one_root_class_and_fields_read_from_the_message():
    from penumbra_server.server.auth import ExposureError

    assert issubclass(ServiceError, PenumbraServerError) and issubclass(ExposureError, PenumbraServerError)
    assert field_of("header.patches[2].shape: expected three") == "header.patches[2].shape"
    assert field_of("stream ended after 3 of 5 bytes") == ""
    assert ServiceError(grpc.StatusCode.NOT_FOUND, "run_id: x").reason == "RUN_NOT_FOUND"
