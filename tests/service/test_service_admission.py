"""Back-pressure: a client that asks before each upload (AdmissionReserve) is told when the run
would only skip the slice, drops it locally with reason "server_busy" and never sends its bytes;
the server's per-run count of bytes received proves it. The server falls behind
deterministically: every finder job is held (held_executor.py)."""

from __future__ import annotations

import grpc
import pytest

import penumbra_shim as ps
from penumbra_shim._wire import horizons_pb2 as pb
from penumbra_shim._wire import horizons_pb2_grpc as pb_grpc
from penumbra_server.server import BackgroundServer, ServerOptions
from penumbra_server.server.admission import AdmissionDesk

from held_executor import HeldExecutor
from service_support import lone_hole_slice, lone_spec, wait_until


def _raw_run(address: str, run_id: str) -> pb.Run:
    with grpc.insecure_channel(address) as channel:
        return pb_grpc.HorizonServiceStub(channel).GetRun(pb.GetRunRequest(run_id=run_id), timeout=20).run


def test_a_slice_the_run_would_only_skip_is_dropped_by_the_client_and_never_uploaded(tmp_path):
    held = HeldExecutor.start(1)
    count = 8
    try:
        with BackgroundServer(archive_root=tmp_path, workers=1, options=ServerOptions(workers=1),
                              executor=held) as bg, ps.connect(bg.address, deadline_s=20.0) as client:
            run = client.open_run(lone_spec("admission", queue_depth=1), queue_depth=count, cache_results=False,
                                  ask_admission=True)
            slices = [lone_hole_slice(i) for i in range(count)]
            first = run.submit(slices[0])
            held.wait_until_held(1)  # slice 0 is in the finder: the queue (depth 1) is empty
            tickets = [first] + [run.submit(s) for s in slices[1:]]
            assert run.flush(120)
            acks = [t.result(0) for t in tickets]
            during = _raw_run(bg.address, run.run_id)
            held.release()
            # One more slice once the queue drained: admitted, and its success reports the drops.
            wait_until(lambda: client.get_run(run.run_id).slices_processed == 2, "the two admitted slices processed",
                       120.0)
            last = run.submit(lone_hole_slice(count)).result(120)
            assert last.accepted
            # The sender reports the drops right after that success (RecordClientGap): wait for it.
            wait_until(lambda: _raw_run(bg.address, run.run_id).client_gaps_recorded == 1, "the gap recorded", 120.0)
            run.close()
            events = list(client.watch(run.run_id, timeout_s=60))
            after = _raw_run(bg.address, run.run_id)
    finally:
        held.close_pool()
    # Slice 0 went to the finder, slice 1 took the queue's one place; 2..7 were refused before upload.
    assert [a.accepted for a in acks] == [True, True] + [False] * (count - 2)
    assert all(a.skipped_locally and a.drop_reason == ps.DROP_REASONS["server_busy"] for a in acks[2:])
    assert run.stats.server_busy == count - 2 and run.stats.dropped_locally == count - 2
    assert run.stats.sent == 3
    # The server received exactly the bytes of the slices it admitted, nothing of the others.
    sent_bytes = sum(s.nbytes for s in slices[:2])
    assert during.bytes_received == sent_bytes
    assert during.admissions_granted == 2 and during.admissions_refused == count - 2
    assert after.bytes_received == sent_bytes + lone_hole_slice(count).nbytes
    # Nothing uploaded was skipped: back-pressure replaced the server's skips.
    assert not [e for e in events if e.kind == "slice_skipped"]
    assert sorted(e.iteration for e in events if e.kind == "slice_processed") == [0, 1, count]
    # The drops reach the run's record as a gap with the server-busy reason.
    gaps = [e for e in events if e.kind == "client_gap_recorded"]
    assert len(gaps) == 1
    (dropped,) = gaps[0].gap.ranges
    assert (dropped.iteration_first, dropped.iteration_last, dropped.count, dropped.reason) == (2, count - 1, count - 2,
                                                                                                  "server_busy")
    print(f"\nback-pressure: {count - 2} of {count} slices refused before upload; server received {sent_bytes} bytes "
          f"instead of {sum(s.nbytes for s in slices)}")


class _Run:
    """Just what AdmissionDesk reads of a run record."""

    def __init__(self, depth: int) -> None:
        self.run_id = "r"
        self.settings = type("S", (), {"queue_depth": depth})()
        self.accepted: set[int] = set()

    def check_accepting(self) -> None:
        pass

    def is_duplicate(self, iteration: int) -> bool:
        return iteration in self.accepted


def test_places_are_held_until_the_upload_or_their_expiry_and_the_byte_budget_counts():
    now = [0.0]
    desk = AdmissionDesk(hold_s=10.0, clock=lambda: now[0])
    run = _Run(depth=2)

    def ask(iteration: int, nbytes: int = 100, budget: int | None = None, queued: int = 0):
        return desk.reserve(run, pb.AdmissionReserveRequest(run_id="r", iteration=iteration, total_bytes=nbytes),
                            queued_slices=queued, budget_left=budget)

    assert ask(1).admitted and ask(2).admitted
    assert not ask(3).admitted  # two places held of depth 2
    assert ask(2).admitted  # a re-ask refreshes its own place
    desk.arrived("r", 1)  # slice 1's upload began: its place is consumed, the queue counts it now
    assert not ask(3, queued=1).admitted and ask(3, queued=0).admitted
    now[0] = 10.5  # places of 2 and 3 expired
    assert ask(4).admitted and ask(5).admitted and not ask(6).admitted
    run.accepted.add(6)
    assert ask(6).admitted  # a resend is answered at its header: always admitted
    now[0] = 30.0
    refusal = ask(7, nbytes=500, budget=400)
    assert not refusal.admitted and "max_queued_bytes" in refusal.reason
    with pytest.raises(Exception, match="total_bytes"):
        ask(8, nbytes=-1)
    assert desk.held_bytes() == 0
