"""Kill -9 of a real `penumbra serve` at named points and at random moments, and a SIGTERM: no
acknowledged slice is lost, none is archived twice, the archive opens in zarr and xarray after
every kill, and the run takes data again after every restart (a CloseRun retried across a
restart too)."""

from __future__ import annotations

import random
import threading
import time

import grpc
import pytest

from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_server.archive import archive_path
from penumbra_server.server.spool import spool_path

import penumbra_shim as ps
from penumbra_server.archive import open_archive

from crash_support import AckingClient, Serve, check_archive_after_kill, check_archive_final, free_port
from service_support import lone_hole_slice, lone_spec

pytestmark = pytest.mark.slow

#: Small slices: the finds are quick and the kills, not the numerics, are under test.
NODES = 21
#: New slices sent per server life before its crash point (the resends come on top).
PER_LIFE = 2


def _slice(iteration: int):
    return lone_hole_slice(iteration, nodes=NODES)


def _open(stub) -> str:
    spec = lone_spec("crash test", lmax=4, queue_depth=64).to_wire()
    return stub.OpenRun(pb.OpenRunRequest(spec=spec, request_id="crash-test"), timeout=60).run.run_id


def _after_restart(stub, run_id: str, client: AckingClient) -> pb.Run:
    """The restarted server holds every acknowledged slice and takes the run's data again."""
    run = stub.GetRun(pb.GetRunRequest(run_id=run_id), timeout=60).run
    assert run.state == pb.Run.STATE_OPEN
    if client.acked:
        assert run.highest_held_iteration >= max(client.acked), (run.highest_held_iteration, client.acked)
    return run


def _send_unacked(stub, run_id: str, client: AckingClient, upto: int) -> bool:
    """Send, in order, every iteration below ``upto`` not acknowledged yet; False if the server
    went away meanwhile."""
    for iteration in range(upto):
        if iteration not in client.acked and not client.send(stub, run_id, iteration):
            return False
    return True


def _close(stub, run_id: str) -> pb.Run | None:
    try:
        return stub.CloseRun(pb.CloseRunRequest(run_id=run_id), timeout=300).run
    except grpc.RpcError as exc:
        if exc.code() == grpc.StatusCode.UNAVAILABLE:
            return None
        raise


#: The archive's journal folded into its zarr arrays every 2 commits: kills meet folds too.
FOLD_OFTEN = ("archive_fold_commits=2",)

#: Random-moment kills after the named ones (bounded: each costs a server start).
RANDOM_KILLS = 2


def _random_life(tmp_path, archive, client: AckingClient, run_id: str, upto: int, chooser: random.Random) -> None:
    """A server life ended by kill -9 at a random moment while slices are sent."""
    serve = Serve(tmp_path, archive, options=FOLD_OFTEN)
    try:
        _after_restart(serve.stub, run_id, client)
        sender = threading.Thread(target=_send_unacked, args=(serve.stub, run_id, client, upto), daemon=True)
        sender.start()
        # The moment is random on purpose (sending, spooling, finding, committing): every
        # moment must be safe, so nothing below depends on which one it was.
        time.sleep(chooser.uniform(0.2, 4.0))
        serve.kill()
        sender.join(120)
        assert not sender.is_alive(), "the sender did not notice the kill"
        check_archive_after_kill(archive_path(archive, run_id))
    finally:
        serve.close()


