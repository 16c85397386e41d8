"""Bad input over the wire: each case gets its own status code and a message naming the field;
the server keeps serving the other run, and nothing accepted before is lost.

The tests of this module share two runs and run in file order: the last one checks that the
slices accepted before the bad input were all processed and archived.
"""

from __future__ import annotations

import grpc
import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.archive import open_archive

from service_support import lone_hole_slice, lone_spec, raw_requests


@pytest.fixture(scope="module")
def runs(server):
    """(target run, other run): the bad input goes to the first; both got slice 0 first."""
    with ps.connect(server.address, deadline_s=20.0) as client:
        target = client.open_run(lone_spec("bad input target"), cache_results=False)
        other = client.open_run(lone_spec("bystander"), cache_results=False)
        first = lone_hole_slice(0)
        for run in (target, other):
            assert run.submit(first).result(60).accepted
        yield client, target, other


@pytest.fixture(scope="module")
def good_requests(runs):
    _, target, _ = runs
    return raw_requests(lone_hole_slice(1), target.run_id, chunk_bytes=100_000)


def _refused(stub, requests) -> grpc.RpcError:
    with pytest.raises(grpc.RpcError) as info:
        stub.SendSlice(iter(requests), timeout=30)
    return info.value


def _copy(requests):
    out = []
    for r in requests:
        c = pb.SendSliceRequest()
        c.CopyFrom(r)
        out.append(c)
    return out


def test_unknown_run_is_not_found(stub, good_requests):
    requests = _copy(good_requests)
    requests[0].header.run_id = "run-000000000000"
    err = _refused(stub, requests)
    assert err.code() == grpc.StatusCode.NOT_FOUND
    assert "run_id" in err.details() and "run-000000000000" in err.details()


def test_unknown_run_through_the_shim_is_run_not_found(runs):
    client, _, _ = runs
    with pytest.raises(ps.RunNotFoundError) as info:
        client.attach_run("run-000000000000")
    assert info.value.code == grpc.StatusCode.NOT_FOUND


def test_header_shape_not_matching_the_data_is_invalid(stub, good_requests):
    requests = _copy(good_requests)
    header = requests[0].header
    header.patches[0].shape[:] = [33, 33, 32]
    header.total_bytes = 33 * 33 * 32 * 8 * len(header.patches[0].field_names)
    err = _refused(stub, requests)
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "header's shape [33, 33, 32]" in err.details() and "gamma_xx" in err.details()


def test_total_bytes_not_matching_the_patches_is_invalid(stub, good_requests):
    requests = _copy(good_requests)
    requests[0].header.total_bytes += 8
    err = _refused(stub, requests)
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "header.total_bytes" in err.details()


def test_missing_field_is_invalid(stub, good_requests):
    requests = [r for r in _copy(good_requests) if r.WhichOneof("part") == "header" or r.chunk.field_name != "K_zz"]
    patch = requests[0].header.patches[0]
    names = [n for n in patch.field_names if n != "K_zz"]
    del patch.field_names[:]
    patch.field_names.extend(names)
    requests[0].header.total_bytes = 33**3 * 8 * len(names)
    err = _refused(stub, requests)
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "header.patches[0].field_names: missing K_zz" in err.details()


def test_missing_field_is_refused_by_the_shim_before_sending():
    with pytest.raises(ps.SliceValidationError, match=r"patches\[0\]\.fields: missing K_zz"):
        ps.build_slice(time=0, iteration=0, variable_set="adm",
                       patches=[ps.PatchData(origin=(0, 0, 0), spacing=(1, 1, 1),
                                             fields={n: np.zeros((3, 3, 3)) for n in ps.required_fields("adm")
                                                     if n != "K_zz"})])


