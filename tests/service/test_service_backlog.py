"""Backlog: a client sending much faster than the workers serve sees every skip reported, and
submit() never blocks beyond the assembly of the slice (measured)."""

from __future__ import annotations

import time

import numpy as np

import penumbra_shim as ps
from penumbra_server.archive import open_archive

from service_support import LONE_CENTRE, box, lone_hole, patch_data, lone_spec


def test_fast_sender_sees_skips_and_submit_never_waits(client, archive_root):
    run = client.open_run(lone_spec("backlog", queue_depth=1), queue_depth=2, cache_results=False)
    patches = [patch_data(lone_hole(), box(LONE_CENTRE, 1.2, 33))]
    count = 16
    assembly_s, submit_s, tickets = [], [], []
    for i in range(count):
        t0 = time.perf_counter()
        outgoing = ps.build_slice(time=0.1 * i, iteration=i, variable_set="adm", patches=patches)
        t1 = time.perf_counter()
        tickets.append(run.submit(outgoing))
        submit_s.append(time.perf_counter() - t1)
        assembly_s.append(t1 - t0)
    # submit() only queues: far below the cost of assembling (copying) the slice itself, and
    # far below sending it (3.4 MB) or finding its horizon (tenths of a second).
    assert max(submit_s) < 0.05, submit_s
    assert float(np.median(submit_s)) < 0.2 * float(np.median(assembly_s)), (submit_s, assembly_s)
    assert run.flush(60)
    acks = [t.result(0) for t in tickets]
    run.close()
    events = list(client.watch(run.run_id, timeout_s=60))
    assert [e.seq for e in events] == list(range(1, len(events) + 1))
    accepted = {a.iteration for a in acks if a.accepted}
    dropped = {a.iteration for a in acks if a.skipped_locally}
    skipped = {e.skipped_iteration for e in events if e.kind == "slice_skipped"}
    processed = {e.iteration for e in events if e.kind == "slice_processed"}
    assert accepted | dropped == set(range(count)) and not accepted & dropped
    # Every accepted slice was either processed or reported skipped, never both, never silently lost.
    assert skipped, "the server never had to skip: the test did not outrun the workers"
    assert skipped | processed == accepted and not skipped & processed
    assert max(accepted) in processed  # keep newest: the last slice is always processed
    # Each reply names the iterations skipped to make room for it.
    assert set().union(*(a.skipped_iterations for a in acks if a.accepted)) == skipped
    info = client.get_run(run.run_id)
    assert info.slices_skipped == len(skipped) and info.slices_processed == len(processed)
    view = open_archive(archive_root, run.run_id)
    rows = view.slices()
    outcome = dict(zip(rows["iteration"].tolist(), rows["outcome"].tolist()))
    assert {i for i, o in outcome.items() if o == 2} == skipped
    assert {i for i, o in outcome.items() if o == 1} == processed
