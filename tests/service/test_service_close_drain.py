"""CloseRun waits until every acknowledged slice is processed and archived; a close whose
deadline passes goes on in the server, and its retry answers once the spool has drained."""

from __future__ import annotations

import grpc
import pytest

from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc
from penumbra_server.archive import open_archive
from penumbra_server.server import BackgroundServer, ServerOptions
from penumbra_server.server.spool import spool_path

from held_executor import HeldExecutor
from service_support import lone_hole_slice, lone_spec, raw_requests


def test_a_close_past_its_deadline_goes_on_and_its_retry_waits_for_the_spool(tmp_path):
    held = HeldExecutor.start(1)
    try:
        with BackgroundServer(archive_root=tmp_path, workers=1, options=ServerOptions(workers=1),
                              executor=held) as bg, grpc.insecure_channel(bg.address) as channel:
            stub = pb_grpc.HorizonServiceStub(channel)
            spec = lone_spec("close drains", lmax=4, queue_depth=16).to_wire()
            run_id = stub.OpenRun(pb.OpenRunRequest(spec=spec), timeout=60).run.run_id
            for i in range(3):
                reply = stub.SendSlice(iter(raw_requests(lone_hole_slice(i, nodes=21), run_id)), timeout=60)
                assert reply.outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED and reply.persisted
            assert len(list(spool_path(tmp_path, run_id).glob("it*.slice"))) == 3
            held.wait_until_held(1)  # the first find waits: nothing can be archived yet
            with pytest.raises(grpc.RpcError) as caught:
                stub.CloseRun(pb.CloseRunRequest(run_id=run_id), timeout=0.5)
            assert caught.value.code() == grpc.StatusCode.DEADLINE_EXCEEDED
            held.release()
            run = stub.CloseRun(pb.CloseRunRequest(run_id=run_id), timeout=300).run
    finally:
        held.close_pool()
    assert run.state == pb.Run.STATE_CLOSED
    assert (run.slices_processed, run.slices_spooled, run.highest_held_iteration) == (3, 0, 2)
    assert not spool_path(tmp_path, run_id).exists()
    assert sorted(open_archive(tmp_path, run_id).slices()["iteration"].tolist()) == [0, 1, 2]
