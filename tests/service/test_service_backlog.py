"""Backlog: a client sending faster than the workers serve sees every skip reported, nothing
accepted is lost silently, and the newest slice is always processed.

The workers are made slower than the client deterministically: every finder job is held (a real
process pool behind a gate, held_executor.py) until all slices were sent and answered.
"""

from __future__ import annotations

import penumbra_shim as ps
from penumbra_server.archive import open_archive
from penumbra_server.server import BackgroundServer, ServerOptions

from held_executor import HeldExecutor
from service_support import LONE_CENTRE, box, lone_hole, patch_data, lone_spec


def test_fast_sender_sees_skips_and_nothing_accepted_is_lost(tmp_path):
    held = HeldExecutor.start(2)
    try:
        with BackgroundServer(archive_root=tmp_path, workers=2, options=ServerOptions(workers=2),
                              executor=held) as bg, ps.connect(bg.address, deadline_s=20.0) as client:
            count = 16
            # The client keeps every slice (its queue holds all): the backlog is the server's.
            run = client.open_run(lone_spec("backlog", queue_depth=1), queue_depth=count, cache_results=False)
            patches = [patch_data(lone_hole(), box(LONE_CENTRE, 1.2, 33))]
            tickets = [run.submit(ps.build_slice(time=0.1 * i, iteration=i, variable_set="adm", patches=patches))
                       for i in range(count)]
            # Every slice is sent and answered while the first find is still held: submit() and the
            # server's accept never wait for a find.
            assert run.flush(60)
            held.wait_until_held(1)
            held.release()
            acks = [t.result(0) for t in tickets]
            run.close()
            events = list(client.watch(run.run_id, timeout_s=600))
            info = client.get_run(run.run_id)
    finally:
        held.close_pool()
    assert [e.seq for e in events] == list(range(1, len(events) + 1))
    accepted = {a.iteration for a in acks if a.accepted}
    dropped = {a.iteration for a in acks if a.skipped_locally}
    skipped = {e.skipped_iteration for e in events if e.kind == "slice_skipped"}
    processed = {e.iteration for e in events if e.kind == "slice_processed"}
    assert accepted | dropped == set(range(count)) and not accepted & dropped
    # All reached the server while the first find was held: with the slices in flight (their finds
    # started) and a queue of one, every other slice but the newest was skipped.
    in_flight = ServerOptions().slices_in_flight
    assert accepted == set(range(count)) and len(skipped) >= count - 1 - in_flight
    # Every accepted slice was either processed or reported skipped, never both, never silently lost.
    assert skipped | processed == accepted and not skipped & processed
    assert max(accepted) in processed  # keep newest: the last slice is always processed
    # Each reply names the iterations skipped to make room for it.
    assert set().union(*(a.skipped_iterations for a in acks if a.accepted)) == skipped
    assert info.slices_skipped == len(skipped) and info.slices_processed == len(processed)
    view = open_archive(tmp_path, run.run_id)
    rows = view.slices()
    outcome = dict(zip(rows["iteration"].tolist(), rows["outcome"].tolist()))
    assert {i for i, o in outcome.items() if o == 2} == skipped
    assert {i for i, o in outcome.items() if o == 1} == processed