def test_kills_lose_no_acknowledged_slice(tmp_path):
    archive = tmp_path / "archive"
    client = AckingClient(_slice)
    crashes = [
        "archive-mid-group:3",          # a fold: the first tracking groups half created
        "spool-before-rename:1",        # a slice half written to the spool: never acknowledged
        "spool-before-ack:1",           # a slice on disk, its answer never sent: replayed
        "archive-mid-commit:2",         # a commit's journal file written, not renamed
        "archive-mid-fold:2",           # a fold: rows written, their committed counts not
        "archive-before-consolidate:2", # a fold: counts written, consolidated metadata not
        "archive-before-journal-trim:2",  # a fold complete, its journal files not removed
        "commit-before-release:2",      # archived, spool file not removed; a CloseRun in flight
    ]
    run_id = None
    sent_upto = 0
    kills = 0
    replayed = 0
    for crash in crashes:
        serve = Serve(tmp_path, archive, crash, options=FOLD_OFTEN)
        try:
            if run_id is None:
                run_id = _open(serve.stub)
            else:
                replayed += _after_restart(serve.stub, run_id, client).slices_replayed
            sent_upto += PER_LIFE
            alive = _send_unacked(serve.stub, run_id, client, sent_upto)
            if crash.startswith("commit-before-release") and alive:
                assert _close(serve.stub, run_id) is None, "the close should have met the crash point"
            assert serve.killed_itself(), f"{crash}: serve ended otherwise:\n{serve.log.read_text()}"
            kills += 1
            check_archive_after_kill(archive_path(archive, run_id))
        finally:
            serve.close()
    chooser = random.Random(20261202)  # reproducible moments
    for _ in range(RANDOM_KILLS):
        sent_upto += PER_LIFE
        _random_life(tmp_path, archive, client, run_id, sent_upto, chooser)
        kills += 1
    # SIGTERM with slices queued: the graceful stop leaves them in the spool for the next start.
    serve = Serve(tmp_path, archive, options=FOLD_OFTEN)
    try:
        replayed += _after_restart(serve.stub, run_id, client).slices_replayed
        sent_upto += PER_LIFE
        assert _send_unacked(serve.stub, run_id, client, sent_upto), serve.log.read_text()
        serve.process.terminate()
        serve.process.wait(timeout=120)
        check_archive_after_kill(archive_path(archive, run_id))
    finally:
        serve.close()
    serve = Serve(tmp_path, archive, options=FOLD_OFTEN)
    try:
        replayed += _after_restart(serve.stub, run_id, client).slices_replayed
        assert _send_unacked(serve.stub, run_id, client, sent_upto), serve.log.read_text()
        closed = _close(serve.stub, run_id)  # waits for the spool to drain
        assert closed is not None and closed.state == pb.Run.STATE_CLOSED
        assert closed.slices_spooled == 0
    finally:
        serve.close()
    assert sorted(client.acked) == list(range(sent_upto))
    # Every slice answered before a kill (the client never resends those), and those on disk
    # whose answer a kill cut off, archived exactly once and processed:
    check_archive_final(archive_path(archive, run_id), list(range(sent_upto)))
    assert not spool_path(archive, run_id).exists()
    # A slice on disk whose answer the kill cut off was replayed, and its resend was a duplicate.
    assert replayed >= 1
    assert "OUTCOME_DUPLICATE" in client.acked.values()
    print(f"\nkills: {kills} ({len(crashes)} at named points, {RANDOM_KILLS} at random moments) and one SIGTERM, "
          f"slices acknowledged: {len(client.acked)}, lost: 0, archived twice: 0, "
          f"replays from the spool: {replayed}")


def test_the_shim_learns_what_a_restarted_server_holds(tmp_path):
    """A kill after the slice reached the spool but before its answer: the shim's retry finds
    the slice held (answered duplicate, never archived twice) and the handle tells what is held."""
    archive = tmp_path / "archive"
    listen = f"127.0.0.1:{free_port()}"
    first = Serve(tmp_path, archive, "spool-before-ack:2", listen=listen)
    second = None
    client = ps.connect(first.address, deadline_s=5.0, retry_budget_s=600.0)
    try:
        run = client.open_run(lone_spec("shim after a crash", lmax=4, queue_depth=64), max_retry_s=600.0)
        ack = run.submit(_slice(0)).result(120)
        assert ack.accepted and ack.persisted
        ticket = run.submit(_slice(1))  # the server kills itself before answering this one
        assert first.killed_itself()
        second = Serve(tmp_path, archive, listen=listen)
        ack = ticket.result(300)
        assert ack.duplicate and not ack.accepted, ack
        info = run.describe()
        assert run.server_held_iteration == 1 and info.highest_held_iteration == 1
        assert info.slices_replayed >= 1  # slice 1, and slice 0 if it was not archived before the kill
        assert run.submit(_slice(2)).result(120).accepted  # the run takes data again
        run.close()
    finally:
        client.close()
        first.close()
        if second is not None:
            second.close()
    view = open_archive(archive_path(archive, run.run_id))
    assert sorted(view.slices()["iteration"].tolist()) == [0, 1, 2]
    assert sorted(view.surface("A")["iteration"].tolist()) == [0, 1, 2]
