"""One slice from many senders: eight real OS processes act as MPI ranks, each sending its own
boxes of a Brill-Lindquist pair as one part of each iteration (no rank gathers the grid).

The same data sent whole to another run must give the same surfaces (areas and centroids to
round-off): the server merges the parts in part order into exactly the slice the whole send
carries. In the second iteration every rank crops its part to the server's data windows; the
ranks that own only far boxes, and the rank that owns nothing, send empty parts.
"""

from __future__ import annotations

import multiprocessing
import queue
import time

import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_shim.cropping import crop_patches

import parts_support as support


def _spec(name: str) -> ps.RunSpec:
    (m1, m2), (p1, p2) = support.MASSES, support.POSITIONS
    return ps.RunSpec(variable_set=support.VARIABLE_SET, name=name,
                      bodies=(ps.Body("A", tuple(np.add(p1, 0.05)), m1), ps.Body("B", tuple(np.subtract(p2, 0.04)), m2)),
                      finder=ps.FinderOptions(lmax=6), backlog=ps.BacklogOptions(queue_depth=4))


def _collect(client, run_id: str, iterations, timeout_s: float = 300.0) -> list[ps.Event]:
    """Events of a run until every iteration in ``iterations`` has its slice_processed event."""
    waiting = set(iterations)
    events = []
    for event in client.watch(run_id, from_seq=1, timeout_s=timeout_s):
        events.append(event)
        if event.kind == "slice_processed":
            waiting.discard(event.iteration)
            if not waiting:
                return events
    pytest.fail(f"run {run_id}: no slice_processed event for iterations {sorted(waiting)} within {timeout_s} s")


def _crop_sources(rank: int) -> list[dict]:
    """A rank's boxes in the form crop_patches takes (the shim's own crop)."""
    return [dict(box, fields=patch.fields) for box, patch in zip(support.rank_boxes(rank), support.rank_patches(rank))]


def _found(events) -> dict:
    return {(e.iteration, e.surface.label): e.surface for e in events if e.kind == "surface_found"}


@pytest.mark.slow
def test_eight_rank_processes_give_the_surfaces_of_the_whole_slice(server):
    with ps.connect(server.address, deadline_s=60.0) as client:
        in_parts = client.open_run(_spec("eight ranks"), cache_results=False)
        whole = client.open_run(_spec("the same slices whole"), cache_results=False)

        context = multiprocessing.get_context("spawn")
        results = context.Queue()
        barrier = context.Barrier(support.RANKS)
        ranks = [context.Process(target=support.rank_main, name=f"rank-{rank}",
                                 args=(server.address, in_parts.run_id, rank, barrier, results))
                 for rank in range(support.RANKS)]
        for process in ranks:
            process.start()
        try:
            # Meanwhile, the same data whole to the other run: iteration 0 whole, iteration 1
            # cropped to that run's windows (made from the same surfaces, hence the same windows).
            patches = support.all_patches()
            assert whole.submit_arrays(time=support.TIMES[0], iteration=0, patches=patches).result(120).accepted
            # The windows iteration 1 is cropped to (iteration 1 is not sent yet: made from iteration 0).
            windows = support.wait_for_windows(whole, 0)
            assert windows.iteration == 0
            ack = whole.submit_arrays(time=support.TIMES[1], iteration=1, patches=patches,
                                      crop_to_windows=True).result(120)
            assert ack.accepted and ack.cropped

            reports = {}
            deadline = time.monotonic() + 300
            while len(reports) < support.RANKS:
                try:
                    report = results.get(timeout=max(1.0, deadline - time.monotonic()))
                except queue.Empty:
                    pytest.fail(f"only ranks {sorted(reports)} reported within 300 s")
                reports[report["rank"]] = report
        finally:
            for process in ranks:
                process.join(60)
                if process.is_alive():
                    process.kill()
                    process.join()
        errors = {rank: r["error"] for rank, r in reports.items() if r["error"]}
        assert not errors, f"ranks failed: {errors}"
        assert all(process.exitcode == 0 for process in ranks)

        for iteration in (0, 1):
            acks = {rank: reports[rank]["acks"][iteration] for rank in range(support.RANKS)}
            assert all(a["accepted"] and not a["duplicate"] for a in acks.values()), acks
            assert all(a["parts_expected"] == support.RANKS for a in acks.values())
            assert all(a["part_index"] == rank for rank, a in acks.items())
            # Exactly one part completed the slice (the last to be stored); the others waited.
            completing = [rank for rank, a in acks.items() if not a["waiting_for_parts"]]
            assert len(completing) == 1, acks
            assert acks[completing[0]]["parts_received"] == support.RANKS
        # Iteration 0 went whole: only the rank that owns nothing sent an empty part.
        assert [r for r in range(support.RANKS) if reports[r]["acks"][0]["bytes_sent"] == 0] == [7]
        # Iteration 1 went cropped: the empty parts are exactly the ranks whose boxes miss the windows.
        missing_windows = [r for r in range(support.RANKS)
                           if not crop_patches(_crop_sources(r), windows.bounds(), extra_nodes=windows.extra_nodes)]
        empty = [r for r in range(support.RANKS) if reports[r]["acks"][1]["bytes_sent"] == 0]
        # The ranks cropped to their run's windows of iteration 0: the same as the whole run's (same
        # surfaces), so the empty parts are those the whole run's windows predict. (The latest windows
        # of either run may already come from iteration 1: when the ranks finish is up to the machine.)
        assert empty == missing_windows == [0, 1, 6, 7]
        assert all(reports[r]["acks"][1]["cropped"] for r in range(support.RANKS))

        parts_events = _collect(client, in_parts.run_id, (0, 1))
        whole_events = _collect(client, whole.run_id, (0, 1))
        assert not [e for e in parts_events if e.kind == "slice_parts_missing"]
        from_parts, from_whole = _found(parts_events), _found(whole_events)
        expected = {(i, label) for i in (0, 1) for label in ("A", "B")}
        assert set(from_parts) == set(from_whole) == expected
        for key in sorted(expected):
            a, b = from_parts[key], from_whole[key]
            assert a.area == pytest.approx(b.area, rel=1e-12, abs=0.0), key
            np.testing.assert_allclose(a.centroid, b.centroid, rtol=0, atol=1e-12, err_msg=str(key))
        # And they are the pair's horizons: Brill & Lindquist, Phys. Rev. 131, 471 (1963), leading
        # order in m/d (docs/references.md item 7): M_irr ~ m_i (1 + m_j / (2 d)).
        (m1, m2), (p1, p2) = support.MASSES, support.POSITIONS
        d = float(np.linalg.norm(np.subtract(p1, p2)))
        for (iteration, label), surface in from_parts.items():
            m, other = (m1, m2) if label == "A" else (m2, m1)
            assert surface.irreducible_mass == pytest.approx(m * (1 + other / (2 * d)), rel=5e-3)

        info = client.get_run(in_parts.run_id)
        assert info.slices_received == 2 and info.slices_incomplete == 0
        for handle in (in_parts, whole):
            handle.close()
