"""One archive commit per processed slice: the slice's surface rows, its tracking rows and its
slice row are written by one ArchiveWriter.commit (a real server, real workers, a real archive;
the writer's commit is wrapped only to record what each call wrote)."""

from __future__ import annotations

import threading

from penumbra_server.archive.writer import ArchiveWriter

from service_support import lone_hole_slice, lone_spec


def test_each_processed_slice_is_one_commit_with_all_its_rows(client, monkeypatch):
    calls: list[tuple[str, dict]] = []
    lock = threading.Lock()
    original = ArchiveWriter.commit

    def recording(writer, **kwargs):
        with lock:
            calls.append((str(writer.path), kwargs))
        return original(writer, **kwargs)

    monkeypatch.setattr(ArchiveWriter, "commit", recording)
    run = client.open_run(lone_spec("one commit per slice"), cache_results=False)
    for i in range(3):
        run.submit(lone_hole_slice(i))
    assert run.flush(60)
    run.close()
    mine = [kwargs for path, kwargs in calls if path.endswith(f"{run.run_id}.zarr")]
    with_slices = [kwargs for kwargs in mine if kwargs.get("slice_rows")]
    # Write-behind may put several slices in one commit; never a slice without its surfaces.
    assert 1 <= len(with_slices) <= 3
    assert sum(len(kwargs["slice_rows"]) for kwargs in with_slices) == 3
    for kwargs in with_slices:
        surface_rows = [row for rows in kwargs["surface_rows"].values() for row in rows]
        assert surface_rows, "the slice's surface rows are not in its commit"
        assert ({int(row["iteration"]) for row in surface_rows}
                == {int(row["iteration"]) for row in kwargs["slice_rows"]})
    # The other commits (opening the run, its state events) carry no surface row of their own.
    others = [kwargs for kwargs in mine if not kwargs.get("slice_rows")]
    assert others and all(not kwargs.get("surface_rows") for kwargs in others)