def test_nan_in_a_field_is_invalid(stub, runs):
    _, target, _ = runs
    good = lone_hole_slice(1)
    fields = {}
    for name in ps.required_fields("adm"):
        arr = np.frombuffer(good.patches[0].fields[name], dtype="<f8").reshape(good.patches[0].shape).copy()
        if name == "gamma_yy":
            arr[4, 5, 6] = np.nan
        fields[name] = arr
    patch = ps.PatchData(origin=good.patches[0].origin, spacing=good.patches[0].spacing, fields=fields)
    with pytest.raises(ps.SliceValidationError, match=r"fields\['gamma_yy'\]: non-finite .* \[4, 5, 6\]"):
        ps.build_slice(time=0.1, iteration=1, variable_set="adm", patches=[patch])
    unchecked = ps.build_slice(time=0.1, iteration=1, variable_set="adm", patches=[patch], check_finite=False)
    err = _refused(stub, raw_requests(unchecked, target.run_id))
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "field 'gamma_yy'" in err.details() and "[4, 5, 6]" in err.details()


def test_chunk_over_the_size_limit_is_resource_exhausted(stub, good_requests):
    requests = _copy(good_requests[:1])
    oversized = 3 * 1024 * 1024  # the test server's limit is 2 MiB
    requests.append(pb.SendSliceRequest(chunk=pb.SliceChunk(patch_index=0, field_name="gamma_xx", offset_bytes=0,
                                                            data=bytes(oversized))))
    err = _refused(stub, requests)
    assert err.code() == grpc.StatusCode.RESOURCE_EXHAUSTED
    assert "chunk.data" in err.details() and "limit of 2097152 bytes" in err.details()


def test_stream_ending_early_is_data_loss(stub, good_requests):
    requests = _copy(good_requests[:-1])
    err = _refused(stub, requests)
    assert err.code() == grpc.StatusCode.DATA_LOSS
    assert "stream ended after" in err.details() and "'K_zz'" in err.details()


def test_chunks_out_of_order_are_invalid(stub, good_requests):
    requests = _copy(good_requests)
    requests[1], requests[2] = requests[2], requests[1]
    err = _refused(stub, requests)
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "chunk.offset_bytes" in err.details()


def test_unknown_variable_set_is_invalid(stub, good_requests, runs):
    requests = _copy(good_requests)
    requests[0].header.variable_set = 99
    err = _refused(stub, requests)
    assert err.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "header.variable_set: unknown variable set 99" in err.details()
    with pytest.raises(grpc.RpcError) as info:
        stub.OpenRun(pb.OpenRunRequest(spec=pb.RunSpec(bodies=lone_spec().to_wire().bodies)), timeout=10)
    assert info.value.code() == grpc.StatusCode.INVALID_ARGUMENT
    assert "spec.variable_set" in info.value.details()
    with pytest.raises(ps.SliceValidationError, match="variable_set: unknown value 'bssn'"):
        ps.build_slice(time=0, iteration=0, variable_set="bssn", patches=[])


def test_duplicate_slice_is_acknowledged_again(stub, runs):
    _, target, _ = runs
    response = stub.SendSlice(iter(raw_requests(lone_hole_slice(0), target.run_id)), timeout=30)
    assert response.outcome == pb.SendSliceResponse.OUTCOME_DUPLICATE
    assert response.iteration == 0 and response.queue_position == -1
    again = target.submit(lone_hole_slice(0)).result(30)  # through the shim too
    assert again.duplicate and not again.accepted


def test_other_run_kept_being_served_and_nothing_accepted_was_lost(runs, archive_root):
    client, target, other = runs
    for run in (target, other):
        assert run.submit(lone_hole_slice(1)).result(60).accepted
        run.close()
    for run in (target, other):
        events = list(client.watch(run.run_id, timeout_s=600))
        assert [e.seq for e in events] == list(range(1, len(events) + 1))
        found = sorted(e.iteration for e in events if e.kind == "surface_found")
        assert found == [0, 1]
        view = open_archive(archive_root, run.run_id)
        assert sorted(view.slices()["iteration"].tolist()) == [0, 1]  # the duplicate was archived once
        assert view.surface("A")["iteration"].tolist() == [0, 1]
    info = client.get_run(target.run_id)
    assert info.slices_received == 2 and info.slices_duplicate == 2 and info.slices_processed == 2



def test_closed_run_refuses_slices(stub, runs):
    _, target, _ = runs  # closed by the test above
    err = _refused(stub, raw_requests(lone_hole_slice(5), target.run_id))
    assert err.code() == grpc.StatusCode.FAILED_PRECONDITION
    assert "is closed" in err.details()
