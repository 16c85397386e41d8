"""Kill -9 of a real `penumbra serve` while a slice arrives in parts: every acknowledged part is
on disk before its answer, the restarted server rebuilds the slice from its part files, the
remaining parts complete it, and it is processed and archived exactly once.

Life 1 dies right after keeping part 1 of iteration 0 (the sender never got its answer); life 2
finds parts 0 and 1 held, counts no incomplete slice as held, takes part 2, then dies right after
keeping the last part of iteration 1; life 3 assembles iteration 1 from its files alone, then dies
in the middle of writing a part of iteration 2; life 4 has no trace of that part and takes it.
"""

from __future__ import annotations

import time

import grpc
import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.archive import archive_path, open_archive
from penumbra_server.server.spool import spool_path

from crash_support import Serve, check_archive_after_kill, check_archive_final, free_port
from service_support import LONE_CENTRE, box, lone_hole, lone_hole_slice, lone_spec, patch_data

pytestmark = pytest.mark.slow

POLL_S = 120.0
PARTS = 3
FINE_NODES = 25


def _part_patches() -> list[list[ps.PatchData]]:
    """Part 0: a coarse box around the hole; parts 1 and 2: the two overlapping halves (along y)
    of a finer box (as ranks of a domain-decomposed evolution own them)."""
    hole = lone_hole()
    coarse = patch_data(hole, box(LONE_CENTRE, 1.2, 21))
    fine = box(LONE_CENTRE, 0.9, FINE_NODES, level=1)
    h = fine["spacing"][1]
    halves = []
    for first_j, last_j in ((0, 2 * (FINE_NODES - 1) // 3), ((FINE_NODES - 1) // 3, FINE_NODES - 1)):
        origin = (fine["origin"][0], fine["origin"][1] + first_j * h, fine["origin"][2])
        spec = dict(fine, origin=origin, shape=(FINE_NODES, last_j - first_j + 1, FINE_NODES))
        halves.append(patch_data(hole, spec))
    return [[coarse], [halves[0]], [halves[1]]]


def _field_bytes(patches) -> int:
    return int(sum(np.asarray(v).nbytes for p in patches for v in p.fields.values()))


def _send(stub, run_id: str, iteration: int, index: int, patches) -> pb.SendSliceResponse | None:
    """One part; None when the server went away before answering."""
    outgoing = ps.build_slice(time=0.25 * iteration, iteration=iteration, variable_set="adm", patches=patches,
                              part_index=index, part_count=PARTS)
    try:
        return stub.SendSlice(outgoing.requests(run_id), timeout=60)
    except grpc.RpcError as exc:
        if exc.code() in (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.CANCELLED, grpc.StatusCode.UNKNOWN):
            return None
        raise


def _part_files(archive, run_id: str) -> list[str]:
    directory = spool_path(archive, run_id)
    return sorted(p.name for p in directory.iterdir() if ".part" in p.name) if directory.is_dir() else []


def _wait(condition, what: str, serve: Serve):
    deadline = time.monotonic() + POLL_S
    while time.monotonic() < deadline:
        value = condition()
        if value:
            return value
        time.sleep(0.05)
    pytest.fail(f"{what} did not happen within {POLL_S} s:\n{serve.log.read_text()}")


def _reopen_reason(stub, run_id: str) -> str:
    """The reason of the run's latest state change (its re-opening by this server)."""
    run = stub.GetRun(pb.GetRunRequest(run_id=run_id), timeout=60).run
    stream = stub.WatchRun(pb.WatchRunRequest(run_id=run_id, start_seq=1), timeout=POLL_S)
    reasons = []
    try:
        for response in stream:
            event = response.event
            if event.WhichOneof("kind") == "run_state_changed":
                reasons.append(event.run_state_changed.reason)
            if event.seq >= run.last_event_seq:
                break
    finally:
        stream.cancel()
    return reasons[-1] if reasons else ""


def _processed(stub, run_id: str) -> int:
    return stub.GetRun(pb.GetRunRequest(run_id=run_id), timeout=60).run.slices_processed


def test_acknowledged_parts_survive_kills_and_the_slice_is_processed_once(tmp_path):
    archive = tmp_path / "archive"
    archive.mkdir()
    parts = _part_patches()
    spec = lone_spec("parts crash", lmax=4, queue_depth=16).to_wire()
    spec.part_deadline_s = 600.0  # no deadline passes during the test: only the kills decide

    # Life 1: part 0 of iteration 0 is kept and answered; the server dies after keeping part 1.
    serve = Serve(tmp_path, archive, crash_at="part-spooled-before-ack:2")
    try:
        run_id = serve.stub.OpenRun(pb.OpenRunRequest(spec=spec, request_id="parts-crash"), timeout=60).run.run_id
        first = _send(serve.stub, run_id, 0, 0, parts[0])
        assert first.outcome == pb.SendSliceResponse.OUTCOME_PART_ACCEPTED and first.persisted
        assert (first.parts_received, first.parts_expected) == (1, PARTS)
        assert _send(serve.stub, run_id, 0, 1, parts[1]) is None  # killed before answering
        assert serve.killed_itself()
    finally:
        serve.close()
    assert _part_files(archive, run_id) == ["it0.part0of3", "it0.part1of3"]
    check_archive_after_kill(archive_path(archive, run_id))

    # Life 2: the partial slice is back, not counted as held; the unanswered part is held
    # (a duplicate), the last part completes the slice.
    serve = Serve(tmp_path, archive, crash_at="part-spooled-before-ack:4")
    try:
        run = serve.stub.GetRun(pb.GetRunRequest(run_id=run_id), timeout=60).run
        assert run.state == pb.Run.STATE_OPEN and run.highest_held_iteration == -1
        assert run.slices_received == 0
        reason = _reopen_reason(serve.stub, run_id)
        assert "iteration 0 (parts 0, 1 of 3 held)" in reason and "600 s" in reason, reason
        again = _send(serve.stub, run_id, 0, 1, parts[1])
        assert again.outcome == pb.SendSliceResponse.OUTCOME_DUPLICATE and again.parts_received == 2
        last = _send(serve.stub, run_id, 0, 2, parts[2])
        assert last.outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED and last.persisted
        assert (last.parts_received, last.parts_expected) == (PARTS, PARTS)
        assert serve.stub.GetRun(pb.GetRunRequest(run_id=run_id), timeout=60).run.highest_held_iteration == 0
        _wait(lambda: _processed(serve.stub, run_id) >= 1, "iteration 0 processed", serve)
        _wait(lambda: not [n for n in _part_files(archive, run_id) if n.startswith("it0.")],
              "the part files of iteration 0 removed", serve)
        # Iteration 1: the server dies right after keeping its last part (the 4th part kept in this life).
        for index in range(PARTS - 1):
            assert _send(serve.stub, run_id, 1, index, parts[index]).persisted
        assert _send(serve.stub, run_id, 1, PARTS - 1, parts[PARTS - 1]) is None
        assert serve.killed_itself()
    finally:
        serve.close()
    assert _part_files(archive, run_id) == [f"it1.part{k}of3" for k in range(PARTS)]
    check_archive_after_kill(archive_path(archive, run_id))

    # Life 3: iteration 1 is assembled from its files alone and held; a resend of its last part
    # (whose answer the kill cut off) is a duplicate. Then the server dies while writing part 1 of
    # iteration 2 (the 3rd durable write of this life: iteration 1's slice, part 0, part 1).
    serve = Serve(tmp_path, archive, crash_at="spool-before-rename:3")
    try:
        run = serve.stub.GetRun(pb.GetRunRequest(run_id=run_id), timeout=60).run
        assert run.highest_held_iteration == 1, run
        assert "1 slice(s) assembled from acknowledged parts" in _reopen_reason(serve.stub, run_id)
        again = _send(serve.stub, run_id, 1, PARTS - 1, parts[PARTS - 1])
        assert again.outcome == pb.SendSliceResponse.OUTCOME_DUPLICATE and again.parts_received == PARTS
        _wait(lambda: not [n for n in _part_files(archive, run_id) if n.startswith("it1.")],
              "the part files of iteration 1 removed", serve)
        assert _send(serve.stub, run_id, 2, 0, parts[0]).persisted
        assert _send(serve.stub, run_id, 2, 1, parts[1]) is None  # killed mid-write: never acknowledged
        assert serve.killed_itself()
    finally:
        serve.close()
    assert ".it2.part1of3.tmp" in sorted(p.name for p in spool_path(archive, run_id).iterdir())

    # Life 4: the interrupted write is gone, part 0 of iteration 2 is held; part 1 (never
    # acknowledged) is taken anew, part 2 completes the slice.
    serve = Serve(tmp_path, archive)
    try:
        assert serve.stub.GetRun(pb.GetRunRequest(run_id=run_id), timeout=60).run.highest_held_iteration == 1
        assert "iteration 2 (parts 0 of 3 held)" in _reopen_reason(serve.stub, run_id)
        assert _part_files(archive, run_id) == ["it2.part0of3"]
        taken = _send(serve.stub, run_id, 2, 1, parts[1])
        assert taken.outcome == pb.SendSliceResponse.OUTCOME_PART_ACCEPTED and taken.parts_received == 2
        assert _send(serve.stub, run_id, 2, 2, parts[2]).outcome == pb.SendSliceResponse.OUTCOME_ACCEPTED
        _wait(lambda: _processed(serve.stub, run_id) >= 3, "iterations 0 to 2 processed", serve)
        _wait(lambda: not _part_files(archive, run_id), "every part file removed", serve)
        closed = serve.stub.CloseRun(pb.CloseRunRequest(run_id=run_id), timeout=300).run
        assert closed.state == pb.Run.STATE_CLOSED
    finally:
        serve.close()

    # Each slice archived once, processed, its horizon found, every part's bytes counted.
    check_archive_final(archive_path(archive, run_id), [0, 1, 2])
    view = open_archive(archive_path(archive, run_id))
    expected_bytes = sum(_field_bytes(p) for p in parts)
    assert view.slices()["bytes"].tolist() == [expected_bytes] * 3
    assert sorted(view.surface("A")["iteration"].tolist()) == [0, 1, 2]
    assert not spool_path(archive, run_id).exists()


def test_the_shim_resending_a_part_kept_before_a_kill_learns_the_slice_is_held(tmp_path):
    """A kill after the last part was kept, before its answer: the restarted server assembles the
    slice from its part files; the shim's retry of that part finds the iteration held (a
    duplicate, never archived twice) instead of being refused as late."""
    archive = tmp_path / "archive"
    listen = f"127.0.0.1:{free_port()}"
    parts = _part_patches()[:2]
    first = Serve(tmp_path, archive, "part-spooled-before-ack:2", listen=listen)
    second = None
    client = ps.connect(first.address, deadline_s=5.0, retry_budget_s=600.0)
    try:
        spec = lone_spec("shim parts after a crash", lmax=4, queue_depth=16)
        run = client.open_run(spec, max_retry_s=600.0)
        ack = run.submit_arrays(time=0.0, iteration=0, patches=parts[0], part_index=0, part_count=2).result(120)
        assert ack.accepted and ack.waiting_for_parts and ack.persisted, ack
        ticket = run.submit_arrays(time=0.0, iteration=0, patches=parts[1], part_index=1, part_count=2)
        assert first.killed_itself()
        second = Serve(tmp_path, archive, listen=listen)
        ack = ticket.result(300)
        assert ack.duplicate and not ack.accepted, ack
        assert run.describe().highest_held_iteration == 0
        assert run.submit(lone_hole_slice(1, nodes=21)).result(120).accepted  # the run takes data again
        run.close()
    finally:
        client.close()
        first.close()
        if second is not None:
            second.close()
    view = open_archive(archive_path(archive, run.run_id))
    assert view.slices()["iteration"].tolist() == [0, 1]
    assert view.slices()["bytes"][0] == _field_bytes(parts[0]) + _field_bytes(parts[1])
    assert sorted(view.surface("A")["iteration"].tolist()) == [0, 1]
