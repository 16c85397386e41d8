"""CloseRun waits until every acknowledged slice is processed and archived; a close whose
deadline passes goes on in the server, and its retry answers once the spool has drained."""

from __future__ import annotations

import time

import grpc
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc
from penumbra_server.archive import open_archive
from penumbra_server.server import BackgroundServer, ServerOptions
from penumbra_server.server.spool import spool_path

from held_executor import HeldExecutor
from service_support import LONE_CENTRE, box, lone_hole, lone_hole_slice, lone_spec, patch_data, raw_requests


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


def test_a_slice_assembled_from_parts_is_spooled_once_complete(tmp_path):
    """Each part is kept in a part file before its answer (persisted true); the assembled slice
    goes to the spool while it waits, its part files go, and it leaves the spool when archived."""
    held = HeldExecutor.start(1)
    try:
        with BackgroundServer(archive_root=tmp_path, workers=1, options=ServerOptions(workers=1),
                              executor=held) as bg, grpc.insecure_channel(bg.address) as channel:
            stub = pb_grpc.HorizonServiceStub(channel)
            spec = lone_spec("parts spooled", lmax=4, queue_depth=16).to_wire()
            run_id = stub.OpenRun(pb.OpenRunRequest(spec=spec), timeout=60).run.run_id
            whole = box(LONE_CENTRE, 1.2, 21)
            for index in range(2):  # the same box twice would conflict: the second part holds none
                patches = [patch_data(lone_hole(), whole)] if index == 0 else []
                outgoing = ps.build_slice(time=0.0, iteration=4, variable_set="adm", part_index=index, part_count=2,
                                          patches=patches)
                reply = stub.SendSlice(iter(raw_requests(outgoing, run_id)), timeout=60)
                assert reply.persisted
            held.wait_until_held(1)  # the slice is being processed; nothing is archived yet
            spooled = spool_path(tmp_path, run_id) / "it4.slice"
            deadline = time.monotonic() + 120
            while not spooled.exists() or [p for p in spooled.parent.iterdir() if ".part" in p.name]:
                assert time.monotonic() < deadline, ("the assembled slice never replaced its parts in the spool: "
                                                     f"{sorted(p.name for p in spooled.parent.iterdir())}")
                time.sleep(0.02)
            held.release()
            run = stub.CloseRun(pb.CloseRunRequest(run_id=run_id), timeout=300).run
    finally:
        held.close_pool()
    assert (run.slices_processed, run.slices_spooled, run.highest_held_iteration) == (1, 0, 4)
    assert not spool_path(tmp_path, run_id).exists()


def test_a_slice_the_spool_cannot_take_is_refused_not_acknowledged(tmp_path):
    with BackgroundServer(archive_root=tmp_path, workers=1, options=ServerOptions(workers=1)) as bg, \
            grpc.insecure_channel(bg.address) as channel:
        stub = pb_grpc.HorizonServiceStub(channel)
        spec = lone_spec("spool in the way", lmax=4).to_wire()
        run_id = stub.OpenRun(pb.OpenRunRequest(spec=spec), timeout=60).run.run_id
        blocker = spool_path(tmp_path, run_id)
        blocker.write_text("a file where the spool directory goes")
        with pytest.raises(grpc.RpcError) as caught:
            stub.SendSlice(iter(raw_requests(lone_hole_slice(0, nodes=21), run_id)), timeout=60)
        assert caught.value.code() == grpc.StatusCode.INTERNAL
        assert "spool" in caught.value.details() and "not accepted" in caught.value.details()
        run = stub.GetRun(pb.GetRunRequest(run_id=run_id), timeout=60).run
        assert (run.slices_received, run.highest_held_iteration) == (0, -1)
        blocker.unlink()  # the resend is taken as new
        reply = stub.SendSlice(iter(raw_requests(lone_hole_slice(0, nodes=21), run_id)), timeout=60)
        assert reply.outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED and reply.persisted
        stub.CloseRun(pb.CloseRunRequest(run_id=run_id), timeout=300)
