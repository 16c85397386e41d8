"""A campaign: one real loopback server serving 20 runs at once, each from its own client with its
own writer token; every run keeps to its own queue, events, archive and token."""

from __future__ import annotations

import grpc
import numpy as np
import pytest

import penumbra_shim as ps
from penumbra_server.archive import open_archive
from penumbra_server.server import BackgroundServer, ServerOptions
from penumbra_server.server.tokens import TokenBook, TokenEntry, token_digest
from penumbra_server.tools.campaign import ITERATION_STRIDE, campaign_slice, run_campaign

OPENER = "campaign-test-opener-token-0123456789abcdef"
RUNS, SLICES = 20, 2


@pytest.mark.slow
def test_twenty_concurrent_runs_stay_isolated(tmp_path):
    book = TokenBook((TokenEntry("campaign", "opener", token_digest(OPENER)),))
    with BackgroundServer(archive_root=tmp_path, workers=2, token_book=book,
                          options=ServerOptions(restore_runs=False)) as bg:
        records = run_campaign(bg.address, runs=RUNS, slices=SLICES, token=OPENER, timeout_s=600.0)
        first, second = records[0], records[1]
        # A run's writer token opens nothing of another run: sending and closing are refused.
        with ps.connect(bg.address, deadline_s=30.0) as stranger:
            with pytest.raises(ps.PenumbraError) as caught:
                stranger.attach_run(second.run_id, writer_token=first.writer_token, cache_results=False)
            assert caught.value.code == grpc.StatusCode.PERMISSION_DENIED and second.run_id in caught.value.details
            with pytest.raises(ps.PenumbraError) as caught:
                stranger.close_run(second.run_id)
            assert caught.value.code in (grpc.StatusCode.UNAUTHENTICATED, grpc.StatusCode.PERMISSION_DENIED)
        # Nor does a writer token send to another run while it is open: a fresh run tried with
        # the first run's token.
        with ps.connect(bg.address, token=OPENER, deadline_s=30.0) as opener:
            fresh = opener.open_run(ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0.0, 0.0, 0.0), 1.0),),
                                               name="fresh"), cache_results=False)
            with ps.connect(bg.address, deadline_s=30.0) as intruder:
                handle = intruder.attach_run(first.run_id, writer_token=first.writer_token, cache_results=False)
                assert handle.run_id == first.run_id
                with pytest.raises(ps.PenumbraError) as caught:
                    intruder.attach_run(fresh.run_id, writer_token=first.writer_token, cache_results=False)
                assert caught.value.code == grpc.StatusCode.PERMISSION_DENIED
            fresh.close()
    assert len({r.run_id for r in records}) == RUNS
    assert len({r.writer_token for r in records}) == RUNS
    paths = set()
    for record in records:
        mine = {record.index * ITERATION_STRIDE + j for j in range(SLICES)}
        assert set(record.accepted) == mine, record
        # Its events only: its run id, its iterations, gap-free from 1.
        assert {e.run_id for e in record.events} == {record.run_id}
        assert [e.seq for e in record.events] == list(range(1, len(record.events) + 1))
        assert {e.iteration for e in record.events if e.kind in ("slice_processed", "surface_found")} == mine
        assert [e.iteration for e in record.events if e.kind == "slice_processed"] == sorted(mine)
        found = [e for e in record.events if e.kind == "surface_found"]
        assert len(found) == SLICES
        # Its own puncture (docs/references.md item 1: apparent horizon of area 16 pi m^2 about it).
        for e in found:
            assert e.surface.area / (16 * np.pi) == pytest.approx(1.0, abs=2e-2)
            assert np.allclose(e.surface.centroid, (0.013 + 0.01 * record.index, -0.021, 0.017), atol=0.02)
        # Its own archive, holding its rows only.
        view = open_archive(tmp_path, record.run_id)
        paths.add(str(view.path))
        assert set(view.slices()["iteration"].tolist()) == mine
        assert set(view.surface("A")["iteration"].tolist()) == mine
        assert view.state == "closed"
    assert len(paths) == RUNS


def test_campaign_slices_differ_per_run():
    # The isolation checks above rest on each run's slices being its own.
    a, b = campaign_slice(0, 1), campaign_slice(1, 1)
    assert (a.iteration, b.iteration) == (1, ITERATION_STRIDE + 1)
